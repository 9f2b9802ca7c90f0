"""The data of a tuning run: which samples train, which are evaluated, and the teacher's view of the evaluated ones.

Training samples and evaluation samples are indices into :class:`~orbify.data.tiles.Tiles`. The
evaluation set is, in this order of preference: a separate validation set (``--val``), the rows a
manifest marks ``val``, or a held-out share of the training data drawn with the seed. At most
``val_limit`` of its samples, evenly spaced, are evaluated; the teacher's outputs on them are
computed once and kept in memory.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import torch
from torch import nn

from orbify.data.images import evenly_spaced
from orbify.data.tiles import UNLABELLED, Tiles
from orbify.errors import DataError
from orbify.symmetry.groups import Group
from orbify.tuning.distributed import World
from orbify.tuning.samples import BadSamples, BatchPlan, batch_loader
from orbify.tuning.teacher import VIEW_COMBINATIONS, teach


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
    """The evaluated samples that could be read: their ``ids`` (sorted, into the validation tiles), the teacher's
    log-probabilities on them, and the ``targets`` accuracy counts against (the labels, or the teacher's top class)."""

    ids: torch.Tensor
    teacher: torch.Tensor
    targets: torch.Tensor
    labelled: bool
    teacher_accuracy: dict[str, float]

    @property
    def measure(self) -> str:
        """"accuracy" with labels, "agreement" (with the teacher) without."""
        return "accuracy" if self.labelled else "agreement"

    def positions(self, ids: torch.Tensor) -> torch.Tensor:
        """Where tile indices ``ids`` sit in :attr:`ids`."""
        return torch.searchsorted(self.ids, ids)


def evaluated_samples(model: nn.Module, group: Group, split: Split, views: str, use_labels: bool, world: World,
                      batch_size: int, workers: int, bad: BadSamples) -> Evaluated:
    """Run the teacher once over the evaluated samples (each process its batches) and join the results."""
    plan = BatchPlan(split.val_ids, world, batch_size)
    parts: list[tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]] = []
    for batch in batch_loader(split.val, plan, workers, seed=0):
        bad.check(batch)
        if not len(batch):
            continue
        taught = teach(model, group, batch.images.to(world.device), views)
        tops = torch.stack([taught.top_class[how].cpu() for how in VIEW_COMBINATIONS], 1)
        parts.append((batch.indices, taught.log_probabilities.cpu(), tops, batch.labels))
    gathered = [part for shares in world.gather_objects(parts) for part in shares]
    if not gathered:
        raise DataError("No evaluated sample could be read", where="validation data",
                        fix="check the validation images, or give other ones")
    ids, teacher, tops, labels = (torch.cat(column) for column in zip(*gathered))
    order = ids.argsort()
    ids, teacher, tops, labels = ids[order], teacher[order], tops[order], labels[order]
    labelled = use_labels and bool((labels != UNLABELLED).all())
    require_labels_in_range(labels, teacher.shape[1], ids, split.val)
    accuracy = ({how: float((tops[:, i] == labels).double().mean()) for i, how in enumerate(VIEW_COMBINATIONS)}
                if labelled else {})
    targets = labels if labelled else tops[:, VIEW_COMBINATIONS.index(views)]
    return Evaluated(ids, teacher, targets, labelled, accuracy)


def require_labels_in_range(labels: torch.Tensor, classes: int, ids: torch.Tensor, tiles: Tiles) -> None:
    """Raise :class:`DataError` naming the first sample whose label is not a class of the model (−1 means none)."""
    wrong = torch.nonzero((labels < UNLABELLED) | (labels >= classes))
    if len(wrong):
        first = int(wrong[0, 0])
        raise DataError(f"The sample {tiles.name(int(ids[first]))!r} has the label {int(labels[first])}, but the "
                        f"original model scores {classes} classes", where=tiles.name(int(ids[first])),
                        fix="give labels that index the model's classes (0 to classes − 1)")


def run_fingerprint(teacher_digest: str, group: str, views: str, train: Tiles, split: Split,
                    use_labels: bool) -> str:
    """SHA-256 of what a checkpoint may only resume with: the teacher, the data and the split."""
    digest = hashlib.sha256(f"{teacher_digest}|{group}|{views}|{train.cache_key()}|{split.val.cache_key()}|"
                            f"{use_labels}".encode())
    for tensor in (split.train_ids, split.val_ids):
        digest.update(tensor.numpy().tobytes())
    return digest.hexdigest()
