"""Getting the accuracy back: distil the group-averaged original into the converted model (design.md section 9).

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

import hashlib
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DistributedSampler

from orbify.tuning.distributed import World, fixed_batches, join_world
from orbify.errors import CheckpointError, DataError, OptionError, OutputError
from orbify.common.safe_io import PathLike, load_torch_weights, save_torch
from orbify.symmetry.groups import Group, parse_group
from orbify.common.options import check_choice
from orbify.transfer.recalibrate import recalibrate_batch_norm
from orbify.tuning.teacher import VIEW_COMBINATIONS, TeacherOutputs, teacher_outputs
from orbify.tuning.display import Display

SCHEDULES = ("cosine", "one-cycle", "constant")
CHECKPOINT_KIND = "orbify tune checkpoint"
CHECKPOINT_VERSION = 1
RECALIBRATION_IMAGES = 4096
"""Batch-norm statistics are re-estimated on at most this many training images, evenly spread (every process alike)."""


@dataclass(frozen=True)
class TuneOptions:
    """Everything that decides the course of a tuning run (a checkpoint resumes only with the same options)."""

    epochs: int = 10
    lr: float = 1e-3
    batch_size: int = 64
    view_combination: str = "probability"
    label_weight: float = 1.0
    holdout_fraction: float = 0.1
    schedule: str = "cosine"
    weight_decay: float = 0.0
    seed: int = 0

    def validate(self) -> None:
        """Raise :class:`OptionError` for a value outside its range."""
        check_choice("view combination", self.view_combination, VIEW_COMBINATIONS)
        check_choice("schedule", self.schedule, SCHEDULES)
        for name, low in (("epochs", 1), ("batch_size", 2)):
            if getattr(self, name) < low:
                raise OptionError(f"{name} must be at least {low}, got {getattr(self, name)}", where=f"option {name}",
                                  fix=f"give {name} ≥ {low}")
        for name in ("lr", "label_weight", "weight_decay"):
            if not getattr(self, name) >= 0:
                raise OptionError(f"{name} must be ≥ 0, got {getattr(self, name)}", where=f"option {name}",
                                  fix=f"give a non-negative {name}")
        if not 0 < self.holdout_fraction < 1:
            raise OptionError(f"holdout_fraction must lie strictly between 0 and 1, got {self.holdout_fraction}",
                              where="option holdout_fraction", fix="hold out a share such as 0.1")


@dataclass
class Evaluation:
    """The student on the held-out images.

    ``loss``: KL(teacher ‖ student) in nats per image. ``upright``: accuracy on the images as given;
    ``transformed``: the mean accuracy over every other group element's copies. Both count
    agreement with the teacher's top class when no labels were given (``measure`` says which).
    """

    loss: float
    upright: float
    transformed: float
    measure: str


@dataclass
class EpochRecord:
    """One epoch: mean training loss, learning rate at its end, held-out evaluation, wall time."""

    epoch: int
    train_loss: float
    learning_rate: float
    held_out: Evaluation
    seconds: float


@dataclass
class TuneResult:
    """What :func:`tune` did. The student itself is trained in place.

    ``before`` evaluates the student after batch-norm recalibration, before the first step.
    ``teacher_accuracy`` is the held-out accuracy of the teacher under every view combination
    (empty without labels), to judge the choice. ``teacher_hash`` fingerprints the cached teacher
    outputs and the split; checkpoints carry it. ``rank`` is this process's rank (rank 0 writes
    files). ``resumed_after`` is the epoch a resumed run
    started after (None for a fresh run).
    """

    options: TuneOptions
    before: Evaluation
    history: list[EpochRecord]
    teacher_accuracy: dict[str, float]
    teacher_hash: str
    processes: int
    train_images: int
    held_out_images: int
    rank: int = 0
    resumed_after: int | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def final(self) -> Evaluation:
        """The held-out evaluation after the last epoch."""
        return self.history[-1].held_out if self.history else self.before


def tune(student: nn.Module, teacher_model: nn.Module, group: str | Group, images: torch.Tensor,
         labels: torch.Tensor | None = None, *, epochs: int = 10, lr: float = 1e-3, batch_size: int = 64,
         view_combination: str = "probability", label_weight: float = 1.0, holdout_fraction: float = 0.1,
         schedule: str = "cosine", weight_decay: float = 0.0, seed: int = 0,
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
            :data:`RECALIBRATION_IMAGES`) before the first epoch.
        progress: show rich progress bars (rank 0 only).
        distributed: "auto" (join torchrun's process group when launched by it), True or False.
        device: where to compute; None = ``cuda:LOCAL_RANK`` where CUDA exists, else the CPU.
        on_epoch_end: called with each epoch's record after its checkpoint is written.

    Raises:
        OptionError, DataError, OutputError, CheckpointError (all :class:`~orbify.errors.OrbifyError`).
    """
    options = TuneOptions(epochs, lr, batch_size, view_combination, label_weight, holdout_fraction, schedule,
                          weight_decay, seed)
    options.validate()
    _check_data(images, labels)
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


