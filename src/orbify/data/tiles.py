"""Data sets read one tile at a time: the form in which tuning streams its data (docs/design.md §17).

A :class:`Tiles` is a ``torch.utils.data.Dataset`` whose item ``i`` is ``(image, label)``: the
image decoded when asked (in a ``DataLoader`` worker process), given the wanted number of channels,
fitted to the square input size (shorter side scaled, centre cropped), augmented when an
augmentation is set, then normalised; the label is a class index, or -1 for an unlabelled sample.
Nothing but the list of samples is held in memory, so memory does not grow with the pixels of the
data set. A sample that cannot be read raises :class:`~orbify.errors.DataError` naming it.

:class:`TensorTiles` serves images already in memory (the Python API's tensors), :class:`DatasetTiles`
a user's own ``Dataset``; :func:`orbify.data.catalog.open_tiles` opens a folder, a CSV manifest, an
array file or tar shards.
"""

from __future__ import annotations

import copy
import hashlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

import torch
from torch.utils.data import Dataset

from orbify.data.decoding import fit, match_channels, normalise
from orbify.errors import DataError

UNLABELLED = -1
"""The label of a sample without one."""

Augmentation = Callable[[torch.Tensor], torch.Tensor]


@dataclass(frozen=True)
class Preparation:
    """How every image is prepared: ``channels`` (1 or 3; None keeps the image's), the square ``size`` (None keeps
    the image's own),
    per-channel ``mean``/``std`` normalisation (applied last) and an optional ``augmentation`` applied to the
    fitted image before normalising (random draws come from torch's global generator)."""

    channels: int | None = None
    size: int | None = None
    mean: tuple[float, ...] | None = None
    std: tuple[float, ...] | None = None
    augmentation: Augmentation | None = None

    def key(self) -> str:
        """What the preparation does, as text for cache keys (the augmentation is named only by whether it is set)."""
        return f"channels={self.channels} size={self.size} mean={self.mean} std={self.std}"

    def apply(self, image: torch.Tensor, name: str) -> torch.Tensor:
        """Channels, size, augmentation, normalisation of one (C, H, W) float image."""
        if self.channels is not None:
            image = match_channels(image[None], self.channels, name)[0]
        image = fit(image, self.size, name)
        if self.augmentation is not None:
            image = self.augmentation(image)
        return normalise(image[None], self.mean, self.std, name)[0].contiguous()


class Tiles(Dataset):
    """Samples read lazily and prepared one at a time; see the module docstring.

    Subclasses implement ``__len__``, :meth:`read` (the raw image and label of sample ``i``) and
    :meth:`name`. Attributes: ``labels`` (N,) int64 when every label is known without reading
    pixels (else None), ``classes`` (class names, when known), ``validation`` (N,) bool marking
    the samples a manifest puts in its ``val`` split (else None), ``fingerprint`` (text that
    changes when the list or the files change; None when it cannot be known cheaply).
    """

    labels: torch.Tensor | None = None
    classes: list[str] | None = None
    validation: torch.Tensor | None = None
    fingerprint: str | None = None

    def __init__(self, preparation: Preparation):
        self.preparation = preparation

    def __len__(self) -> int:
        raise NotImplementedError

    def read(self, index: int) -> tuple[torch.Tensor, int]:
        """The raw (C, H, W) float image of sample ``index`` (8-bit data scaled to [0, 1]) and its label."""
        raise NotImplementedError

    def name(self, index: int) -> str:
        """What sample ``index`` is called in messages: its file, ``shard.tar:member``, ``array.npy[index]``."""
        raise NotImplementedError

    def __getitem__(self, index: int) -> tuple[torch.Tensor, int]:
        image, label = self.read(int(index))
        return self.preparation.apply(image, self.name(int(index))), int(label)

    @property
    def has_labels(self) -> bool:
        """True when the samples carry labels (all of them, or the ``labels`` attribute is set)."""
        return self.labels is not None

    def with_preparation(self, **changes) -> "Tiles":
        """A shallow copy whose preparation has ``changes`` (e.g. ``augmentation=...``); the samples are shared."""
        twin = copy.copy(self)
        twin.preparation = replace(self.preparation, **changes)
        return twin

    def cache_key(self) -> str | None:
        """The fingerprint together with the preparation (None when the fingerprint is unknown)."""
        if self.fingerprint is None:
            return None
        return hashlib.sha256(f"{self.fingerprint}|{self.preparation.key()}".encode()).hexdigest()


