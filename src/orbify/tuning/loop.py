"""Getting the accuracy back: distil the group-averaged original into the converted model (docs/design.md §13).

:func:`tune` trains the converted model (the *student*) to match the original made invariant
over the group (the *teacher*, :mod:`orbify.tuning.teacher`), with the loss KL(teacher ‖ student),
plus cross-entropy where samples have labels. The data streams: images are read, decoded and
prepared in ``DataLoader`` worker processes (:mod:`orbify.tuning.samples`), so memory does not
grow with the data set. The teacher's outputs on the training data are computed once and kept in a
memory-mapped cache on disk (:mod:`orbify.tuning.teacher_cache`), so an epoch costs what an epoch
of ordinary fine-tuning costs; with augmentation the teacher runs on each augmented batch instead
(``teacher="online"``, |G| forward passes of the original per step). After every epoch the student
is evaluated on the validation samples: the images as given and moved by every group element.

The same call runs on one process or on many launched by ``torchrun`` (:mod:`orbify.tuning.distributed`):
the student is wrapped in ``DistributedDataParallel``, every process reads its own share of each
epoch (``DistributedSampler``), and only rank 0 shows progress and writes checkpoints.
"""

from __future__ import annotations

import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import replace
from pathlib import Path

import torch
from torch import nn
from torch.utils.data import Dataset

from orbify.common.safe_io import PathLike
from orbify.data.augment import augmentation
from orbify.data.tiles import DatasetTiles, TensorTiles, Tiles
from orbify.errors import OptionError
from orbify.symmetry.groups import Group, parse_group
from orbify.tuning.checkpoints import checkpoint_to_resume, restore_checkpoint, save_checkpoint
from orbify.tuning.dataset import (
    Evaluated,
    evaluated_samples,
    require_labels_in_range,
    run_fingerprint,
    split_samples,
)
from orbify.tuning.display import Display
from orbify.tuning.distributed import World, join_world
from orbify.tuning.options import DEFAULT_VAL_LIMIT, RunSettings, TuneOptions
from orbify.tuning.records import EpochRecord, TuneResult
from orbify.tuning.samples import BadSamples, BatchPlan, batch_loader
from orbify.tuning.teacher import TeacherBatch, teach
from orbify.tuning.teacher_cache import CacheKey, TeacherCache, open_teacher_cache, remove_cache, weights_digest
from orbify.tuning.training import TeacherRows, Training, autocast, evaluate, recalibrate_student

_DEFAULTS = TuneOptions()
_SETTINGS = RunSettings()
Data = torch.Tensor | Dataset


