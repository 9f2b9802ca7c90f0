"""Reading the user's images: an image folder (optionally one sub-folder per class) or an .npz array file.

:func:`read_images` returns an :class:`ImageSet` of float32 images ``(N, C, H, W)`` scaled to
[0, 1] (8-bit data; float arrays are taken as they are), optionally resized to a square size
(shorter side scaled to ``size``, then the centre cropped) and normalised per channel. The
checker, the tuner and the command line all read inputs through it.

Folder layouts (sorted by name, so the order is reproducible):

* ``DIR/*.png`` (any format Pillow reads): images without labels;
* ``DIR/CLASS/*.png``: one sub-folder per class; ``classes`` are the sub-folder names and
  ``labels`` index into them;
* ``DIR/images/*`` and ``DIR/masks/*.png`` (segmentation; anything else in ``DIR`` is left alone):
  each image with the mask of the same stem (``a.jpg`` and ``a.png``), a PNG of class indices
  (:mod:`orbify.data.masks`); an image or mask without a partner is refused before anything is read.

An ``.npz`` file holds ``images`` of shape (N, H, W), (N, H, W, C) or (N, C, H, W) with C in
{1, 3, 4} (when both axes could hold channels, the last one does unless the second is 3), optionally ``labels``
(N integers) and ``classes`` (their names), or ``masks`` ((N, H, W) integer class indices). It is read with
``allow_pickle=False``. Masks are fitted with their images by nearest neighbour, and their ``ignore`` value
becomes -1 (:data:`~orbify.data.masks.UNLABELLED`). Every unreadable input raises
:class:`~orbify.errors.DataError` naming it.
An image file declaring more than :data:`~orbify.data.decoding.LARGEST_IMAGE_PIXELS` pixels is refused from its header,
before any pixel is decoded (an untrusted file cannot make orbify allocate gigabytes).
"""

from __future__ import annotations

import zipfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from orbify.data.decoding import (
    check_image_array,
    check_labels,
    decode_image,
    fit,
    match_channels,
    normalise,
    to_nchw,
)
from orbify.data.masks import decode_mask, pair_by_stem, prepare_mask, require_mask_stack
from orbify.errors import DataError

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".gif", ".tif", ".tiff", ".webp", ".ppm", ".pgm")
SEGMENTATION_FOLDERS = ("images", "masks")
"""The sub-folders of a segmentation folder: images, and masks of the same names."""


@dataclass
class ImageSet:
    """Images ``(N, C, H, W)`` float32, with integer ``labels`` (N,) and class names when known, or int64
    ``masks`` (N, H, W) of class indices (-1 where ignored) for segmentation data."""

    images: torch.Tensor
    labels: torch.Tensor | None = None
    classes: list[str] | None = None
    masks: torch.Tensor | None = None

    def __len__(self) -> int:
        return self.images.shape[0]

    def batches(self, batch_size: int) -> Iterator[torch.Tensor]:
        """The images in order, ``batch_size`` at a time (the last batch may be smaller)."""
        return iter(self.images.split(batch_size))


def read_images(path: str | Path, *, size: int | None = None, channels: int = 3, limit: int | None = None,
                mean: Sequence[float] | None = None, std: Sequence[float] | None = None,
                ignore: int = 255) -> ImageSet:
    """Read an image folder or an ``.npz`` file into an :class:`ImageSet`.

    Args:
        path: a folder of images (optionally one sub-folder per class, or ``images/`` and ``masks/``) or an
            ``.npz`` file.
        size: resize every image so its shorter side is ``size`` and crop the centre ``size``×``size``;
            ``None`` keeps the sizes, which must then all agree.
        channels: 1 (grey) or 3 (RGB); grey images are repeated to RGB, RGB reduced to grey by luma,
            an alpha channel is dropped.
        limit: read at most this many images, evenly spaced over the sorted list (so every class
            folder contributes).
        mean, std: per-channel normalisation applied last: ``(x - mean) / std``.
        ignore: the mask value of pixels without a class; it reads as -1.

    Raises:
        DataError: the path is missing or holds no images, a file cannot be decoded, shapes
            disagree, or an array file lacks ``images`` or has a wrong shape; images and masks do not
            pair, a mask is not one of class indices, differs in size from its image or holds a negative value.

    Example (an ``.npz`` file of five 12×12 RGB images, channels last, with labels):

    >>> import pathlib, tempfile
    >>> import numpy as np
    >>> import orbify
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     file = pathlib.Path(folder) / "tiles.npz"
    ...     np.savez(file, images=np.zeros((5, 12, 12, 3), dtype=np.uint8), labels=np.array([0, 1, 0, 1, 2]))
    ...     data = orbify.read_images(file, size=8, mean=[0.5, 0.5, 0.5], std=[0.5, 0.5, 0.5])
    >>> tuple(data.images.shape), data.labels.tolist(), float(data.images.min())
    ((5, 3, 8, 8), [0, 1, 0, 1, 2], -1.0)
    """
    source = Path(path)
    if channels not in (1, 3):
        raise DataError(f"Cannot read images with {channels} channels", where=str(source),
                        fix="ask for channels=1 (grey) or channels=3 (RGB)")
    if limit is not None and limit < 1:
        raise DataError(f"The image limit must be at least 1, got {limit}", where=str(source),
                        fix="give a positive limit or none")
    if source.is_dir():
        result = _read_folder(source, size, channels, limit, ignore)
    elif source.is_file() and source.suffix.lower() == ".npz":
        result = _read_npz(source, size, channels, limit, ignore)
    elif source.exists():
        raise DataError(f"{str(source)!r} is neither an image folder nor an .npz file", where=str(source),
                        fix="give a folder of images (optionally one sub-folder per class) or an .npz file "
                            "with an 'images' array")
    else:
        raise DataError(f"The image source {str(source)!r} does not exist", fix="check the path")
    result.images = normalise(result.images, mean, std, source)
    return result


