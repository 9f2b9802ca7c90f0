"""A converted file written before the package was reorganised still loads, and computes what it computed.

``data/example-c4-calibrated-format-1.0.orb`` was written by orbify at commit fef4e05 (format "1.0",
layouts stored as strings, the calibration report as a plain dict): the bundled example CNN
converted to c4 with ``init="calibrated"`` on 32 upright tiles (seed 5). ``data/...-probe.pt``
holds two tiles at any angle (seed 6) and the logits that version computed on them.
"""

from __future__ import annotations

from pathlib import Path

import torch

import orbify
from orbify.calibration.report import CalibrationReport
from orbify.symmetry.layouts import Orbit, Plain

DATA = Path(__file__).parent / "data"


def test_format_1_0_file_loads_with_typed_plan_and_same_outputs():
    loaded = orbify.load(DATA / "example-c4-calibrated-format-1.0.orb")
    probe = torch.load(DATA / "example-c4-calibrated-probe.pt", weights_only=True)
    with torch.no_grad():
        logits = loaded.module(probe["probe"])
    assert torch.equal(logits, probe["logits"])   # bitwise: same weights, same ops, one thread (conftest)
    plan = loaded.plan
    assert plan.group == "c4" and plan.init == "calibrated"
    assert isinstance(plan.calibration, CalibrationReport) and plan.calibration.images == 32
    first = plan.layers[0]
    assert first.layout_in == Plain(3) and isinstance(first.layout_out, Orbit)
    assert all(isinstance(layer.layout_out, (Orbit, Plain)) for layer in plan.layers)
