"""Data sets read one tile at a time: the form in which tuning streams its data (docs/design.md §17).

A :class:`Tiles` is a ``torch.utils.data.Dataset`` whose item ``i`` is ``(image, target)``: the
image decoded when asked (in a ``DataLoader`` worker process), given the wanted number of channels,
fitted to the square input size (shorter side scaled, centre cropped), augmented when an
augmentation is set, then normalised. The target is a class index (-1 for an unlabelled sample), or
for dense tiles (``dense``: segmentation data) an int64 (H, W) mask of class indices that was fitted
and augmented with its image (nearest neighbour, :mod:`orbify.data.masks`), its ignored pixels -1.
Nothing but the list of samples is held in memory, so memory does not grow with the pixels of the
data set. A sample that cannot be read raises :class:`~orbify.errors.DataError` naming it.

:class:`TensorTiles` serves images already in memory (the Python API's tensors), :class:`DatasetTiles`
a user's own ``Dataset``, :class:`FileTiles` image files, :class:`ArrayTiles` an array (memory-mapped
or in memory); :func:`orbify.data.catalog.open_tiles` opens a folder, a CSV manifest, an array file
or tar shards (:class:`orbify.data.shards.ShardTiles`). Per-sample lists are numpy arrays and
tensors (:class:`PackedStrings` for names), which forked ``DataLoader`` workers share without
copying, where millions of Python objects would be copied page by page as reference counts change.
"""

from __future__ import annotations

import copy
import hashlib
import os
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import torch
from torch.utils.data import Dataset

from orbify.data.decoding import decode_image, fit, match_channels, normalise, to_nchw
from orbify.data.masks import UNLABELLED, decode_mask, prepare_mask, require_mask_stack
from orbify.errors import DataError

Augmentation = Callable[..., object]
"""An image augmentation: ``image → image``, and for dense tiles ``(image, tv_tensors.Mask) → (image, mask)``, as a
``torchvision.transforms.v2`` transform moves both with one draw."""
Target = int | torch.Tensor
"""A sample's class index, or its (H, W) mask of class indices."""


@dataclass(frozen=True)
class Preparation:
    """How every image is prepared: ``channels`` (1 or 3; None keeps the image's), the square ``size`` (None keeps
    the image's own), per-channel ``mean``/``std`` normalisation (applied last, to the image only) and an optional
    ``augmentation`` applied to the fitted image, and its mask, before normalising (random draws come from torch's
    global generator). For masks: pixels equal to ``ignore`` become -1 (:data:`UNLABELLED`), and with ``classes``
    set any other value outside 0 to ``classes`` − 1 is refused."""

    channels: int | None = None
    size: int | None = None
    mean: tuple[float, ...] | None = None
    std: tuple[float, ...] | None = None
    augmentation: Augmentation | None = None
    ignore: int = 255
    classes: int | None = None

    def __post_init__(self) -> None:
        if self.channels not in (None, 1, 3):
            raise DataError(f"Cannot prepare images with {self.channels} channels", where="preparation",
                            fix="ask for 1 (grey) or 3 (RGB) channels, or None to keep the images' own")
        if self.classes is not None and self.classes < 1:
            raise DataError(f"Masks cannot index {self.classes} classes", where="preparation",
                            fix="give the number of classes the model outputs, or None not to check mask values")

    def key(self, dense: bool = False) -> str:
        """What the preparation does, as text for cache keys (the augmentation is named only by whether it is set);
        ``dense`` adds the ignored mask value, which changes what the masks hold."""
        text = f"channels={self.channels} size={self.size} mean={self.mean} std={self.std}"
        return f"{text} ignore={self.ignore}" if dense else text

    def apply(self, image: torch.Tensor, name: str, mask: torch.Tensor | None = None,
              mask_name: str | None = None) -> tuple[torch.Tensor, torch.Tensor | None]:
        """Channels, size, augmentation, normalisation of one (C, H, W) float image, and the same size and
        augmentation of its raw (H, W) ``mask`` (checked by :func:`~orbify.data.masks.prepare_mask`, named
        ``mask_name`` in errors); the mask returned is None without one."""
        if self.channels is not None:
            image = match_channels(image[None], self.channels, name)[0]
        if mask is not None:
            mask = prepare_mask(mask, tuple(image.shape[-2:]), size=self.size, ignore=self.ignore,
                                classes=self.classes, name=mask_name or name)
        image = fit(image, self.size, name)
        if self.augmentation is not None and mask is None:
            image = self.augmentation(image)
        elif self.augmentation is not None:
            image, mask = _augment_with_mask(self.augmentation, image, mask)
        return normalise(image[None], self.mean, self.std, name)[0].contiguous(), mask


