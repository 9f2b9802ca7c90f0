"""Checkpoint size: the converted-model file beside the original state dict and the baked model's.

For each model and group, the converted model (``channels`` budget) is written with
:func:`orbify.save` (a ``.orb`` file: base weights and a JSON description) and its size compared with
``torch.save(original.state_dict())`` and with the state dict of the baked model
(:func:`orbify.bake_model`, every weight expanded). Stored parameter counts come from
:func:`orbify.verification.measure.count_params`. Sizes are deterministic, so each is measured once.

Run: ``python benchmarks/checkpoint_size.py`` (full, a few minutes) or ``--quick`` (smoke run, under a minute).
"""

from __future__ import annotations

import tempfile  # noqa: E402
from pathlib import Path  # noqa: E402

import torch  # noqa: E402
import torchvision  # noqa: E402
import typer  # noqa: E402

import harness  # first: it sets the OpenMP wait policy before torch loads
from orbify import bake_model, convert, save
from orbify.verification.measure import count_params, state_dict_bytes

MB = 1e6


def main(quick: bool = typer.Option(False, "--quick", help="Smoke run: resnet18 under d4 only.")) -> None:
    """Write converted-model files and print their sizes beside the original and baked state dicts."""
    harness.fix_threads()
    names = ["resnet18"] if quick else ["resnet18", "mobilenet_v2", "resnet50", "densenet121"]
    groups = ["d4"] if quick else ["c4", "d4"]
    size = 225
    harness.print_header("Checkpoint size", {
        "models": ", ".join(f"torchvision {n} (weights=None)" for n in names), "groups": ", ".join(groups),
        "budget": "channels (channel matching off: it does not change what is stored)",
        "converted file": "orbify.save (.orb)", "original and baked": "torch.save(state_dict()), bytes in memory",
        "MB": "10⁶ bytes",
    })
    table = harness.markdown_table("model", "group", "original params", "converted params", "original MB",
                                   "converted file MB", "converted file ÷ original", "baked state dict MB")
    with tempfile.TemporaryDirectory() as folder:
        for name in names:
            plain = getattr(torchvision.models, name)(weights=None).eval()
            original = state_dict_bytes(plain)
            for group in groups:
                harness.progress(f"{name} under {group}: converting and saving")
                converted, plan = convert(plain, group, "channels", "invariant", torch.randn(1, 3, size, size),
                                          match=False)
                path = save(converted, plan, Path(folder) / f"{name}-{group}.orb", reference=f"torchvision:{name}")
                file_bytes = path.stat().st_size
                table.add_row(name, group, f"{count_params(plain):,}", f"{count_params(converted):,}",
                              f"{original / MB:.2f}", f"{file_bytes / MB:.2f}", f"{file_bytes / original:.3f}",
                              f"{state_dict_bytes(bake_model(converted)) / MB:.2f}")
    harness.console.print(table)


if __name__ == "__main__":
    typer.run(main)
