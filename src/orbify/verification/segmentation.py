"""Segmentation quality: per-pixel accuracy and intersection over union, upright and under the group (docs/design.md §18).

Every figure comes from a confusion matrix ``C`` (rows: true class, columns: predicted class,
counted over pixels; pixels whose mask value is :data:`~orbify.data.tiles.UNLABELLED` are left
out). Per-pixel accuracy is ``trace(C) / sum(C)``; the IoU of class k is
``C[k, k] / (row_k + column_k − C[k, k])``, undefined (None) for a class that occurs neither in the
masks nor in the predictions; the mean IoU averages the defined ones.

Under a group the same pixels are scored again with the image *and its mask* moved by every other
element g: the model's map for g·x against g·mask. An equivariant model scores alike on every
element; a plain one does not, and the worst element shows how far it falls.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import torch
from torch import nn

from orbify.common.modes import module_mode
from orbify.errors import InputShapeError
from orbify.symmetry.groups import Group


def dense_output(output) -> torch.Tensor:
    """The map a dense model predicts: the tensor itself, the ``"out"`` entry of a dict (torchvision's
    segmentation models also return ``"aux"``), else a dict's or tuple's first tensor."""
    if isinstance(output, torch.Tensor):
        return output
    if isinstance(output, Mapping):
        return output["out"] if "out" in output else dense_output(next(iter(output.values())))
    if isinstance(output, (tuple, list)) and output:
        return dense_output(output[0])
    raise InputShapeError(f"The model returns a {type(output).__name__}, not a tensor of class scores",
                          fix="return class scores (N, classes, H, W), or a dict with them under 'out'")


def confusion(predicted: torch.Tensor, target: torch.Tensor, classes: int) -> torch.Tensor:
    """The (classes, classes) int64 confusion matrix of predicted and true class maps of one shape.

    Pixels whose target is negative (:data:`~orbify.data.tiles.UNLABELLED`) are not counted.
    """
    if predicted.shape != target.shape:
        raise InputShapeError(f"Predicted maps {tuple(predicted.shape)} and masks {tuple(target.shape)} differ in "
                              "shape", fix="give one mask per image, of the size of the model's output map")
    counted = target >= 0
    pairs = target[counted].long() * classes + predicted[counted].long()
    return torch.bincount(pairs.cpu(), minlength=classes * classes).view(classes, classes)


@dataclass(frozen=True)
class SegmentationScores:
    """Per-pixel ``accuracy``, ``mean_iou`` and ``class_iou`` (None where a class is in neither maps nor masks)."""

    accuracy: float
    mean_iou: float
    class_iou: tuple[float | None, ...]

    @classmethod
    def from_confusion(cls, matrix: torch.Tensor) -> "SegmentationScores":
        """The scores of a confusion matrix (rows true, columns predicted)."""
        matrix = matrix.double()
        hits = matrix.diagonal()
        union = matrix.sum(0) + matrix.sum(1) - hits
        defined = union > 0
        iou = torch.where(defined, hits / union.clamp(min=1), torch.zeros_like(hits))
        total = float(matrix.sum())
        return cls(accuracy=float(hits.sum()) / total if total else float("nan"),
                   mean_iou=float(iou[defined].mean()) if bool(defined.any()) else float("nan"),
                   class_iou=tuple(float(v) if d else None for v, d in zip(iou.tolist(), defined.tolist())))


@dataclass(frozen=True)
class GroupScores:
    """Scores on the images as given (``upright``) and on images and masks moved by each other element (``moved``,
    in the group's element order, identity left out)."""

    upright: SegmentationScores
    moved: tuple[SegmentationScores, ...]

    @property
    def moved_mean_iou(self) -> float:
        """Mean IoU averaged over the moved copies (the upright figure for a group of one)."""
        return sum(s.mean_iou for s in self.moved) / len(self.moved) if self.moved else self.upright.mean_iou

    @property
    def worst_iou(self) -> float:
        """The lowest mean IoU of any element, the identity included."""
        return min([self.upright.mean_iou, *(s.mean_iou for s in self.moved)])

    @property
    def moved_accuracy(self) -> float:
        """Per-pixel accuracy averaged over the moved copies."""
        return sum(s.accuracy for s in self.moved) / len(self.moved) if self.moved else self.upright.accuracy

    @classmethod
    def restore(cls, fields: dict) -> "GroupScores":
        """The scores of their ``dataclasses.asdict`` form."""
        return cls(SegmentationScores(**fields["upright"]), tuple(SegmentationScores(**s) for s in fields["moved"]))

    def to_dict(self) -> dict:
        return {"upright": vars(self.upright) | {"class_iou": list(self.upright.class_iou)},
                "moved_mean_iou": self.moved_mean_iou, "worst_iou": self.worst_iou,
                "moved_accuracy": self.moved_accuracy,
                "moved": [{"accuracy": s.accuracy, "mean_iou": s.mean_iou} for s in self.moved]}


class GroupConfusion:
    """Confusion matrices accumulated per group element: :meth:`add` one element's maps, :meth:`scores` at the end."""

    def __init__(self, group: Group, classes: int):
        self.group = group
        self.matrices = torch.zeros(group.order, classes, classes, dtype=torch.int64)

    def add(self, element: int, scores: torch.Tensor, moved_masks: torch.Tensor) -> None:
        """Count ``scores`` (N, classes, H, W), the model's output on images moved by ``element``, against the masks
        moved by the same element."""
        self.matrices[element] += confusion(scores.argmax(1), moved_masks, self.matrices.shape[-1])

    def scores(self) -> GroupScores:
        scores = [SegmentationScores.from_confusion(matrix) for matrix in self.matrices]
        return GroupScores(scores[0], tuple(scores[1:]))


@torch.no_grad()
def group_scores(model: nn.Module, batches: Iterable[tuple[torch.Tensor, torch.Tensor]], group: Group,
                 classes: int) -> GroupScores:
    """Score ``model`` (in eval mode; its mode is restored) on (images, masks) batches, as given and moved by every
    element of ``group``. Masks are (N, H, W) class indices, :data:`~orbify.data.tiles.UNLABELLED` where unknown."""
    counts = GroupConfusion(group, classes)
    device = next(iter(model.parameters()), torch.empty(0)).device
    with module_mode(model, training=False):
        for images, masks in batches:
            for g in range(group.order):
                output = dense_output(model(group.act_grid(g, images.to(device))))
                counts.add(g, output.float(), group.act_grid(g, masks.to(device)))
    return counts.scores()

