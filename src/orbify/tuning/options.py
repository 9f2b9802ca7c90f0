"""The options that decide the course of a tuning run, and their valid ranges."""

from __future__ import annotations

from dataclasses import dataclass

from orbify.common.options import check_choice
from orbify.errors import OptionError
from orbify.tuning.teacher import VIEW_COMBINATIONS

SCHEDULES = ("cosine", "one-cycle", "constant")


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
