"""What a tuning run reports: held-out evaluations, one record per epoch, and the run's result."""

from __future__ import annotations

from dataclasses import dataclass, field

from orbify.tuning.options import TuneOptions
from orbify.verification.segmentation import GroupScores


@dataclass
class Evaluation:
    """The student on the held-out images.

    ``loss``: KL(teacher ‖ student) in nats per image (per pixel for a dense model). ``upright``: accuracy on the
    images as given; ``transformed``: the mean accuracy over every other group element's copies (per pixel for a
    dense model, whose images and masks are moved together). Both count agreement with the teacher's top class
    when no labels were given (``measure`` says which). ``segmentation``: a dense model's per-pixel accuracy and
    IoU, upright and for every other element (None for a classifier).
    """

    loss: float
    upright: float
    transformed: float
    measure: str
    segmentation: GroupScores | None = None

    @classmethod
    def restore(cls, fields: dict) -> "Evaluation":
        """The evaluation of a checkpoint's ``dataclasses.asdict`` form."""
        scores = fields.get("segmentation")
        return cls(**{**fields, "segmentation": GroupScores.restore(scores) if scores is not None else None})


@dataclass
class EpochRecord:
    """One epoch: mean training loss, learning rate at its end, held-out evaluation, wall time, and the training images
    every process together read in it (their rate is ``images / seconds``, evaluation included)."""

    epoch: int
    train_loss: float
    learning_rate: float
    held_out: Evaluation
    seconds: float
    images: int = 0


@dataclass
class TuneResult:
    """What :func:`~orbify.tuning.loop.tune` did. The student itself is trained in place.

    ``before`` evaluates the student after batch-norm recalibration, before the first step.
    ``teacher_accuracy`` is the held-out accuracy of the teacher under every view combination
    (empty without labels), to judge the choice; ``teacher_iou`` its mean IoU (dense models with masks). ``teacher_hash`` fingerprints the original's
    weights, the data and the split; checkpoints carry it. ``rank`` is this process's rank (rank 0
    writes files). ``resumed_after`` is the epoch a resumed run started after (None for a fresh
    run). ``skipped`` names the samples left out as unreadable (with ``skip_unreadable``).
    ``teacher_seconds`` is what the teacher pass over the training data took (by the earlier run
    whose cache was reused, when ``teacher_reused``; 0 when the teacher runs online, ``teacher_online``).
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
    skipped: list[str] = field(default_factory=list)
    teacher_seconds: float = 0.0
    teacher_reused: bool = False
    teacher_iou: dict[str, float] = field(default_factory=dict)
    teacher_online: bool = False

    @property
    def final(self) -> Evaluation:
        """The held-out evaluation after the last epoch."""
        return self.history[-1].held_out if self.history else self.before