class TensorTiles(Tiles):
    """Images already in memory, (N, C, H, W) float, prepared as the models expect (only augmented, if asked)."""

    def __init__(self, images: torch.Tensor, labels: torch.Tensor | None = None, classes: list[str] | None = None,
                 preparation: Preparation | None = None):
        if not isinstance(images, torch.Tensor) or images.dim() != 4 or not images.is_floating_point():
            got = f"shape {tuple(images.shape)} {images.dtype}" if isinstance(images, torch.Tensor) else type(images).__name__
            raise DataError(f"Tuning needs float images of shape (N, C, H, W), got {got}", where="images",
                            fix="stack the images into one float tensor (orbify.data.read_images does), or pass a "
                                "torch.utils.data.Dataset")
        if labels is not None and (labels.dim() != 1 or labels.shape[0] != images.shape[0]
                                   or labels.is_floating_point()):
            raise DataError(f"The labels (shape {tuple(labels.shape)}, {labels.dtype}) do not fit {images.shape[0]} "
                            "images", where="labels", fix="give one integer class index per image, or no labels")
        super().__init__(preparation or Preparation())
        self.images = images
        self.labels = labels.long() if labels is not None else None
        self.classes = classes
        digest = hashlib.sha256(images.detach().cpu().contiguous().numpy().tobytes())
        if labels is not None:
            digest.update(self.labels.numpy().tobytes())
        self.fingerprint = f"tensor {tuple(images.shape)} {images.dtype} {digest.hexdigest()}"

    def __len__(self) -> int:
        return self.images.shape[0]

    def read(self, index: int) -> tuple[torch.Tensor, int]:
        label = int(self.labels[index]) if self.labels is not None else UNLABELLED
        return self.images[index], label

    def name(self, index: int) -> str:
        return f"images[{index}]"


class DatasetTiles(Tiles):
    """A user's ``torch.utils.data.Dataset`` whose items are an image (C, H, W) or ``(image, label)``.

    Its images are taken as prepared (only augmented, if asked); labels are known only as items are
    read, and the data set has no fingerprint unless it has a ``fingerprint`` attribute of its own.
    """

    def __init__(self, dataset: Dataset, preparation: Preparation | None = None,
                 classes: Sequence[str] | None = None):
        super().__init__(preparation or Preparation())
        self.dataset = dataset
        self.classes = list(classes) if classes is not None else None
        own = getattr(dataset, "fingerprint", None)
        self.fingerprint = f"dataset {type(dataset).__qualname__} {own}" if isinstance(own, str) else None

    def __len__(self) -> int:
        return len(self.dataset)

    def read(self, index: int) -> tuple[torch.Tensor, int]:
        item = self.dataset[index]
        image, label = item if isinstance(item, (tuple, list)) else (item, UNLABELLED)
        if not isinstance(image, torch.Tensor) or image.dim() != 3 or not image.is_floating_point():
            raise DataError(f"Item {index} of the data set is not a float image of shape (C, H, W)",
                            where=f"dataset[{index}]", fix="return a float (C, H, W) tensor, or (image, label)")
        return image, int(label)

    @property
    def has_labels(self) -> bool:
        return self.labels is not None or self._first_label() != UNLABELLED

    def _first_label(self) -> int:
        return self.read(0)[1] if len(self) else UNLABELLED

    def name(self, index: int) -> str:
        return f"dataset[{index}]"
