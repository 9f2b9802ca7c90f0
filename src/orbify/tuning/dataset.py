"""The data of a tuning run: which samples train, which are evaluated, and the teacher's view of the evaluated ones.

Training samples and evaluation samples are indices into :class:`~orbify.data.tiles.Tiles`. The
evaluation set is, in this order of preference: a separate validation set (``--val``), the rows a
manifest marks ``val``, or a held-out share of the training data drawn with the seed. At most
``val_limit`` of its samples, evenly spaced, are evaluated; the teacher's outputs on them are
computed once and kept in memory.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import torch
from torch import nn

from orbify.data.images import evenly_spaced
from orbify.data.tiles import UNLABELLED, Tiles
from orbify.errors import DataError
from orbify.symmetry.groups import Group
from orbify.tuning.distributed import World
from orbify.tuning.samples import BadSamples, BatchPlan, batch_loader
from orbify.tuning.teacher import VIEW_COMBINATIONS, TeacherBatch, teach
from orbify.verification.segmentation import SegmentationScores, confusion


def holdout_split(count: int, fraction: float, seed: int) -> tuple[torch.Tensor, torch.Tensor]:
    """The sorted indices (train, held out) of ``count`` samples; ``round(count·fraction)`` (≥ 1) are held out at random."""
    order = torch.randperm(count, generator=torch.Generator().manual_seed(seed))
    held = max(1, round(count * fraction))
    if count - held < 2:
        raise DataError(f"{count} images are too few to hold {held} out and train on the rest",
                        where="images", fix="give more images or a smaller holdout fraction")
    return order[held:].sort().values, order[:held].sort().values


@dataclass(frozen=True)
class Split:
    """Training indices into ``train``; evaluated indices into ``val`` (the same tiles or a separate set)."""

    train_ids: torch.Tensor
    val: Tiles
    val_ids: torch.Tensor


def split_samples(train: Tiles, val: Tiles | None, holdout_fraction: float, seed: int,
                  val_limit: int | None) -> Split:
    """Choose the training and evaluated samples (see the module docstring)."""
    if val is not None:
        train_ids, val_ids, val_tiles = torch.arange(len(train)), torch.arange(len(val)), val
    elif train.validation is not None and bool(train.validation.any()):
        marked = train.validation.bool()
        train_ids, val_ids, val_tiles = torch.nonzero(~marked)[:, 0], torch.nonzero(marked)[:, 0], train
    else:
        (train_ids, val_ids), val_tiles = holdout_split(len(train), holdout_fraction, seed), train
    if len(train_ids) < 2:
        raise DataError(f"{len(train_ids)} training samples are too few", where="data",
                        fix="give at least two training images")
    val_ids = val_ids[evenly_spaced(len(val_ids), val_limit)]
    return Split(train_ids, val_tiles.with_preparation(augmentation=None), val_ids)


@dataclass(frozen=True)
class Evaluated:
    """The evaluated samples that could be read: their ``ids`` (sorted, into the validation tiles) and the teacher on
    them, under the view combination ``views``.

    For a classifier ``teacher`` holds its log-probabilities and ``targets`` what accuracy counts against (the
    labels, or the teacher's top class). A dense teacher's maps are not kept (samples × classes × H × W would not
    fit in memory): ``teacher`` and ``targets`` are None and evaluation runs the teacher again, batch by batch.
    ``teacher_accuracy`` (and, for dense models, ``teacher_iou``) judge each view combination against the labels.
    """

    ids: torch.Tensor
    teacher: torch.Tensor | None
    targets: torch.Tensor | None
    labelled: bool
    teacher_accuracy: dict[str, float]
    views: str
    output_shape: tuple[int, ...]
    teacher_iou: dict[str, float] = field(default_factory=dict)

    @property
    def classes(self) -> int:
        return self.output_shape[0]

    @property
    def dense(self) -> bool:
        """True for a model whose output is a map (classes, H, W)."""
        return len(self.output_shape) > 1

    @property
    def measure(self) -> str:
        """"accuracy" with labels, "agreement" (with the teacher) without."""
        return "accuracy" if self.labelled else "agreement"

    def positions(self, ids: torch.Tensor) -> torch.Tensor:
        """Where tile indices ``ids`` sit in :attr:`ids`."""
        return torch.searchsorted(self.ids, ids)


@dataclass
class _Taught:
    """One batch of the teacher pass: its tile indices and labels, and a classifier's rows and top classes for each
    combination, or a dense teacher's confusion matrices against the masks for each combination (None without)."""

    indices: torch.Tensor
    labels: torch.Tensor
    output_shape: tuple[int, ...]
    rows: torch.Tensor | None = None
    tops: torch.Tensor | None = None
    confusions: torch.Tensor | None = None


def evaluated_samples(model: nn.Module, group: Group, split: Split, views: str, use_labels: bool, world: World,
                      batch_size: int, workers: int, bad: BadSamples) -> Evaluated:
    """Run the teacher once over the evaluated samples (each process its batches) and join the results."""
    plan = BatchPlan(split.val_ids, world, batch_size)
    parts: list[_Taught] = []
    for batch in batch_loader(split.val, plan, workers, seed=0):
        bad.check(batch)
        if len(batch):
            taught = teach(model, group, batch.images.to(world.device), views)
            _require_fitting_masks(batch.labels, tuple(taught.log_probabilities.shape[1:]), batch.indices, split.val)
            require_labels_in_range(batch.labels, taught.log_probabilities.shape[1], batch.indices, split.val)
            parts.append(_taught(batch.indices, batch.labels, taught))
    gathered = [part for shares in world.gather_objects(parts) for part in shares]
    if not gathered:
        raise DataError("No evaluated sample could be read", where="validation data",
                        fix="check the validation images, or give other ones")
    if len(gathered[0].output_shape) > 1:
        return _evaluated_maps(gathered, views, use_labels)
    return _evaluated_classes(gathered, views, use_labels)


def _taught(indices: torch.Tensor, labels: torch.Tensor, taught: TeacherBatch) -> _Taught:
    rows = taught.log_probabilities.cpu()
    tops = torch.stack([taught.top_class[how].cpu() for how in VIEW_COMBINATIONS], 1)
    part = _Taught(indices, labels, tuple(rows.shape[1:]))
    if rows.dim() == 2:
        part.rows, part.tops = rows, tops
    elif labels.dim() == 3:
        part.confusions = torch.stack([confusion(tops[:, i], labels, rows.shape[1])
                                       for i in range(len(VIEW_COMBINATIONS))])
    return part


def _evaluated_classes(parts: list[_Taught], views: str, use_labels: bool) -> Evaluated:
    ids, teacher, tops, labels = (torch.cat(column) for column in
                                  zip(*((p.indices, p.rows, p.tops, p.labels) for p in parts)))
    order = ids.argsort()
    ids, teacher, tops, labels = ids[order], teacher[order], tops[order], labels[order]
    labelled = use_labels and bool((labels != UNLABELLED).all())
    accuracy = ({how: float((tops[:, i] == labels).double().mean()) for i, how in enumerate(VIEW_COMBINATIONS)}
                if labelled else {})
    targets = labels if labelled else tops[:, VIEW_COMBINATIONS.index(views)]
    return Evaluated(ids, teacher, targets, labelled, accuracy, views, parts[0].output_shape)


def _evaluated_maps(parts: list[_Taught], views: str, use_labels: bool) -> Evaluated:
    ids = torch.cat([p.indices for p in parts]).sort().values
    labelled = use_labels and all(p.confusions is not None for p in parts)
    accuracy, iou = {}, {}
    if labelled:
        for i, how in enumerate(VIEW_COMBINATIONS):
            scores = SegmentationScores.from_confusion(sum(p.confusions[i] for p in parts))
            accuracy[how], iou[how] = scores.accuracy, scores.mean_iou
    return Evaluated(ids, None, None, labelled, accuracy, views, parts[0].output_shape, iou)


def require_labels_in_range(labels: torch.Tensor, classes: int, ids: torch.Tensor, tiles: Tiles) -> None:
    """Raise :class:`DataError` naming the first sample whose label (or a pixel of whose mask) is not a class of the
    model (−1 means none)."""
    outside = (labels < UNLABELLED) | (labels >= classes)
    wrong = torch.nonzero(outside.flatten(1).any(1) if labels.dim() > 1 else outside)
    if len(wrong):
        first = int(wrong[0, 0])
        value = int(labels[first][outside[first]].flatten()[0])
        what = "a mask with the value" if labels.dim() > 1 else "the label"
        raise DataError(f"The sample {tiles.name(int(ids[first]))!r} has {what} {value}, but the original model "
                        f"scores {classes} classes", where=tiles.name(int(ids[first])),
                        fix="give labels that index the model's classes (0 to classes − 1; masks may also use the "
                            "ignored value, 255 by default)")


def _require_fitting_masks(labels: torch.Tensor, output_shape: tuple[int, ...], ids: torch.Tensor,
                           tiles: Tiles) -> None:
    """Masks need a model whose output is a map of their size; raise :class:`DataError` naming a sample otherwise."""
    if labels.dim() == 3 and tuple(labels.shape[1:]) != tuple(output_shape[1:]):
        kind = (f"maps of {output_shape[1]}×{output_shape[2]} pixels" if len(output_shape) == 3
                else "one class score vector per image")
        raise DataError(f"The sample {tiles.name(int(ids[0]))!r} has a mask of {labels.shape[1]}×{labels.shape[2]} "
                        f"pixels, but the original model outputs {kind}", where=tiles.name(int(ids[0])),
                        fix="give masks of the model's output size (for a classifier: labels, not masks)")


def run_fingerprint(teacher_digest: str, group: str, views: str, train: Tiles, split: Split,
                    use_labels: bool) -> str:
    """SHA-256 of what a checkpoint may only resume with: the teacher, the data and the split."""
    digest = hashlib.sha256(f"{teacher_digest}|{group}|{views}|{train.cache_key()}|{split.val.cache_key()}|"
                            f"{use_labels}".encode())
    for tensor in (split.train_ids, split.val_ids):
        digest.update(tensor.numpy().tobytes())
    return digest.hexdigest()
