"""The teacher for tuning: the original model made invariant by combining its outputs over the group's views.

For an input x the original classifier f sees the |G| views g·x. :func:`combine_views` turns
the |G| logit vectors into one class distribution (docs/design.md §13):

``probability``
    the probability average 1/|G| Σ_g softmax(f(g·x)): right when the original was trained with
    rotation augmentation, so every view is good;
``logit``
    softmax of the logit average 1/|G| Σ_g f(g·x);
``most-confident``
    softmax(f(g*·x)) for the view g* whose top class probability is highest: far better when the
    original only ever saw upright samples, whose wrong views are confidently wrong and swamp an
    average.

Over an exact group (c2, c4, d4, ...) every rule gives an invariant model: moving x by h only
permutes its views. :class:`GroupAveraged` is that model (test-time averaging);
:func:`teach` runs the teacher on one batch (once per sample into a cache on disk, or on every
training step when the images are augmented).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
from torch import nn

from orbify.common.modes import module_mode
from orbify.common.options import check_choice
from orbify.errors import InputShapeError
from orbify.symmetry.groups import Group, parse_group
from orbify.verification.segmentation import dense_output

VIEW_COMBINATIONS = ("probability", "logit", "most-confident")


def combine_views(logits: torch.Tensor, how: str) -> torch.Tensor:
    """Combine the logits of every view, shape (views, batch, classes, *pixels), into log-probabilities
    (batch, classes, *pixels); for a dense map every pixel is combined on its own."""
    check_choice("view combination", how, VIEW_COMBINATIONS)
    log_probabilities = logits.log_softmax(2)
    if how == "probability":
        return log_probabilities.logsumexp(0) - math.log(logits.shape[0])
    if how == "logit":
        return logits.mean(0).log_softmax(1)
    best_view = log_probabilities.amax(2, keepdim=True).argmax(0, keepdim=True)   # (1, batch, 1, *pixels)
    return log_probabilities.gather(0, best_view.expand(1, *logits.shape[1:]))[0]


def view_logits(model: nn.Module, group: Group, images: torch.Tensor) -> torch.Tensor:
    """``model``'s logits on every view g·x of a batch, in one forward pass: shape (|G|, batch, classes) for a
    classifier; for a dense model (|G|, batch, classes, H, W), each view's map moved back by g⁻¹ so that its
    pixels line up with the image as given (docs/design.md §18)."""
    views = torch.cat([group.act_grid(g, images) for g in range(group.order)])
    logits = dense_output(model(views))
    if logits.dim() not in (2, 4):
        raise InputShapeError(f"The original model returns a tensor of shape {tuple(logits.shape)}; distillation "
                              "needs class scores (batch, classes) or maps (batch, classes, H, W)",
                              fix="tune classifiers or dense models whose output has a class axis")
    logits = logits.unflatten(0, (group.order, images.shape[0]))
    if logits.dim() == 5:
        logits = torch.stack([group.act_grid(group.inverse(g), logits[g]) for g in range(group.order)])
    return logits


class GroupAveraged(nn.Module):
    """``model`` made invariant over ``group`` by combining its views (test-time averaging); returns log-probabilities
    (for a dense model: a map equivariant under ``group``, each pixel combined over the views moved back).

    It costs |G| forward passes of ``model`` per image. ``views`` is one of :data:`VIEW_COMBINATIONS`.
    """

    def __init__(self, model: nn.Module, group: str | Group, views: str = "probability"):
        super().__init__()
        check_choice("view combination", views, VIEW_COMBINATIONS)
        self.model = model
        self.group = parse_group(group)
        self.views = views

    def forward(self, images: torch.Tensor) -> torch.Tensor:
        return combine_views(view_logits(self.model, self.group, images), self.views)


@dataclass
class TeacherBatch:
    """The teacher on one batch: ``log_probabilities`` (batch, classes, *pixels) under the chosen combination, and
    the predicted class of every combination (``top_class``, (batch, *pixels) each), so that the choice can be
    judged."""

    log_probabilities: torch.Tensor
    top_class: dict[str, torch.Tensor]


@torch.no_grad()
def teach(model: nn.Module, group: Group, images: torch.Tensor, views: str) -> TeacherBatch:
    """Run the original ``model`` (in eval mode; its mode is restored) over the |G| views of a batch, in float32."""
    check_choice("view combination", views, VIEW_COMBINATIONS)
    with module_mode(model, training=False):
        logits = view_logits(model, group, images).float()
    combined = {how: combine_views(logits, how) for how in VIEW_COMBINATIONS}
    return TeacherBatch(combined[views], {how: rows.argmax(1) for how, rows in combined.items()})
