"""Getting the accuracy back: distil the group-averaged original into the converted model (docs/design.md §13).

:func:`tune` trains the converted model (the *student*) to match the original made invariant
over the group (the *teacher*, :mod:`orbify.tuning.teacher`), with the loss KL(teacher ‖ student),
plus cross-entropy when labels are given. The teacher's class distribution is computed once
per image before training, so an epoch costs what an epoch of ordinary fine-tuning costs.
A held-out share of the images measures, after every epoch, the distillation loss and the
accuracy (agreement with the teacher when there are no labels) on the images as given and on
their transformed copies.

The same call runs on one process or on many launched by ``torchrun`` (:mod:`orbify.tuning.distributed`):
the student is wrapped in ``DistributedDataParallel``, every process draws its share of each
epoch from a ``DistributedSampler``, and only rank 0 shows progress and writes checkpoints.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path

import torch
from torch import nn

from orbify.common.safe_io import PathLike
from orbify.errors import OptionError
from orbify.symmetry.groups import Group, parse_group
from orbify.tuning.checkpoints import checkpoint_to_resume, restore_checkpoint, save_checkpoint
from orbify.tuning.dataset import TuningData, check_images, holdout_split, tuning_data
from orbify.tuning.display import Display
from orbify.tuning.distributed import World, join_world
from orbify.tuning.options import TuneOptions
from orbify.tuning.records import EpochRecord, Evaluation, TuneResult
from orbify.tuning.teacher import teacher_outputs
from orbify.tuning.training import Training, evaluate, recalibrate_student

_DEFAULTS = TuneOptions()


def tune(student: nn.Module, teacher_model: nn.Module, group: str | Group, images: torch.Tensor,
         labels: torch.Tensor | None = None, *, epochs: int = _DEFAULTS.epochs, lr: float = _DEFAULTS.lr,
         batch_size: int = _DEFAULTS.batch_size, view_combination: str = _DEFAULTS.view_combination,
         label_weight: float = _DEFAULTS.label_weight, holdout_fraction: float = _DEFAULTS.holdout_fraction,
         schedule: str = _DEFAULTS.schedule, weight_decay: float = _DEFAULTS.weight_decay, seed: int = _DEFAULTS.seed,
         checkpoint_path: PathLike | None = None, resume: bool = False, force: bool = False,
         recalibrate: bool = True, progress: bool = True, distributed: bool | str = "auto",
         device: str | torch.device | None = None,
         on_epoch_end: Callable[[EpochRecord], None] | None = None) -> TuneResult:
    """Distil ``teacher_model`` averaged over ``group`` into the converted ``student``, in place.

    Args:
        student: the converted model (its output: class logits); trained in place and left in eval mode
            on the computing device.
        teacher_model: the original plain classifier; only read (moved to the computing device).
        group: the group the student is invariant to ("c4", "d4", ...).
        images: (N, C, H, W) float images, normalised as the models expect; all held in memory.
        labels: optional (N,) class indices; adds ``label_weight`` × cross-entropy to the loss.
        epochs, lr, batch_size: training length, peak learning rate (AdamW), images per process per step.
        view_combination: how the teacher combines the |G| views: "probability", "logit" or
            "most-confident" (see :mod:`orbify.tuning.teacher`).
        holdout_fraction: share of the images kept out of training for evaluation.
        schedule: learning-rate schedule over all steps: "cosine", "one-cycle" or "constant".
        seed: fixes the split, the order of the batches and every random draw; a run is repeatable.
        checkpoint_path: written atomically after every epoch (by rank 0); ``None`` writes none.
        resume: continue from ``checkpoint_path`` when it exists (a fresh start when it does not),
            exactly as an uninterrupted run would have gone on.
        force: start afresh even though ``checkpoint_path`` exists (it is replaced).
        recalibrate: re-estimate batch-norm statistics on the training images (at most
            :data:`~orbify.tuning.training.RECALIBRATION_IMAGES`) before the first epoch.
        progress: show rich progress bars (rank 0 only).
        distributed: "auto" (join torchrun's process group when launched by it), True or False.
        device: where to compute; None = ``cuda:LOCAL_RANK`` where CUDA exists, else the CPU.
        on_epoch_end: called with each epoch's record after its checkpoint is written.

    Raises:
        OptionError, DataError, OutputError, CheckpointError (all :class:`~orbify.errors.OrbifyError`).

    Example (a tiny classifier, 20 unlabeled images; the held-out figures are agreement with the teacher):

    >>> import torch
    >>> from torch import nn
    >>> import orbify
    >>> original = nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
    ...                          nn.Linear(4, 3)).eval()
    >>> student, plan = orbify.convert(original, "c4", example_input=torch.zeros(1, 1, 9, 9))
    >>> images = torch.rand(20, 1, 9, 9, generator=torch.Generator().manual_seed(0))
    >>> result = orbify.tune(student, original, "c4", images, epochs=2, batch_size=8, progress=False, device="cpu")
    >>> len(result.history), result.final.measure, result.train_images, result.held_out_images
    (2, 'agreement', 18, 2)
    """
    options = TuneOptions(epochs, lr, batch_size, view_combination, label_weight, holdout_fraction, schedule,
                          weight_decay, seed)
    options.validate()
    check_images(images, labels)
    if resume and checkpoint_path is None:
        raise OptionError("Resuming needs a checkpoint path", where="option resume",
                          fix="give checkpoint_path (--checkpoint) together with resume")
    world = join_world(distributed, device)
    try:
        rng_devices = [world.device] if world.device.type == "cuda" else []
        with torch.random.fork_rng(devices=rng_devices):
            run = _Run(student, teacher_model, parse_group(group), images, labels, options, world,
                       Path(checkpoint_path) if checkpoint_path is not None else None, on_epoch_end)
            return run.execute(resume=resume, force=force, recalibrate=recalibrate, progress=progress)
    finally:
        world.leave()


class _Run:
    """One tuning run; :meth:`execute` does the work in order."""

    def __init__(self, student: nn.Module, teacher_model: nn.Module, group: Group, images: torch.Tensor,
                 labels: torch.Tensor | None, options: TuneOptions, world: World, checkpoint: Path | None,
                 on_epoch_end: Callable[[EpochRecord], None] | None):
        self.student = student.to(world.device)
        self.teacher_model = teacher_model.to(world.device)
        self.group = group
        self.images = images
        self.labels = labels.long() if labels is not None else None
        self.options = options
        self.world = world
        self.checkpoint = checkpoint
        self.on_epoch_end = on_epoch_end
        self.split = holdout_split(len(images), options.holdout_fraction, options.seed)

    def execute(self, *, resume: bool, force: bool, recalibrate: bool, progress: bool) -> TuneResult:
        """Teacher outputs, checkpoint or recalibration and first evaluation, then the epochs; the student ends in eval mode."""
        options, world = self.options, self.world
        teacher = teacher_outputs(self.teacher_model, self.group, self.images, options.view_combination, world,
                                  options.batch_size)
        data = tuning_data(self.images, self.labels, self.split, teacher, options.view_combination)
        result = TuneResult(options, None, [], data.teacher_accuracy(teacher.top_class), data.fingerprint(),
                            world.size, len(data.train), len(data.held_out), world.rank)
        state = checkpoint_to_resume(self.checkpoint, world, resume=resume, force=force)
        torch.manual_seed(options.seed + world.rank)
        if state is None:
            if recalibrate:
                recalibrate_student(self.student, data, world, options.batch_size)
            result.before = self._evaluate(data)
        training = Training.start(self.student, options, world, len(data.train))
        first = 0
        if state is not None:
            first = restore_checkpoint(state, self.checkpoint, self.student, training, world, result)
        with Display(progress and world.is_main, options.epochs, training.steps) as display:
            display.teacher(result.teacher_accuracy, options.view_combination, result.before, first)
            for epoch in range(first, options.epochs):
                self._epoch(epoch, data, training, result, display)
        self.student.eval()
        return result

    def _epoch(self, epoch: int, data: TuningData, training: Training, result: TuneResult, display: Display) -> None:
        """Train one epoch, evaluate, record it, write the checkpoint, then call ``on_epoch_end``."""
        started = time.perf_counter()
        loss = training.epoch(epoch, data, self.options, self.world, display)
        self.world.sync_buffers(self.student)
        record = EpochRecord(epoch + 1, loss, training.learning_rate, self._evaluate(data),
                             time.perf_counter() - started)
        result.history.append(record)
        display.epoch_done(record)
        save_checkpoint(self.checkpoint, self.student, training, self.world, result)
        if self.on_epoch_end is not None:
            self.on_epoch_end(record)

    def _evaluate(self, data: TuningData) -> Evaluation:
        return evaluate(self.student, data, self.group, self.world, self.options.batch_size)
