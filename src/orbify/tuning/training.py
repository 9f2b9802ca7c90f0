"""The steps of tuning: batch-norm recalibration, one training epoch, and the evaluation (docs/design.md §13).

Every pass streams its samples through a ``DataLoader`` (:mod:`orbify.tuning.samples`). An epoch
can start part-way (a resumed checkpoint): it skips the batches already done, and because each
sample's augmentation depends only on (seed, epoch, sample), it then goes on exactly as an
uninterrupted epoch would have.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable
from dataclasses import dataclass, field

import torch
import torch.nn.functional as F
from torch import nn
from torch.nn.parallel import DistributedDataParallel

from orbify.common.modes import module_mode
from orbify.data.tiles import UNLABELLED, Tiles
from orbify.errors import DataError
from orbify.symmetry.groups import Group
from orbify.transfer.recalibrate import recalibrate_batch_norm
from orbify.tuning.dataset import Evaluated
from orbify.tuning.distributed import World, fixed_batches
from orbify.tuning.options import RunSettings, TuneOptions
from orbify.tuning.records import Evaluation
from orbify.tuning.samples import BadSamples, Batch, BatchPlan, batch_loader
from orbify.tuning.teacher import TeacherBatch
from orbify.verification.segmentation import GroupConfusion, dense_output

RECALIBRATION_IMAGES = 4096
"""Batch-norm statistics are re-estimated on at most this many training images, evenly spread (every process alike)."""

TeacherRows = Callable[[Batch, torch.Tensor], torch.Tensor]
"""The teacher's log-probabilities for a batch (its tile indices, and its images on the computing device)."""


def recalibrate_student(student: nn.Module, tiles: Tiles, train_ids: torch.Tensor, world: World,
                        settings: RunSettings, batch_size: int, bad: BadSamples) -> None:
    """Batch-norm statistics from at most RECALIBRATION_IMAGES evenly spread training images (alike on every process)."""
    count = min(len(train_ids), RECALIBRATION_IMAGES)
    chosen = train_ids[torch.linspace(0, len(train_ids) - 1, count).long()]
    alone = World(0, 1, world.device)
    loader = batch_loader(tiles.with_preparation(augmentation=None), BatchPlan(chosen, alone, batch_size),
                          settings.workers, seed=0)

    def images():
        for batch in loader:
            bad.check(batch)
            if len(batch) > 1:
                yield batch.images.to(world.device)

    recalibrate_batch_norm(student, images())