def tune(student: nn.Module, teacher_model: nn.Module, group: str | Group, images: Data,
         labels: torch.Tensor | None = None, *, masks: torch.Tensor | None = None, val: Data | None = None,
         val_labels: torch.Tensor | None = None, val_masks: torch.Tensor | None = None,
         epochs: int = _DEFAULTS.epochs, lr: float = _DEFAULTS.lr, batch_size: int = _DEFAULTS.batch_size,
         view_combination: str = _DEFAULTS.view_combination, label_weight: float = _DEFAULTS.label_weight,
         holdout_fraction: float = _DEFAULTS.holdout_fraction, schedule: str = _DEFAULTS.schedule,
         weight_decay: float = _DEFAULTS.weight_decay, seed: int = _DEFAULTS.seed, augment: str = _DEFAULTS.augment,
         teacher: str = _DEFAULTS.teacher, use_labels: bool = True, ignore_index: int = _DEFAULTS.ignore_index,
         class_weights: Sequence[float] | None = None, checkpoint_path: PathLike | None = None,
         resume: bool = False, force: bool = False, recalibrate: bool = True, progress: bool = True,
         distributed: bool | str = "auto", device: str | torch.device | None = None, workers: int | None = None,
         checkpoint_every: int | None = None, skip_unreadable: bool = False, precision: str = _SETTINGS.precision,
         teacher_cache: PathLike | None = None, val_limit: int | None = DEFAULT_VAL_LIMIT,
         on_epoch_end: Callable[[EpochRecord], None] | None = None) -> TuneResult:
    """Distil ``teacher_model`` averaged over ``group`` into the converted ``student``, in place.

    A classifier (output (N, classes)) learns the teacher's class distribution; a dense model (output
    (N, classes, H, W), or a dict with it under ``"out"``, as torchvision's segmentation models return) learns
    the teacher's distribution at every pixel, the teacher's views moved back before they are combined
    (docs/design.md §18), and is scored by per-pixel accuracy and IoU with the masks moved with the images.

    Args:
        student: the converted model (its output: class logits, or maps of them); trained in place and left in
            eval mode on the computing device.
        teacher_model: the original plain model; only read (moved to the computing device).
        group: the group the student is invariant to ("c4", "d4", ...).
        images: the training data: an (N, C, H, W) float tensor normalised as the models expect, a
            :class:`~orbify.data.tiles.Tiles` (:func:`orbify.data.catalog.open_tiles` streams a folder, a
            manifest, an array file or tar shards), or any ``torch.utils.data.Dataset`` whose items are a
            prepared (C, H, W) image or ``(image, label)``.
        labels: (N,) class indices for a tensor of images; adds ``label_weight`` × cross-entropy to the loss.
        masks: (N, H, W) integer class maps for a tensor of images (dense models), ``ignore_index`` where a pixel
            has no label; a data set carries its own (:func:`orbify.data.catalog.open_tiles` reads ``images/`` and
            ``masks/`` folders, a manifest's ``mask`` column, an .npz's ``masks``).
        val, val_labels, val_masks: a separate validation set (same forms); else a manifest's ``val`` rows, else a held-out
            share (``holdout_fraction``) of ``images``. At most ``val_limit`` validation samples are evaluated.
        epochs, lr, batch_size: training length, peak learning rate (AdamW), images per process per step.
        view_combination: how the teacher combines the |G| views: "probability", "logit" or
            "most-confident" (see :mod:`orbify.tuning.teacher`).
        schedule: learning-rate schedule over all steps: "cosine", "one-cycle" or "constant".
        seed: fixes the split, the order of the batches and every random draw; a run is repeatable.
        augment: "none", "light" or "strong" (:mod:`orbify.data.augment`); needs ``teacher="online"``.
        teacher: "cached" (computed once per sample, kept in ``teacher_cache``), "online" (on every batch), or
            "auto": cached for a classifier without augmentation, else online.
        use_labels: learn from and measure against the data's labels (or masks) where it has them.
        ignore_index: the mask value of pixels without a label (left out of the loss and the scores).
        class_weights: one weight per class for the cross-entropy on labels (rare classes weighed up).
        checkpoint_path: written atomically after every epoch and every ``checkpoint_every`` steps (by
            rank 0); ``None`` writes none.
        resume: continue from ``checkpoint_path`` when it exists (a fresh start when it does not),
            exactly as an uninterrupted run would have gone on, also from the middle of an epoch.
        force: start afresh even though ``checkpoint_path`` exists (it is replaced).
        recalibrate: re-estimate batch-norm statistics on the training images (at most
            :data:`~orbify.tuning.training.RECALIBRATION_IMAGES`) before the first epoch.
        progress: show rich progress bars (rank 0 only).
        distributed: "auto" (join torchrun's process group when launched by it), True or False.
        device: where to compute; None = ``cuda:LOCAL_RANK`` where CUDA exists, else the CPU.
        workers, skip_unreadable, precision, teacher_cache: how the run is computed (:class:`RunSettings`);
            ``workers`` defaults to none for a tensor (already in memory).
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
    >>> result = orbify.tune(student, original, "c4", images, epochs=2, batch_size=8, progress=False, device="cpu",
    ...                      workers=0)
    >>> len(result.history), result.final.measure, result.train_images, result.held_out_images
    (2, 'agreement', 18, 2)
    """
    options = TuneOptions(epochs, lr, batch_size, view_combination, label_weight, holdout_fraction, schedule,
                          weight_decay, seed, augment, teacher, use_labels, ignore_index,
                          tuple(float(w) for w in class_weights) if class_weights is not None else None)
    options.validate()
    settings = RunSettings(workers, checkpoint_every, skip_unreadable, precision,
                           Path(teacher_cache) if teacher_cache is not None else None, val_limit)
    group = parse_group(group)
    train = _augmented(as_tiles(images, labels, masks, "images", ignore_index), options.augment, group)
    if workers is None and isinstance(train, TensorTiles):
        settings = replace(settings, workers=0)      # images already in memory: nothing to decode in parallel
    validation = as_tiles(val, val_labels, val_masks, "val", ignore_index) if val is not None else None
    if resume and checkpoint_path is None:
        raise OptionError("Resuming needs a checkpoint path", where="option resume",
                          fix="give checkpoint_path (--checkpoint) together with resume")
    world = join_world(distributed, device)
    try:
        settings = settings.validate(world.device)
        rng_devices = [world.device] if world.device.type == "cuda" else []
        with torch.random.fork_rng(devices=rng_devices):
            run = _Run(student, teacher_model, group, train, validation, options, settings, world,
                       Path(checkpoint_path) if checkpoint_path is not None else None, on_epoch_end)
            return run.execute(resume=resume, force=force, recalibrate=recalibrate, progress=progress)
    finally:
        world.leave()