# -- folders -------------------------------------------------------------------------------------
@dataclass
class FolderListing:
    """The images of a folder in reading order: ``names`` relative to the folder (``a.png`` or ``CLASS/a.png``),
    with ``labels`` indexing ``classes`` when the folder has one sub-folder per class (else both None), or
    ``masks`` (``masks/a.png``, one per image) when it has ``images/`` and ``masks/`` (else None)."""

    names: list[str]
    labels: list[int] | None
    classes: list[str] | None
    masks: list[str] | None = None


def list_folder(folder: Path) -> FolderListing:
    """The image files of ``folder`` (loose, one sub-folder per class, or ``images/`` paired with ``masks/``),
    sorted by name; decodes nothing.

    Raises:
        DataError: the folder holds no images, or mixes loose images with class sub-folders; an image without
            a mask, a mask without an image, or two files of one stem in ``images/`` or ``masks/``.
    """
    if all((folder / part).is_dir() for part in SEGMENTATION_FOLDERS):
        return _paired_listing(folder)
    loose = _image_names(folder)
    class_dirs = [d for d in sorted(folder.iterdir()) if d.is_dir() and _image_names(d)]
    if loose and class_dirs:
        raise DataError(f"The folder {str(folder)!r} mixes loose images with class sub-folders "
                        f"({', '.join(d.name for d in class_dirs[:3])})", where=str(folder / loose[0]),
                        fix="put every image into a class sub-folder, or use a folder of loose images only")
    if class_dirs:
        pairs = [(f"{d.name}/{name}", label) for label, d in enumerate(class_dirs) for name in _image_names(d)]
        return FolderListing([name for name, _ in pairs], [label for _, label in pairs], [d.name for d in class_dirs])
    if loose:
        return FolderListing(loose, None, None)
    raise DataError(f"The folder {str(folder)!r} holds no images", where=str(folder),
                    fix=f"add image files ({', '.join(IMAGE_SUFFIXES)}), directly or in one sub-folder per class")


def _paired_listing(folder: Path) -> FolderListing:
    """``images/`` and ``masks/`` of ``folder``, paired by stem (:func:`~orbify.data.masks.pair_by_stem`)."""
    image_folder, mask_folder = (folder / part for part in SEGMENTATION_FOLDERS)
    images = _image_names(image_folder)
    if not images:
        raise DataError(f"The folder {str(image_folder)!r} holds no images", where=str(image_folder),
                        fix=f"add image files ({', '.join(IMAGE_SUFFIXES)}) and their masks in {str(mask_folder)!r}")
    masks = pair_by_stem(images, _image_names(mask_folder), image_folder, mask_folder)
    return FolderListing([f"{image_folder.name}/{name}" for name in images], None, None,
                         [f"{mask_folder.name}/{name}" for name in masks])


