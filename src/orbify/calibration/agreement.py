"""How often a calibrated model's top class agrees with the original's, averaged over the group."""

from __future__ import annotations

from collections.abc import Mapping

import torch
from torch.nn.utils import parametrize

from orbify.calibration.paired import CONVERTED, ORIGINAL, PairedRun
from orbify.calibration.positions import moved_back
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout


def top1_agreement(run: PairedRun, group: Group, slots: list[int], layouts: Mapping[str, Layout | None],
                   notes: list[str]) -> float | None:
    """Top-1 agreement of the converted model with the original's output averaged over the copies ``slots``.

    Over every calibration image (every pixel, for dense outputs). ``layouts``: the layout of every
    value by node name (the plan's ``values``). None when the outputs are not class scores of
    matching shape, or when the model returns several values (a note says so).
    """
    mine, theirs = run.output_name(CONVERTED), run.output_name(ORIGINAL)
    if mine is None or theirs is None:
        notes.append("the model returns several values: no agreement measured")
        return None
    agree = total = 0
    with parametrize.cached():
        for b in range(len(run.batches)):
            ours = run.values(b, CONVERTED, 0, [mine])[mine]
            views = [moved_back(group, run.values(b, ORIGINAL, group.inverse(s), [theirs])[theirs], s,
                                layouts.get(theirs)) for s in slots]
            average = torch.stack(views).mean(0)
            if ours.dim() not in (2, 4) or ours.shape != average.shape:
                return None
            agree += int((ours.argmax(1) == average.argmax(1)).sum())
            total += ours.argmax(1).numel()
    return agree / total if total else None
