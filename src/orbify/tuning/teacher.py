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
:func:`teacher_outputs` runs it once over a data set and keeps one distribution per sample.
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
from orbify.tuning.distributed import World

VIEW_COMBINATIONS = ("probability", "logit", "most-confident")


def combine_views(logits: torch.Tensor, how: str) -> torch.Tensor:
    """Combine the logits of every view, shape (views, batch, classes), into log-probabilities (batch, classes)."""
    check_choice("view combination", how, VIEW_COMBINATIONS)
    log_probabilities = logits.log_softmax(-1)
    if how == "probability":
        return log_probabilities.logsumexp(0) - math.log(logits.shape[0])
    if how == "logit":
        return logits.mean(0).log_softmax(-1)
    best_view = log_probabilities.amax(-1).argmax(0)   # (batch,)
    return log_probabilities.gather(0, best_view[None, :, None].expand(1, *logits.shape[1:]))[0]


def view_logits(model: nn.Module, group: Group, images: torch.Tensor) -> torch.Tensor:
    """``model``'s logits on every view g·x of a batch, shape (|G|, batch, classes), in one forward pass."""
    views = torch.cat([group.act_grid(g, images) for g in range(group.order)])
    logits = model(views)
    if logits.dim() != 2:
        raise InputShapeError(f"The original model returns a tensor of shape {tuple(logits.shape)}; distillation "
                              "needs class scores of shape (batch, classes)",
                              fix="tune classifiers only (models with an invariant head)")
    return logits.unflatten(0, (group.order, images.shape[0]))


class GroupAveraged(nn.Module):
    """``model`` made invariant over ``group`` by combining its views (test-time averaging); returns log-probabilities.

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
class TeacherOutputs:
    """The teacher's class distribution for every sample, computed once.

    ``log_probabilities`` is (samples, classes) for the chosen combination. ``top_class`` holds the
    predicted class of every combination, (samples,) each, so that the choice can be judged
    against labels at no extra cost.
    """

    log_probabilities: torch.Tensor
    top_class: dict[str, torch.Tensor]


@torch.no_grad()
def teacher_outputs(model: nn.Module, group: Group, images: torch.Tensor, views: str, world: World,
                    batch_size: int) -> TeacherOutputs:
    """Run the original ``model`` over the |G| views of every image once, sharing the batches among ``world``.

    ``model`` is evaluated in eval mode (its mode is restored afterwards) on ``world.device``.
    Every process returns the same result on the CPU.
    """
    check_choice("view combination", views, VIEW_COMBINATIONS)
    chosen: list[torch.Tensor] = []
    tops: dict[str, list[torch.Tensor]] = {how: [] for how in VIEW_COMBINATIONS}
    with module_mode(model, training=False):
        for index in world.my_batches(len(images), batch_size):
            logits = view_logits(model, group, images[index].to(world.device)).float()
            for how in VIEW_COMBINATIONS:
                combined = combine_views(logits, how)
                tops[how].append(combined.argmax(-1).cpu())
                if how == views:
                    chosen.append(combined.cpu())
    count = len(images)
    rows = torch.cat(chosen) if chosen else torch.empty(0, 0)
    classes = int(world.from_main(rows.shape[1] if world.is_main else None))
    rows = rows.reshape(-1, classes)
    return TeacherOutputs(
        log_probabilities=world.gather_rows(rows, count, batch_size),
        top_class={how: world.gather_rows(_cat_long(top), count, batch_size) for how, top in tops.items()},
    )


def _cat_long(parts: list[torch.Tensor]) -> torch.Tensor:
    return torch.cat(parts) if parts else torch.empty(0, dtype=torch.long)