def _read_folder(folder: Path, size: int | None, channels: int, limit: int | None, ignore: int) -> ImageSet:
    listing = list_folder(folder)
    keep = evenly_spaced(len(listing.names), limit)
    files = [folder / listing.names[i] for i in keep]
    images, extents = [], []
    for file in files:
        image = decode_image(file, channels)
        extents.append(tuple(image.shape[-2:]))
        images.append(fit(image, size, file))
    _require_one_size(images, [str(f) for f in files])
    labels = torch.tensor([listing.labels[i] for i in keep]) if listing.labels is not None else None
    masks = None
    if listing.masks is not None:
        mask_files = [str(folder / listing.masks[i]) for i in keep]
        masks = torch.stack([prepare_mask(decode_mask(file), extent, size=size, ignore=ignore, classes=None,
                                          name=file) for file, extent in zip(mask_files, extents)])
    return ImageSet(torch.stack(images), labels, listing.classes, masks)


def _image_names(folder: Path) -> list[str]:
    """The names of the image files directly in ``folder``, sorted."""
    return sorted(f.name for f in folder.iterdir() if f.is_file() and f.suffix.lower() in IMAGE_SUFFIXES)


# -- array files ---------------------------------------------------------------------------------
@dataclass
class NpzArrays:
    """What an ``.npz`` file holds: ``images`` as stored (checked, not converted), checked ``labels`` (N,) int64,
    ``classes`` and ``masks`` (N, H, W) integers as stored (checked against the images); each None when absent."""

    images: np.ndarray
    labels: torch.Tensor | None
    classes: list[str] | None
    masks: np.ndarray | None


def load_npz(file: Path) -> NpzArrays:
    """The arrays of an ``.npz`` file, read whole with ``allow_pickle=False``.

    Raises:
        DataError: an unreadable file, no ``images``, or ``images``, ``labels`` or ``masks`` of a wrong type or
            shape; both ``labels`` and ``masks``.
    """
    try:
        with np.load(file, allow_pickle=False) as archive:
            content = {key: archive[key] for key in archive.files}
    except (OSError, ValueError, zipfile.BadZipFile, EOFError) as error:
        raise DataError(f"The array file {str(file)!r} cannot be read ({type(error).__name__}: {error})",
                        where=str(file), fix="write it with numpy.savez(path, images=..., labels=...)") from error
    if "images" not in content:
        raise DataError(f"The array file {str(file)!r} has no 'images' array (it has: "
                        f"{', '.join(content) or 'nothing'})", where=str(file),
                        fix="store the images under the key 'images': numpy.savez(path, images=..., labels=...)")
    images, masks = content["images"], content.get("masks")
    check_image_array(images, file)
    labels = check_labels(content.get("labels"), images.shape[0], file)
    classes = [str(c) for c in content["classes"]] if "classes" in content else None
    if masks is not None:
        if labels is not None:
            raise DataError(f"The array file {str(file)!r} holds both 'labels' and 'masks'", where=f"{file}:masks",
                            fix="store class labels (classification) or masks (segmentation), not both")
        require_mask_stack(masks, (images.shape[0], *to_nchw(images[:1], file).shape[1:]), f"{file}:masks")
    return NpzArrays(images, labels, classes, masks)


def _read_npz(file: Path, size: int | None, channels: int, limit: int | None, ignore: int) -> ImageSet:
    content = load_npz(file)
    images = to_nchw(content.images, file)
    keep = evenly_spaced(images.shape[0], limit)
    masks = None
    if content.masks is not None:
        masks = torch.stack([prepare_mask(torch.from_numpy(content.masks[i].astype(np.int64)),
                                          tuple(images.shape[-2:]), size=size, ignore=ignore, classes=None,
                                          name=f"{file}:masks[{i}]") for i in keep])
    images = match_channels(images[keep], channels, file)
    images = torch.stack([fit(image, size, file) for image in images]) if size is not None else images
    return ImageSet(images.contiguous(), content.labels[keep] if content.labels is not None else None,
                    content.classes, masks)


# -- shared ----------------------------------------------------------------------------------------
def evenly_spaced(n: int, limit: int | None) -> list[int]:
    """Indices of at most ``limit`` of ``n`` sorted items, evenly spaced, so every class folder contributes."""
    if limit is None or limit >= n:
        return list(range(n))
    return torch.linspace(0, n - 1, limit).round().long().tolist()


def _require_one_size(images: list[torch.Tensor], names: list[str]) -> None:
    first = tuple(images[0].shape[-2:])
    for image, name in zip(images, names):
        if tuple(image.shape[-2:]) != first:
            raise DataError(f"The images differ in size: {names[0]!r} is {first[0]}×{first[1]}, {name!r} is "
                            f"{image.shape[-2]}×{image.shape[-1]}", where=name,
                            fix="give a size to resize them all to (size=... / --input-size)")
