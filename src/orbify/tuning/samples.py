"""Streaming a tuning run's samples: which process reads which samples, in which batches, and what a bad one does.

Every pass over data (the teacher pass, recalibration, training epochs, evaluation) reads tiles
through a ``torch.utils.data.DataLoader`` whose worker processes decode and prepare them
(:class:`~orbify.data.tiles.Tiles`), so memory holds a few batches, never the data set.

- :class:`BatchPlan` says which samples each process reads, in whole batches: a shuffled epoch
  (the ``DistributedSampler`` permutation, so the processes' shares are disjoint) or a fixed list
  shared round robin. It can start part-way through (a resumed epoch).
- :class:`SampleReader` reads one sample: its image and target (a label, or a mask for dense
  tiles). An augmentation draws its random numbers from a generator seeded by (seed, epoch,
  sample), so a sample looks the same whichever worker reads it, and a resumed run sees exactly
  the images (and masks) an uninterrupted one would have.
- A sample that cannot be read arrives as a failure; :class:`BadSamples` stops the run naming the
  file, or (``skip_unreadable``) counts and lists it.
"""

from __future__ import annotations

import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field

import torch
from torch.utils.data import DataLoader, Dataset, DistributedSampler, Sampler

from orbify.data.tiles import UNLABELLED, Target, Tiles
from orbify.errors import DataError
from orbify.tuning.distributed import World, fixed_batches

Item = tuple[int, torch.Tensor | None, Target, tuple[str, str | None] | None]
"""What :class:`SampleReader` gives for one sample: (index, image or None, target, None or the failure)."""


@dataclass
class Batch:
    """The samples of one batch that could be read (``indices`` into the tiles, ``images``, ``labels``: (B,) class
    indices, or (B, H, W) masks for dense tiles) and the ``failures`` of those that could not: (index, what went
    wrong, what to do)."""

    indices: torch.Tensor
    images: torch.Tensor
    labels: torch.Tensor
    failures: list[tuple[int, str, str | None]]

    def __len__(self) -> int:
        return len(self.indices)


class SampleReader(Dataset):
    """Reads sample ``index`` of ``tiles`` for the key ``(epoch, index)``; a failure is returned, not raised.

    With an augmentation set on the tiles, torch's generator is seeded from (``seed``, epoch, index)
    for the read (and restored after), so the augmented image depends only on those.
    """

    def __init__(self, tiles: Tiles, seed: int):
        self.tiles = tiles
        self.seed = seed

    def __len__(self) -> int:
        return len(self.tiles)

    def __getitem__(self, key: tuple[int, int]) -> Item:
        epoch, index = key
        try:
            if self.tiles.preparation.augmentation is None:
                image, target = self.tiles[index]
            else:
                with torch.random.fork_rng(devices=[]):
                    torch.manual_seed(sample_seed(self.seed, epoch, index))
                    image, target = self.tiles[index]
        except DataError as error:
            return index, None, UNLABELLED, (error.what, error.fix)
        return index, image, target, None


def sample_seed(seed: int, epoch: int, index: int) -> int:
    """A seed that depends only on (seed, epoch, sample index)."""
    return zlib.crc32(f"{seed}/{epoch}/{index}".encode()) + (seed << 32)