def as_tiles(data: Data, labels: torch.Tensor | None, masks: torch.Tensor | None, what: str,
             ignore_index: int = _DEFAULTS.ignore_index) -> Tiles:
    """Tiles for any accepted form of data (a tensor, Tiles, or a Dataset), reading ``ignore_index`` in masks as
    unlabelled; ``labels`` and ``masks`` only go with a tensor."""
    if isinstance(data, Tiles):
        tiles = data
    elif isinstance(data, torch.Tensor):
        tiles = TensorTiles(data, labels, masks=masks)
    elif isinstance(data, Dataset):
        tiles = DatasetTiles(data)
    else:
        raise OptionError(f"The {what} are a {type(data).__name__}", where=what,
                          fix="give an (N, C, H, W) float tensor or a torch.utils.data.Dataset")
    if (labels is not None or masks is not None) and not isinstance(data, torch.Tensor):
        raise OptionError(f"Labels and masks go with a tensor of {what}; a data set carries its own",
                          where=f"{what} labels", fix="leave the labels and masks out, or give the images as a tensor")
    return tiles.with_preparation(ignore=ignore_index)


def _augmented(tiles: Tiles, level: str, group: Group) -> Tiles:
    """The tiles with the augmentation of ``level`` (sized to their first image)."""
    if level == "none":
        return tiles
    first = tiles[0][0]
    channels, size = first.shape[0], first.shape[-1]
    return tiles.with_preparation(augmentation=augmentation(level, group, size, channels))