@dataclass
class Training:
    """The moving parts of training: the model stepped (``DistributedDataParallel`` over several processes), the
    AdamW optimiser, the learning-rate scheduler, steps per epoch and the running loss sums of the current epoch."""

    model: nn.Module
    optimiser: torch.optim.Optimizer
    scheduler: torch.optim.lr_scheduler.LRScheduler
    steps: int
    sums: torch.Tensor = field(default_factory=lambda: torch.zeros(2, dtype=torch.float64))

    @classmethod
    def start(cls, student: nn.Module, options: TuneOptions, world: World, train_images: int) -> "Training":
        """Fresh training state for ``student`` (wrapped when ``world`` has several processes)."""
        model = student if world.size == 1 else DistributedDataParallel(
            student, device_ids=[world.device] if world.device.type == "cuda" else None)
        optimiser = torch.optim.AdamW(student.parameters(), lr=options.lr, weight_decay=options.weight_decay)
        share = -(-train_images // world.size)        # DistributedSampler pads every share to this
        steps = len(fixed_batches(share, options.batch_size))
        return cls(model, optimiser, _scheduler(optimiser, options, steps * options.epochs), steps)

    def epoch(self, epoch: int, first_step: int, tiles: Tiles, train_ids: torch.Tensor, teacher: TeacherRows,
              options: TuneOptions, settings: RunSettings, world: World, bad: BadSamples,
              after_step: Callable[[int, float, int], None]) -> float:
        """Train epoch ``epoch`` (0-based) from step ``first_step``; returns the mean loss over every process.

        ``after_step(step, loss, images)`` is called after each step (1-based step within the epoch).
        """
        if first_step == 0:
            self.sums.zero_()
        plan = BatchPlan(train_ids, world, options.batch_size, epoch, shuffle=True, seed=options.seed,
                         skip=first_step)
        loader = batch_loader(tiles, plan, settings.workers, options.seed, pin_memory=world.device.type == "cuda")
        self.model.train()
        for step, batch in enumerate(loader, start=first_step + 1):
            bad.check(batch)
            if len(batch) < 2:
                self._skip_step(world, step)
                continue
            loss = self._step(batch, teacher, options, settings, world)
            self.sums += torch.tensor([loss * len(batch), len(batch)], dtype=torch.float64)
            after_step(step, loss, len(batch))
        summed = world.sum(self.sums)
        return float(summed[0] / summed[1])

    def _step(self, batch: Batch, teacher: TeacherRows, options: TuneOptions, settings: RunSettings,
              world: World) -> float:
        """One optimiser step on ``batch``; returns its loss."""
        images = batch.images.to(world.device, non_blocking=True)
        with autocast(settings, world):
            targets = teacher(batch, images).to(world.device, torch.float32)
            log_probabilities = dense_output(self.model(images)).float().log_softmax(1)
        loss = divergence(targets, log_probabilities).mean()
        labels = batch.labels.to(world.device)
        if options.use_labels and options.label_weight > 0 and bool((labels != UNLABELLED).any()):
            weights = (torch.tensor(options.class_weights, device=world.device)
                       if options.class_weights is not None else None)
            loss = loss + options.label_weight * F.nll_loss(log_probabilities, labels, weight=weights,
                                                            ignore_index=UNLABELLED)
        self.optimiser.zero_grad(set_to_none=True)
        loss.backward()
        self.optimiser.step()
        self.scheduler.step()
        return float(loss.detach())

    def _skip_step(self, world: World, step: int) -> None:
        """A batch with fewer than two readable samples: alone, skip the step; with other processes, stop."""
        if world.size > 1:
            raise DataError(f"Step {step}: fewer than two samples of this process's batch could be read",
                            fix="remove the unreadable samples from the data")
        self.scheduler.step()

    @property
    def learning_rate(self) -> float:
        """The learning rate after the last step."""
        return self.scheduler.get_last_lr()[0]


def divergence(teacher: torch.Tensor, log_probabilities: torch.Tensor) -> torch.Tensor:
    """KL(teacher ‖ student) of log-probabilities with the class axis 1, per sample (per pixel for maps)."""
    return F.kl_div(log_probabilities, teacher, log_target=True, reduction="none").sum(1)


def autocast(settings: RunSettings, world: World) -> contextlib.AbstractContextManager:
    """bfloat16 autocast on a GPU when the precision asks for it; nothing on the CPU."""
    if world.device.type == "cuda" and settings.precision in ("auto", "bf16"):
        return torch.autocast("cuda", dtype=torch.bfloat16)
    return contextlib.nullcontext()


def _scheduler(optimiser: torch.optim.Optimizer, options: TuneOptions, total_steps: int):
    if options.schedule == "cosine":
        return torch.optim.lr_scheduler.CosineAnnealingLR(optimiser, T_max=total_steps)
    if options.schedule == "one-cycle":
        return torch.optim.lr_scheduler.OneCycleLR(optimiser, max_lr=options.lr, total_steps=total_steps)
    return torch.optim.lr_scheduler.ConstantLR(optimiser, factor=1.0, total_iters=0)


@torch.no_grad()
def evaluate(student: nn.Module, val: Tiles, evaluated: Evaluated, group: Group, world: World,
             settings: RunSettings, batch_size: int, bad: BadSamples,
             teach_batch: Callable[[torch.Tensor], TeacherBatch]) -> Evaluation:
    """Loss and accuracy (or agreement) on the evaluated samples, upright and moved by the other group elements,
    summed over every process; for a dense model also per-pixel IoU, the masks moved with the images. ``student``
    runs in eval mode (its mode is restored). ``teach_batch`` runs the teacher on a batch of images: a dense
    teacher's maps are computed again here rather than kept (see :class:`Evaluated`)."""
    loader = batch_loader(val, BatchPlan(evaluated.ids, world, batch_size), settings.workers, seed=0)
    tally = _MapTally(group, evaluated.classes) if evaluated.dense else _ClassTally(group)
    with module_mode(student, training=False):
        for batch in loader:
            bad.check(batch)
            if not len(batch):
                continue
            images = batch.images.to(world.device)
            if evaluated.dense:
                taught = teach_batch(images)
                teacher = taught.log_probabilities
                targets = batch.labels.to(world.device) if evaluated.labelled else taught.top_class[evaluated.views]
            else:
                where = evaluated.positions(batch.indices)
                teacher, targets = evaluated.teacher[where].to(world.device), evaluated.targets[where].to(world.device)
            for g in range(group.order):
                scores = dense_output(student(group.act_grid(g, images))).float()
                moved = group.act_grid(g, targets) if evaluated.dense else targets
                tally.add(g, scores.log_softmax(1), teacher if g == 0 else None, moved)
    return tally.evaluation(world, evaluated.measure)


class _ClassTally:
    """Sums of an evaluation of class scores: loss, correct upright, correct moved, images."""

    def __init__(self, group: Group):
        self.others = group.order - 1
        self.sums = torch.zeros(4, dtype=torch.float64)

    def add(self, element: int, log_probabilities: torch.Tensor, teacher: torch.Tensor | None,
            targets: torch.Tensor) -> None:
        correct = float((log_probabilities.argmax(1) == targets).sum())
        if element == 0:
            self.sums += torch.tensor([float(divergence(teacher, log_probabilities).sum()), correct, 0.0,
                                       len(targets)], dtype=torch.float64)
        else:
            self.sums[2] += correct

    def evaluation(self, world: World, measure: str) -> Evaluation:
        loss, upright, moved, count = world.sum(self.sums).tolist()
        transformed = moved / (count * self.others) if self.others else upright / count
        return Evaluation(loss / count, upright / count, transformed, measure)


class _MapTally:
    """Sums of an evaluation of class maps: the divergence per pixel upright, and a confusion matrix per element."""

    def __init__(self, group: Group, classes: int):
        self.confusions = GroupConfusion(group, classes)
        self.loss = torch.zeros(2, dtype=torch.float64)   # summed divergence, pixels

    def add(self, element: int, log_probabilities: torch.Tensor, teacher: torch.Tensor | None,
            targets: torch.Tensor) -> None:
        if element == 0:
            per_pixel = divergence(teacher, log_probabilities)
            self.loss += torch.tensor([float(per_pixel.sum()), per_pixel.numel()], dtype=torch.float64)
        self.confusions.add(element, log_probabilities, targets)

    def evaluation(self, world: World, measure: str) -> Evaluation:
        loss, pixels = world.sum(self.loss).tolist()
        self.confusions.matrices = world.sum(self.confusions.matrices).long()
        scores = self.confusions.scores()
        return Evaluation(loss / pixels, scores.upright.accuracy, scores.moved_accuracy, measure, scores)