def collate(items: list[Item]) -> Batch:
    """Stack the samples that were read; keep the failures apart. A sample whose image, or target (a mask, or a
    label where the first has a mask), has another shape than the first's fails too."""
    good = [item for item in items if item[1] is not None]
    failures = [(index, *problem) for index, image, _, problem in items if image is None]
    if good:
        shape, target_shape = good[0][1].shape, _shape(good[0][2])
        failures += [(index, f"Its image has shape {tuple(image.shape)}, the others {tuple(shape)}",
                      "give images of one size, or a size to resize them to (--input-size)")
                     for index, image, _, _ in good if image.shape != shape]
        failures += [(index, f"Its mask has shape {_shape(target)}, the others {target_shape}",
                      "give every image a mask of its own size, and every sample a mask")
                     for index, image, target, _ in good if image.shape == shape and _shape(target) != target_shape]
        good = [item for item in good if item[1].shape == shape and _shape(item[2]) == target_shape]
    if not good:
        return Batch(torch.empty(0, dtype=torch.long), torch.empty(0), torch.empty(0, dtype=torch.long), failures)
    targets = [item[2] for item in good]
    labels = (torch.stack(targets).long() if isinstance(targets[0], torch.Tensor)
              else torch.tensor(targets, dtype=torch.long))
    return Batch(torch.tensor([item[0] for item in good]), torch.stack([item[1] for item in good]), labels, failures)


def _shape(target: Target) -> tuple[int, ...]:
    """A mask's shape; () for a class label."""
    return tuple(target.shape) if isinstance(target, torch.Tensor) else ()


@dataclass
class BatchPlan(Sampler):
    """This process's batches of sample indices, as ``(epoch, index)`` keys for :class:`SampleReader`.

    ``shuffle``: the epoch's permutation of ``ids`` (``DistributedSampler`` with ``seed``; each process
    its own disjoint share), else ``ids`` in order with whole batches dealt round robin. ``skip``
    leaves out this process's first batches (a resumed epoch).
    """

    ids: torch.Tensor
    world: World
    batch_size: int
    epoch: int = 0
    shuffle: bool = False
    seed: int = 0
    skip: int = 0

    def batches(self) -> list[torch.Tensor]:
        """Every batch of this process, as indices into the tiles, before skipping."""
        if not self.shuffle:
            return [self.ids[batch] for batch in self.world.my_batches(len(self.ids), self.batch_size)]
        sampler = DistributedSampler(range(len(self.ids)), num_replicas=self.world.size, rank=self.world.rank,
                                     shuffle=True, seed=self.seed)
        sampler.set_epoch(self.epoch)
        mine = self.ids[torch.tensor(list(sampler), dtype=torch.long)]
        return [mine[batch] for batch in fixed_batches(len(mine), self.batch_size)]

    def __iter__(self) -> Iterator[list[tuple[int, int]]]:
        for batch in self.batches()[self.skip:]:
            yield [(self.epoch, int(index)) for index in batch]

    def __len__(self) -> int:
        return max(0, len(self.batches()) - self.skip)


def batch_loader(tiles: Tiles, plan: BatchPlan, workers: int, seed: int, pin_memory: bool = False) -> DataLoader:
    """A ``DataLoader`` reading ``plan``'s batches in ``workers`` processes (0: in this one).

    It has a generator of its own, so creating it draws nothing from torch's global generator.
    """
    return DataLoader(SampleReader(tiles, seed), batch_sampler=plan, num_workers=workers, collate_fn=collate,
                      pin_memory=pin_memory, generator=torch.Generator().manual_seed(seed),
                      persistent_workers=False)


@dataclass
class BadSamples:
    """What happens to samples that cannot be read: an error naming the first, or (``skip``) a list of them."""

    tiles: Tiles
    skip: bool
    skipped: dict[int, str] = field(default_factory=dict)

    def check(self, batch: Batch) -> None:
        """Raise :class:`DataError` for the batch's first failure, unless skipping; then remember each."""
        for index, what, fix in batch.failures:
            if not self.skip:
                raise DataError(f"{what} (sample {index})", where=self.tiles.name(index),
                                fix=f"{fix or 'replace or remove it'}; or pass --skip-unreadable (skip_unreadable=True) "
                                    "to leave such samples out and list them")
            self.skipped[index] = self.tiles.name(index)

    def names(self, world: World) -> list[str]:
        """Every process's skipped samples, sorted by name (the same on every process)."""
        merged: dict[int, str] = {}
        for part in world.gather_objects(self.skipped):
            merged.update(part)
        return sorted(merged.values())
