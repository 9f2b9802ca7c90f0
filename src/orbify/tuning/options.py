"""The options of a tuning run: those that decide its course (:class:`TuneOptions`) and those that only decide how
it is computed (:class:`RunSettings`), with their valid ranges."""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path

import torch

from orbify.common.options import check_choice
from orbify.data.augment import AUGMENT_LEVELS
from orbify.errors import OptionError
from orbify.tuning.teacher import VIEW_COMBINATIONS

SCHEDULES = ("cosine", "one-cycle", "constant")
TEACHER_MODES = ("auto", "cached", "online")
PRECISIONS = ("auto", "float32", "bf16")
DEFAULT_VAL_LIMIT = 2048


@dataclass(frozen=True)
class TuneOptions:
    """Everything that decides the course of a tuning run (a checkpoint resumes only with the same options).

    ``teacher`` "auto" caches the teacher of a classifier and runs a dense teacher online (its cache would hold
    a class map per pixel: samples × classes × H × W half floats), and runs online under augmentation.
    ``ignore_index`` is the mask value of unlabelled pixels; ``class_weights`` weigh the cross-entropy on labels.
    """

    epochs: int = 10
    lr: float = 1e-3
    batch_size: int = 64
    view_combination: str = "probability"
    label_weight: float = 1.0
    holdout_fraction: float = 0.1
    schedule: str = "cosine"
    weight_decay: float = 0.0
    seed: int = 0
    augment: str = "none"
    teacher: str = "auto"
    use_labels: bool = True
    ignore_index: int = 255
    class_weights: tuple[float, ...] | None = None

    def validate(self) -> None:
        """Raise :class:`OptionError` for a value outside its range, or a cached teacher with augmentation."""
        check_choice("view combination", self.view_combination, VIEW_COMBINATIONS)
        check_choice("schedule", self.schedule, SCHEDULES)
        check_choice("augment", self.augment, AUGMENT_LEVELS)
        check_choice("teacher", self.teacher, TEACHER_MODES)
        if self.teacher == "cached" and self.augment != "none":
            raise OptionError(f"A cached teacher cannot serve augmented images (augment {self.augment!r}): its "
                              "outputs are for the image it saw, not the student's augmented view",
                              where="option teacher", fix="use teacher 'online' (--teacher online), which runs the "
                              "original on each augmented batch (|G| forward passes per step), or augment 'none'")
        for name, low in (("epochs", 1), ("batch_size", 2)):
            if getattr(self, name) < low:
                raise OptionError(f"{name} must be at least {low}, got {getattr(self, name)}", where=f"option {name}",
                                  fix=f"give {name} ≥ {low}")
        if self.class_weights is not None and not (self.class_weights and all(w >= 0 for w in self.class_weights)):
            raise OptionError(f"class_weights must be non-negative numbers, one per class, got {self.class_weights}",
                              where="option class_weights", fix="give one weight ≥ 0 per class, e.g. 1,1,4")
        for name in ("lr", "label_weight", "weight_decay"):
            if not getattr(self, name) >= 0:
                raise OptionError(f"{name} must be ≥ 0, got {getattr(self, name)}", where=f"option {name}",
                                  fix=f"give a non-negative {name}")
        if not 0 < self.holdout_fraction < 1:
            raise OptionError(f"holdout_fraction must lie strictly between 0 and 1, got {self.holdout_fraction}",
                              where="option holdout_fraction", fix="hold out a share such as 0.1")


@dataclass(frozen=True)
class RunSettings:
    """How a run is computed, not what it computes (a checkpoint resumes under other settings).

    ``workers``: DataLoader worker processes per process (None: half the cores shared among the
    processes on this machine, at most 8). ``checkpoint_every``: also checkpoint every this many
    steps within an epoch (None: after every epoch only). ``skip_unreadable``: leave out samples that
    cannot be read, and list them, instead of stopping. ``precision``: "auto" (bfloat16 autocast on
    GPUs, float32 on CPUs), "float32" or "bf16" (GPUs only). ``teacher_cache``: the folder of the
    teacher cache (None: a temporary one). ``val_limit``: evaluate at most this many samples.
    """

    workers: int | None = None
    checkpoint_every: int | None = None
    skip_unreadable: bool = False
    precision: str = "auto"
    teacher_cache: Path | None = None
    val_limit: int | None = DEFAULT_VAL_LIMIT

    def validate(self, device: torch.device) -> "RunSettings":
        """Raise :class:`OptionError` for a value outside its range; return the settings with ``workers`` decided."""
        check_choice("precision", self.precision, PRECISIONS)
        if self.precision == "bf16" and device.type != "cuda":
            raise OptionError("bf16 precision is for GPUs; on the CPU tuning runs in float32", where="option precision",
                              fix="leave precision at 'auto' or give 'float32'")
        for name in ("workers", "checkpoint_every", "val_limit"):
            value = getattr(self, name)
            if value is not None and value < (0 if name == "workers" else 1):
                raise OptionError(f"{name} must be at least {0 if name == 'workers' else 1}, got {value}",
                                  where=f"option {name}", fix=f"give a larger {name}")
        return replace(self, workers=self.workers if self.workers is not None else default_workers())


def default_workers() -> int:
    """Half the cores, shared among the processes torchrun started on this machine, at most 8."""
    share = (os.cpu_count() or 1) // (2 * int(os.environ.get("LOCAL_WORLD_SIZE", "1")))
    return max(0, min(8, share))