class _Run:
    """One tuning run; :meth:`execute` does the work in order."""

    def __init__(self, student: nn.Module, teacher_model: nn.Module, group: Group, train: Tiles,
                 validation: Tiles | None, options: TuneOptions, settings: RunSettings, world: World,
                 checkpoint: Path | None, on_epoch_end: Callable[[EpochRecord], None] | None):
        self.student = student.to(world.device)
        self.teacher_model = teacher_model.to(world.device)
        self.group, self.train, self.options, self.settings, self.world = group, train, options, settings, world
        self.checkpoint = checkpoint
        self.on_epoch_end = on_epoch_end
        self.split = split_samples(train, validation, options.holdout_fraction, options.seed, settings.val_limit)
        self.bad_train = BadSamples(train, settings.skip_unreadable)
        self.bad_val = BadSamples(self.split.val, settings.skip_unreadable)

    def execute(self, *, resume: bool, force: bool, recalibrate: bool, progress: bool) -> TuneResult:
        """Evaluated samples, teacher rows, checkpoint or recalibration and first evaluation, then the epochs."""
        options, world, split = self.options, self.world, self.split
        evaluated = evaluated_samples(self.teacher_model, self.group, split, options.view_combination,
                                      options.use_labels, world, options.batch_size, self.settings.workers,
                                      self.bad_val)
        if self.train.labels is not None and options.use_labels:
            require_labels_in_range(self.train.labels[split.train_ids], evaluated.classes, split.train_ids,
                                    self.train)
        self.train = self.train.with_preparation(classes=evaluated.classes)   # masks are checked as they are read
        digest = weights_digest(self.teacher_model)
        fingerprint = run_fingerprint(digest, self.group.name, options.view_combination, self.train, split,
                                      options.use_labels)
        result = TuneResult(options, None, [], evaluated.teacher_accuracy, fingerprint, world.size,
                            len(split.train_ids), len(evaluated.ids), world.rank, teacher_iou=evaluated.teacher_iou)
        state = checkpoint_to_resume(self.checkpoint, world, resume=resume, force=force)
        teacher = self._teacher_rows(digest, evaluated.output_shape, result)
        torch.manual_seed(options.seed + world.rank)
        if state is None and recalibrate:
            recalibrate_student(self.student, self.train, split.train_ids, world, self.settings, options.batch_size,
                                self.bad_train)
        if state is None:
            result.before = self._evaluate(evaluated)
        training = Training.start(self.student, options, world, len(split.train_ids))
        first_epoch, first_step = (0, 0) if state is None else restore_checkpoint(
            state, self.checkpoint, self.student, training, world, result)
        with Display(progress and world.is_main, options.epochs, training.steps) as display:
            for note in result.notes:
                display.note(f"note: {note}")
            display.teacher(result, first_epoch, first_step)
            for epoch in range(first_epoch, options.epochs):
                self._epoch(epoch, first_step if epoch == first_epoch else 0, teacher, evaluated, training, result,
                            display)
        self.student.eval()
        result.skipped = sorted(set(self.bad_train.names(world)) | set(self.bad_val.names(world)))
        return result

    def _teacher_rows(self, digest: str, output_shape: tuple[int, ...], result: TuneResult) -> TeacherRows:
        """The teacher for training: rows of the cache (computed now, or an earlier run's), or the original online
        (``teacher="auto"``: online for a dense model or augmented images, see :class:`TuneOptions`)."""
        options, device = self.options, self.world.device
        online = options.augment != "none" or len(output_shape) > 1
        if options.teacher == "online" or (options.teacher == "auto" and online):
            result.teacher_online = True
            return lambda batch, images: self._teach(images).log_probabilities
        cache = self._open_cache(CacheKey(digest, self.group.name, options.view_combination,
                                          self.train.cache_key() or "", len(self.train), list(output_shape)))
        result.teacher_seconds, result.teacher_reused = cache.seconds, cache.reused
        if cache.note:
            result.notes.append(cache.note)
        return lambda batch, images: cache.rows(batch.indices).to(device)

    def _open_cache(self, key: CacheKey) -> TeacherCache:
        """Open (or compute) the cache in the settings' folder; a temporary one without a folder or a fingerprint."""
        world, settings = self.world, self.settings
        folder = settings.teacher_cache if key.data else None
        temporary = folder is None
        if temporary:
            folder = Path(world.from_main(tempfile.mkdtemp(prefix="orbify-teacher-") if world.is_main else None))
        tiles = self.train.with_preparation(augmentation=None)

        def batches():
            plan = BatchPlan(torch.arange(len(tiles)), world, self.options.batch_size)
            for batch in batch_loader(tiles, plan, settings.workers, seed=0):
                self.bad_train.check(batch)
                if len(batch):
                    with autocast(settings, world):
                        taught = self._teach(batch.images.to(world.device))
                    yield batch.indices, taught.log_probabilities.float().cpu()

        cache = open_teacher_cache(folder, key, batches, world)
        if temporary:
            world.from_main(None)                     # every process has the rows mapped: the files may go
            if world.is_main:
                remove_cache(folder)
        return cache

    def _epoch(self, epoch: int, first_step: int, teacher: TeacherRows, evaluated: Evaluated, training: Training,
               result: TuneResult, display: Display) -> None:
        """Train one epoch (from ``first_step``), evaluate, record it, write the checkpoint, call ``on_epoch_end``."""
        started = time.perf_counter()
        every = self.settings.checkpoint_every

        def after_step(step: int, loss: float, images: int) -> None:
            display.step(loss, images * self.world.size)
            if every and step % every == 0 and step < training.steps:
                save_checkpoint(self.checkpoint, self.student, training, self.world, result, step=step)

        loss = training.epoch(epoch, first_step, self.train, self.split.train_ids, teacher, self.options,
                              self.settings, self.world, self.bad_train, after_step)
        self.world.sync_buffers(self.student)
        images = int(self.world.sum(training.sums)[1])
        record = EpochRecord(epoch + 1, loss, training.learning_rate, self._evaluate(evaluated),
                             time.perf_counter() - started, images)
        result.history.append(record)
        display.epoch_done(record)
        save_checkpoint(self.checkpoint, self.student, training, self.world, result)
        if self.on_epoch_end is not None:
            self.on_epoch_end(record)

    def _teach(self, images: torch.Tensor) -> TeacherBatch:
        return teach(self.teacher_model, self.group, images, self.options.view_combination)

    def _evaluate(self, evaluated: Evaluated):
        return evaluate(self.student, self.split.val, evaluated, self.group, self.world, self.settings,
                        self.options.batch_size, self.bad_val, self._teach)