def _augment_with_mask(augmentation: Augmentation, image: torch.Tensor,
                       mask: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """One draw of ``augmentation`` moving the image and its mask together: marked as a ``tv_tensors.Mask``, the
    mask is moved by nearest neighbour and left out of colour changes by torchvision's transforms."""
    from torchvision import tv_tensors

    image, mask = augmentation(image, tv_tensors.Mask(mask))
    return image, mask.as_subclass(torch.Tensor).long().contiguous()


class Tiles(Dataset):
    """Samples read lazily and prepared one at a time; see the module docstring.

    Subclasses implement ``__len__``, :meth:`read` (the raw image and target of sample ``i``) and
    :meth:`name` (and :meth:`mask_name` when masks live in files of their own). Attributes: ``dense``
    (True when the samples carry masks), ``labels`` (N,) int64 when every label is known without
    reading pixels (else None), ``classes`` (class names, when known), ``validation`` (N,) bool marking
    the samples a manifest puts in its ``val`` split (else None), ``fingerprint`` (text that
    changes when the list or the files change, masks included; None when it cannot be known cheaply).
    """

    dense: bool = False
    labels: torch.Tensor | None = None
    classes: list[str] | None = None
    validation: torch.Tensor | None = None
    fingerprint: str | None = None

    def __init__(self, preparation: Preparation):
        self.preparation = preparation

    def __len__(self) -> int:
        raise NotImplementedError

    def read(self, index: int) -> tuple[torch.Tensor, Target]:
        """The raw (C, H, W) float image of sample ``index`` (8-bit data scaled to [0, 1]) and its label, or for
        dense tiles its (H, W) int64 mask of the values as stored."""
        raise NotImplementedError

    def name(self, index: int) -> str:
        """What sample ``index`` is called in messages: its file, ``shard.tar:member``, ``array.npy[index]``."""
        raise NotImplementedError

    def mask_name(self, index: int) -> str:
        """What the mask of sample ``index`` is called in messages (its own file, where it has one)."""
        return f"the mask of {self.name(index)}"

    def __getitem__(self, index: int) -> tuple[torch.Tensor, Target]:
        index = int(index)
        image, target = self.read(index)
        if isinstance(target, torch.Tensor):
            return self.preparation.apply(image, self.name(index), target, self.mask_name(index))
        return self.preparation.apply(image, self.name(index))[0], int(target)

    def with_preparation(self, **changes) -> "Tiles":
        """A shallow copy whose preparation has ``changes`` (e.g. ``augmentation=...``); the samples are shared."""
        twin = copy.copy(self)
        twin.preparation = replace(self.preparation, **changes)
        return twin

    def cache_key(self) -> str | None:
        """The fingerprint together with the preparation (None when the fingerprint is unknown)."""
        if self.fingerprint is None:
            return None
        return hashlib.sha256(f"{self.fingerprint}|{self.preparation.key(self.dense)}".encode()).hexdigest()


class TensorTiles(Tiles):
    """Images already in memory, (N, C, H, W) float, prepared as the models expect (only augmented, if asked), with
    (N,) integer ``labels`` or (N, H, W) integer ``masks`` of class indices (then the tiles are dense)."""

    def __init__(self, images: torch.Tensor, labels: torch.Tensor | None = None, masks: torch.Tensor | None = None,
                 classes: list[str] | None = None, preparation: Preparation | None = None):
        if not isinstance(images, torch.Tensor) or images.dim() != 4 or not images.is_floating_point():
            got = f"shape {tuple(images.shape)} {images.dtype}" if isinstance(images, torch.Tensor) else type(images).__name__
            raise DataError(f"Tuning needs float images of shape (N, C, H, W), got {got}", where="images",
                            fix="stack the images into one float tensor (orbify.data.read_images does), or pass a "
                                "torch.utils.data.Dataset")
        if labels is not None and (labels.dim() != 1 or labels.shape[0] != images.shape[0]
                                   or labels.is_floating_point()):
            raise DataError(f"The labels (shape {tuple(labels.shape)}, {labels.dtype}) do not fit {images.shape[0]} "
                            "images", where="labels", fix="give one integer class index per image, or no labels")
        if masks is not None and labels is not None:
            raise DataError("Both labels and masks were given", where="masks",
                            fix="give class labels (classification) or masks (segmentation), not both")
        if masks is not None:
            require_mask_stack(masks, tuple(images.shape), "masks")
        super().__init__(preparation or Preparation())
        self.images, self.masks, self.dense = images, masks, masks is not None
        self.labels = labels.long() if labels is not None else None
        self.classes = classes
        digest = hashlib.sha256(images.detach().cpu().contiguous().numpy())   # hashed in place, not copied
        if labels is not None:
            digest.update(self.labels.numpy().tobytes())
        if masks is not None:
            digest.update(masks.detach().cpu().contiguous().numpy())
        self.fingerprint = f"tensor {tuple(images.shape)} {images.dtype} {digest.hexdigest()}"

    def __len__(self) -> int:
        return self.images.shape[0]

    def read(self, index: int) -> tuple[torch.Tensor, Target]:
        if self.masks is not None:
            return self.images[index], self.masks[index].long()
        label = int(self.labels[index]) if self.labels is not None else UNLABELLED
        return self.images[index], label

    def name(self, index: int) -> str:
        return f"images[{index}]"

    def mask_name(self, index: int) -> str:
        return f"masks[{index}]"


class DatasetTiles(Tiles):
    """A user's ``torch.utils.data.Dataset`` whose items are an image (C, H, W), ``(image, label)``, or
    ``(image, mask)`` with an integer (H, W) tensor mask of class indices (then the tiles are dense: item 0
    decides, and every item must agree).

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
        self._dense: bool | None = None

    @property
    def dense(self) -> bool:
        """Whether item 0 pairs its image with a mask (read once, when first asked)."""
        if self._dense is None:
            self._dense = len(self.dataset) > 0 and isinstance(self._item(0)[1], torch.Tensor)
        return self._dense

    def __len__(self) -> int:
        return len(self.dataset)

    def read(self, index: int) -> tuple[torch.Tensor, Target]:
        image, target = self._item(index)
        if isinstance(target, torch.Tensor) != self.dense:
            this, first = ("a mask", "a label") if isinstance(target, torch.Tensor) else ("a label", "a mask")
            raise DataError(f"Item {index} of the data set has {this}, but item 0 has {first}",
                            where=f"dataset[{index}]", fix="give every item a class label, or every item a mask")
        return image, target

    def _item(self, index: int) -> tuple[torch.Tensor, Target]:
        """Item ``index`` as (float (C, H, W) image, int label or int64 (H, W) mask)."""
        item = self.dataset[index]
        image, target = item if isinstance(item, (tuple, list)) else (item, UNLABELLED)
        if not isinstance(image, torch.Tensor) or image.dim() != 3 or not image.is_floating_point():
            raise DataError(f"Item {index} of the data set is not a float image of shape (C, H, W)",
                            where=f"dataset[{index}]", fix="return a float (C, H, W) tensor, or (image, label)")
        if isinstance(target, torch.Tensor) and target.dim() == 2:
            if target.is_floating_point() or target.is_complex():
                raise DataError(f"Item {index} of the data set has a {target.dtype} mask, not class indices",
                                where=f"dataset[{index}]", fix="return the mask as an integer (H, W) tensor")
            return image, target.long()
        return image, int(target)

    def name(self, index: int) -> str:
        return f"dataset[{index}]"


class PackedStrings:
    """Many strings held as one utf-8 byte array and an int64 offsets array (two objects, however many strings).

    Undecodable file names (bytes that are not utf-8) survive the round trip, as :func:`os.fsencode` keeps them.
    """

    def __init__(self, strings: Iterable[str]):
        encoded = [text.encode("utf-8", "surrogateescape") for text in strings]
        self.offsets = np.zeros(len(encoded) + 1, dtype=np.int64)
        np.cumsum([len(b) for b in encoded], out=self.offsets[1:])
        self.blob = np.frombuffer(b"".join(encoded), dtype=np.uint8)

    def __len__(self) -> int:
        return len(self.offsets) - 1

    def __getitem__(self, index: int) -> str:
        start, end = self.offsets[index], self.offsets[index + 1]
        return self.blob[start:end].tobytes().decode("utf-8", "surrogateescape")


class FileTiles(Tiles):
    """Image files (paths in ``names``, relative to the folder ``root`` or absolute), decoded when read, with their
    mask files (``masks``, paths alike; then the tiles are dense).

    ``labels`` (N,) int64 or None, ``classes`` their names, ``validation`` (N,) bool or None, ``fingerprint`` as
    described on :class:`Tiles`.
    """

    def __init__(self, root: Path, names: PackedStrings, *, preparation: Preparation,
                 labels: torch.Tensor | None = None, classes: list[str] | None = None,
                 validation: torch.Tensor | None = None, fingerprint: str | None = None,
                 masks: PackedStrings | None = None):
        super().__init__(preparation)
        self.root, self.names, self.masks, self.dense = str(root), names, masks, masks is not None
        self.labels, self.classes, self.validation, self.fingerprint = labels, classes, validation, fingerprint

    def __len__(self) -> int:
        return len(self.names)

    def read(self, index: int) -> tuple[torch.Tensor, Target]:
        image = decode_image(self.name(index), self.preparation.channels)
        if self.masks is not None:
            return image, decode_mask(self.mask_name(index))
        return image, int(self.labels[index]) if self.labels is not None else UNLABELLED

    def name(self, index: int) -> str:
        return os.path.join(self.root, self.names[index])

    def mask_name(self, index: int) -> str:
        return os.path.join(self.root, self.masks[index]) if self.masks is not None else super().mask_name(index)


class ArrayTiles(Tiles):
    """The images ``indices`` of an array (N, H, W), (N, H, W, C) or (N, C, H, W) read from ``file``, converted one
    at a time as :func:`~orbify.data.decoding.to_nchw` converts (8-bit values scaled to [0, 1]).

    A ``memory_mapped`` array stays on disk: it is not pickled with the tiles but mapped again where they are
    unpickled (a worker process started by spawn). ``labels`` (N,) int64 are per selected image; ``masks``, an
    integer (N, H, W) array in memory indexed like the images, makes the tiles dense.
    """

    def __init__(self, array: np.ndarray, file: Path, indices: np.ndarray, *, preparation: Preparation,
                 memory_mapped: bool = False, labels: torch.Tensor | None = None, classes: list[str] | None = None,
                 fingerprint: str | None = None, masks: np.ndarray | None = None):
        super().__init__(preparation)
        self.array, self.file, self.indices, self.memory_mapped = array, Path(file), indices, memory_mapped
        self.labels, self.classes, self.fingerprint = labels, classes, fingerprint
        self.masks, self.dense = masks, masks is not None

    def __len__(self) -> int:
        return len(self.indices)

    def read(self, index: int) -> tuple[torch.Tensor, Target]:
        if self.array is None:   # unpickled in another process: map the file again
            self.array = np.load(self.file, mmap_mode="r", allow_pickle=False)
        at = int(self.indices[index])
        image = to_nchw(self.array[at:at + 1], self.file)[0]
        if self.masks is not None:
            return image, torch.from_numpy(self.masks[at].astype(np.int64))
        return image, int(self.labels[index]) if self.labels is not None else UNLABELLED

    def name(self, index: int) -> str:
        return f"{self.file}[{int(self.indices[index])}]"

    def mask_name(self, index: int) -> str:
        return f"{self.file}:masks[{int(self.indices[index])}]"

    def __getstate__(self) -> dict:
        state = self.__dict__.copy()
        if self.memory_mapped:
            state["array"] = None
        return state