def holdout_split(count: int, fraction: float, seed: int) -> tuple[torch.Tensor, torch.Tensor]:
    """The sorted indices (train, held out) of ``count`` samples; ``round(count·fraction)`` (≥ 1) are held out at random."""
    order = torch.randperm(count, generator=torch.Generator().manual_seed(seed))
    held = max(1, round(count * fraction))
    if count - held < 2:
        raise DataError(f"{count} images are too few to hold {held} out and train on the rest",
                        where="images", fix="give more images or a smaller holdout fraction")
    return order[held:].sort().values, order[:held].sort().values


def _check_data(images: torch.Tensor, labels: torch.Tensor | None) -> None:
    if not isinstance(images, torch.Tensor) or images.dim() != 4 or not images.is_floating_point():
        got = f"shape {tuple(images.shape)} {images.dtype}" if isinstance(images, torch.Tensor) else type(images).__name__
        raise DataError(f"Tuning needs float images of shape (N, C, H, W), got {got}", where="images",
                        fix="stack the images into one float tensor (orbify.data.read_images does)")
    if labels is None:
        return
    if labels.dim() != 1 or labels.shape[0] != images.shape[0] or labels.is_floating_point():
        raise DataError(f"The labels (shape {tuple(labels.shape)}, {labels.dtype}) do not fit {images.shape[0]} images",
                        where="labels", fix="give one integer class index per image, or no labels")


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
        self.train, self.held_out = holdout_split(len(images), options.holdout_fraction, options.seed)

    def execute(self, *, resume: bool, force: bool, recalibrate: bool, progress: bool) -> TuneResult:
        options, world = self.options, self.world
        teacher = teacher_outputs(self.teacher_model, self.group, self.images, options.view_combination, world,
                                  options.batch_size)
        self._check_labels(teacher)
        self.teacher = teacher.log_probabilities
        self.targets = self.labels if self.labels is not None else teacher.top_class[options.view_combination]
        result = TuneResult(options, None, [], self._teacher_accuracy(teacher), self._hash(), world.size,
                            len(self.train), len(self.held_out), world.rank)
        state = self._start(result, resume=resume, force=force)
        torch.manual_seed(options.seed + world.rank)
        if state is None:
            if recalibrate:
                self._recalibrate()
            result.before = self._evaluate()
        model = self.student if world.size == 1 else DistributedDataParallel(
            self.student, device_ids=[world.device] if world.device.type == "cuda" else None)
        optimiser = torch.optim.AdamW(self.student.parameters(), lr=options.lr, weight_decay=options.weight_decay)
        sampler = DistributedSampler(range(len(self.train)), num_replicas=world.size, rank=world.rank, shuffle=True,
                                     seed=options.seed)
        steps = len(fixed_batches(sampler.num_samples, options.batch_size))
        scheduler = _scheduler(optimiser, options, steps * options.epochs)
        first = 0
        if state is not None:
            first = self._restore(state, result, optimiser, scheduler)
        with Display(progress and world.is_main, options.epochs, steps) as display:
            display.teacher(result.teacher_accuracy, options.view_combination, result.before, first)
            for epoch in range(first, options.epochs):
                started = time.perf_counter()
                sampler.set_epoch(epoch)
                loss = self._train_epoch(model, optimiser, scheduler, sampler, display)
                world.sync_buffers(self.student)
                record = EpochRecord(epoch + 1, loss, scheduler.get_last_lr()[0], self._evaluate(),
                                     time.perf_counter() - started)
                result.history.append(record)
                display.epoch_done(record)
                self._save(result, optimiser, scheduler)
                if self.on_epoch_end is not None:
                    self.on_epoch_end(record)
        self.student.eval()
        return result

    # -- data and teacher ---------------------------------------------------------------------
    def _check_labels(self, teacher: TeacherOutputs) -> None:
        classes = teacher.log_probabilities.shape[1]
        if self.labels is not None and (self.labels.min() < 0 or self.labels.max() >= classes):
            raise DataError(f"Labels run from {int(self.labels.min())} to {int(self.labels.max())}, but the original "
                            f"model scores {classes} classes", where="labels",
                            fix="give labels that index the model's classes (0 to classes − 1)")

    def _teacher_accuracy(self, teacher: TeacherOutputs) -> dict[str, float]:
        if self.labels is None:
            return {}
        truth = self.labels[self.held_out]
        return {how: float((top[self.held_out] == truth).double().mean()) for how, top in teacher.top_class.items()}

    def _hash(self) -> str:
        digest = hashlib.sha256()
        for tensor in (self.teacher, self.held_out, self.targets):
            digest.update(tensor.contiguous().numpy().tobytes())
        return digest.hexdigest()

    # -- training -----------------------------------------------------------------------------
    def _recalibrate(self) -> None:
        """Batch-norm statistics from at most RECALIBRATION_IMAGES evenly spread training images (alike on every process)."""
        count = min(len(self.train), RECALIBRATION_IMAGES)
        chosen = self.train[torch.linspace(0, len(self.train) - 1, count).long()]
        recalibrate_batch_norm(self.student, (self.images[chosen[batch]].to(self.world.device)
                                              for batch in fixed_batches(count, self.options.batch_size)))

    def _train_epoch(self, model: nn.Module, optimiser: torch.optim.Optimizer, scheduler, sampler: DistributedSampler,
                     display: Display) -> float:
        device = self.world.device
        mine = torch.tensor(list(sampler), dtype=torch.long)
        model.train()
        total = torch.zeros(2, dtype=torch.float64)
        for batch in fixed_batches(len(mine), self.options.batch_size):
            index = self.train[mine[batch]]
            log_probabilities = model(self.images[index].to(device)).log_softmax(-1)
            loss = F.kl_div(log_probabilities, self.teacher[index].to(device), log_target=True, reduction="batchmean")
            if self.labels is not None and self.options.label_weight > 0:
                loss = loss + self.options.label_weight * F.nll_loss(log_probabilities, self.labels[index].to(device))
            optimiser.zero_grad(set_to_none=True)
            loss.backward()
            optimiser.step()
            scheduler.step()
            total += torch.tensor([float(loss.detach()) * len(index), len(index)], dtype=torch.float64)
            display.step(float(loss.detach()))
        summed = self.world.sum(total)
        return float(summed[0] / summed[1])

    @torch.no_grad()
    def _evaluate(self) -> Evaluation:
        """Held-out loss and accuracy (or agreement), upright and over the other group elements, over every process."""
        student, group, device = self.student, self.group, self.world.device
        training = student.training
        student.eval()
        sums = torch.zeros(4, dtype=torch.float64)   # loss, correct upright, correct transformed, images
        for batch in self.world.my_batches(len(self.held_out), self.options.batch_size):
            index = self.held_out[batch]
            images, targets = self.images[index].to(device), self.targets[index].to(device)
            for g in range(group.order):
                log_probabilities = student(group.act_grid(g, images)).log_softmax(-1)
                correct = float((log_probabilities.argmax(-1) == targets).sum())
                if g == 0:
                    sums[0] += float(F.kl_div(log_probabilities, self.teacher[index].to(device), log_target=True,
                                              reduction="sum"))
                    sums[1] += correct
                else:
                    sums[2] += correct
            sums[3] += len(index)
        student.train(training)
        loss, upright, transformed, count = self.world.sum(sums).tolist()
        others = group.order - 1
        return Evaluation(loss / count, upright / count, transformed / (count * others) if others else upright / count,
                          "accuracy" if self.labels is not None else "agreement")

    # -- checkpoints ----------------------------------------------------------------------------
    def _start(self, result: TuneResult, *, resume: bool, force: bool) -> dict | None:
        """The checkpoint state to resume from (None for a fresh start); refuses to replace a checkpoint unasked."""
        path = self.checkpoint
        if path is None:
            return None
        found = self.world.from_main(path.exists() if self.world.is_main else None)
        if resume and found:
            state = self.world.from_main(self._read(path) if self.world.is_main else None)
            if isinstance(state, CheckpointError):
                raise state
            return state
        if found and not force:
            raise OutputError(f"The checkpoint {str(path)!r} already exists",
                              fix="pass resume (--resume) to continue from it, force (--force) to start afresh "
                                  "and replace it, or choose another checkpoint path")
        return None

    def _read(self, path: Path) -> dict | CheckpointError:
        """Rank 0 reads and checks the checkpoint; an error is returned so that every process can raise it."""
        try:
            state = load_torch_weights(path, what="tuning checkpoint")
            if not isinstance(state, dict) or state.get("kind") != CHECKPOINT_KIND:
                raise CheckpointError(f"{str(path)!r} is not an orbify tuning checkpoint",
                                      fix="give the checkpoint a previous tune run wrote, or start afresh with --force")
            if state.get("version") != CHECKPOINT_VERSION:
                raise CheckpointError(f"The checkpoint {str(path)!r} has format version {state.get('version')!r}; "
                                      f"this orbify reads version {CHECKPOINT_VERSION}", fix="start afresh with --force")
            return state
        except CheckpointError as error:
            return error

    def _restore(self, state: dict, result: TuneResult, optimiser: torch.optim.Optimizer, scheduler) -> int:
        """Load a checkpoint's state into this run; returns the number of epochs it had finished."""
        where = str(self.checkpoint)
        saved = state["options"]
        changed = [f"{f.name} {saved.get(f.name)!r} → {getattr(self.options, f.name)!r}"
                   for f in fields(TuneOptions) if saved.get(f.name) != getattr(self.options, f.name)]
        if changed:
            raise CheckpointError("The checkpoint was written with other options: " + ", ".join(changed), where=where,
                                  fix="resume with the same options, or start afresh with --force")
        if state["teacher_hash"] != result.teacher_hash:
            raise CheckpointError("The checkpoint was written for other images, labels or teacher outputs", where=where,
                                  fix="resume with the same data, original model and view combination, "
                                      "or start afresh with --force")
        try:
            self.student.load_state_dict(state["student"])
        except RuntimeError as error:
            raise CheckpointError(f"The checkpoint's weights do not fit the student: {str(error).splitlines()[0]}",
                                  where=where, fix="resume with the converted model the run started from") from error
        optimiser.load_state_dict(state["optimizer"])
        scheduler.load_state_dict(state["scheduler"])
        rng = state["rng"]
        if state["processes"] == self.world.size:
            torch.set_rng_state(rng[self.world.rank]["cpu"])
            if self.world.device.type == "cuda" and "cuda" in rng[self.world.rank]:
                torch.cuda.set_rng_state(rng[self.world.rank]["cuda"], self.world.device)
        else:
            result.notes.append(f"resumed on {self.world.size} processes from a checkpoint of {state['processes']}: "
                                "training goes on, but not exactly as the interrupted run would have")
        result.before = Evaluation(**state["before"])
        result.history = [EpochRecord(**{**record, "held_out": Evaluation(**record["held_out"])})
                          for record in state["history"]]
        result.resumed_after = int(state["epoch"])
        return result.resumed_after

    def _save(self, result: TuneResult, optimiser: torch.optim.Optimizer, scheduler) -> None:
        if self.checkpoint is None:
            return
        rng = {"cpu": torch.get_rng_state()}
        if self.world.device.type == "cuda":
            rng["cuda"] = torch.cuda.get_rng_state(self.world.device)
        states = self.world.gather_objects(rng)
        if not self.world.is_main:
            return
        save_torch({
            "kind": CHECKPOINT_KIND,
            "version": CHECKPOINT_VERSION,
            "epoch": len(result.history),
            "options": asdict(self.options),
            "processes": self.world.size,
            "teacher_hash": result.teacher_hash,
            "student": self.student.state_dict(),
            "optimizer": optimiser.state_dict(),
            "scheduler": scheduler.state_dict(),
            "rng": states,
            "before": asdict(result.before),
            "history": [asdict(record) for record in result.history],
        }, self.checkpoint, force=True)


def _scheduler(optimiser: torch.optim.Optimizer, options: TuneOptions, total_steps: int):
    if options.schedule == "cosine":
        return torch.optim.lr_scheduler.CosineAnnealingLR(optimiser, T_max=total_steps)
    if options.schedule == "one-cycle":
        return torch.optim.lr_scheduler.OneCycleLR(optimiser, max_lr=options.lr, total_steps=total_steps)
    return torch.optim.lr_scheduler.ConstantLR(optimiser, factor=1.0, total_iters=0)
