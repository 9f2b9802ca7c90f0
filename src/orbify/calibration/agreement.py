"""How often a calibrated model's top class agrees with the original's, averaged over the group."""

from __future__ import annotations

import torch
from torch.nn.utils import parametrize

from orbify.calibration.paired import CONVERTED, ORIGINAL, PairedRun, moved_back
from orbify.symmetry.groups import Group


def top1_agreement(run: PairedRun, group: Group, slots: list[int], notes: list[str]) -> float | None:
    """Top-1 agreement of the converted model with the original's output averaged over the copies ``slots``.

    Over every calibration image (every pixel, for dense outputs). None when the outputs are not
    class scores of matching shape, or when the model returns several values (a note says so).
    """
    mine, theirs = run.output_name(CONVERTED), run.output_name(ORIGINAL)
    if mine is None or theirs is None:
        notes.append("the model returns several values: no agreement measured")
        return None
    agree = total = 0
    with parametrize.cached():
        for b in range(len(run.batches)):
            ours = run.values(b, CONVERTED, 0, [mine])[mine]
            views = [moved_back(group, run.values(b, ORIGINAL, group.inverse(s), [theirs])[theirs], s)
                     for s in slots]
            average = torch.stack(views).mean(0)
            if ours.dim() not in (2, 4) or ours.shape != average.shape:
                return None
            agree += int((ours.argmax(1) == average.argmax(1)).sum())
            total += ours.argmax(1).numel()
    return agree / total if total else None
