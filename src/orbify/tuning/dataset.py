"""The data of a tuning run: the images, their split into training and held-out, and the targets to learn."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import torch

from orbify.errors import DataError
from orbify.tuning.teacher import TeacherOutputs


def check_images(images: torch.Tensor, labels: torch.Tensor | None) -> None:
    """Raise :class:`DataError` unless ``images`` is a float (N, C, H, W) tensor and ``labels`` None or (N,) integers."""
    if not isinstance(images, torch.Tensor) or images.dim() != 4 or not images.is_floating_point():
        got = f"shape {tuple(images.shape)} {images.dtype}" if isinstance(images, torch.Tensor) else type(images).__name__
        raise DataError(f"Tuning needs float images of shape (N, C, H, W), got {got}", where="images",
                        fix="stack the images into one float tensor (orbify.data.read_images does)")
    if labels is None:
        return
    if labels.dim() != 1 or labels.shape[0] != images.shape[0] or labels.is_floating_point():
        raise DataError(f"The labels (shape {tuple(labels.shape)}, {labels.dtype}) do not fit {images.shape[0]} images",
                        where="labels", fix="give one integer class index per image, or no labels")


def holdout_split(count: int, fraction: float, seed: int) -> tuple[torch.Tensor, torch.Tensor]:
    """The sorted indices (train, held out) of ``count`` samples; ``round(count·fraction)`` (≥ 1) are held out at random."""
    order = torch.randperm(count, generator=torch.Generator().manual_seed(seed))
    held = max(1, round(count * fraction))
    if count - held < 2:
        raise DataError(f"{count} images are too few to hold {held} out and train on the rest",
                        where="images", fix="give more images or a smaller holdout fraction")
    return order[held:].sort().values, order[:held].sort().values


@dataclass(frozen=True)
class TuningData:
    """Everything the student learns from and is measured on, on the CPU.

    ``images`` (N, C, H, W); ``labels`` (N,) long or None; ``train`` and ``held_out`` index the
    images; ``teacher`` holds the teacher's log-probabilities (N, classes) under the chosen view
    combination; ``targets`` are what accuracy counts against: the labels, or else the teacher's top class.
    """

    images: torch.Tensor
    labels: torch.Tensor | None
    train: torch.Tensor
    held_out: torch.Tensor
    teacher: torch.Tensor
    targets: torch.Tensor

    @property
    def measure(self) -> str:
        """"accuracy" with labels, "agreement" (with the teacher) without."""
        return "accuracy" if self.labels is not None else "agreement"

    def teacher_accuracy(self, top_class: dict[str, torch.Tensor]) -> dict[str, float]:
        """Held-out accuracy of each view combination's top class (empty without labels)."""
        if self.labels is None:
            return {}
        truth = self.labels[self.held_out]
        return {how: float((top[self.held_out] == truth).double().mean()) for how, top in top_class.items()}

    def fingerprint(self) -> str:
        """SHA-256 of the teacher outputs, the held-out indices and the targets (checkpoints carry it)."""
        digest = hashlib.sha256()
        for tensor in (self.teacher, self.held_out, self.targets):
            digest.update(tensor.contiguous().numpy().tobytes())
        return digest.hexdigest()


def tuning_data(images: torch.Tensor, labels: torch.Tensor | None, split: tuple[torch.Tensor, torch.Tensor],
                teacher: TeacherOutputs, view_combination: str) -> TuningData:
    """Join the images, the ``split`` (train, held out) and the teacher's outputs; labels must index its classes.

    Raises :class:`DataError` for a label outside 0 … classes − 1.
    """
    classes = teacher.log_probabilities.shape[1]
    if labels is not None and (labels.min() < 0 or labels.max() >= classes):
        raise DataError(f"Labels run from {int(labels.min())} to {int(labels.max())}, but the original "
                        f"model scores {classes} classes", where="labels",
                        fix="give labels that index the model's classes (0 to classes − 1)")
    targets = labels if labels is not None else teacher.top_class[view_combination]
    return TuningData(images, labels, *split, teacher.log_probabilities, targets)
