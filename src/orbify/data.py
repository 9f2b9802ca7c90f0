"""Reading the user's images: an image folder (optionally one sub-folder per class) or an .npz array file.

:func:`read_images` returns an :class:`ImageSet` of float32 images ``(N, C, H, W)`` scaled to
[0, 1] (8-bit data; float arrays are taken as they are), optionally resized to a square size
(shorter side scaled to ``size``, then the centre cropped) and normalised per channel. The
checker, the tuner and the command line all read inputs through it.

Folder layouts (sorted by name, so the order is reproducible):

* ``DIR/*.png`` (any format Pillow reads): images without labels;
* ``DIR/CLASS/*.png``: one sub-folder per class; ``classes`` are the sub-folder names and
  ``labels`` index into them.

An ``.npz`` file holds ``images`` of shape (N, H, W), (N, H, W, C) or (N, C, H, W) with C in
{1, 3, 4} (when both axes could hold channels, the last one does unless the second is 3), optionally ``labels`` (N integers) and ``classes`` (their names). It is read with
``allow_pickle=False``. Every unreadable input raises :class:`~orbify.errors.DataError` naming it.
An image file declaring more than :data:`LARGEST_IMAGE_PIXELS` pixels is refused from its header,
before any pixel is decoded (an untrusted file cannot make orbify allocate gigabytes).
"""

from __future__ import annotations

import zipfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

from orbify.errors import DataError

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".gif", ".tif", ".tiff", ".webp", ".ppm", ".pgm")
_CHANNEL_COUNTS = (1, 3, 4)
LARGEST_IMAGE_PIXELS = 8192 * 8192
"""The most pixels an image file may declare: 64 times a 1024×1024 tile, below Pillow's own
decompression-bomb limit (about 89 million pixels), so a larger file is refused from its header."""
# ITU-R BT.601 luma weights, the ones Pillow's "L" conversion uses (common practice).
_LUMA = (0.299, 0.587, 0.114)


@dataclass
class ImageSet:
    """Images ``(N, C, H, W)`` float32, with integer ``labels`` (N,) and class names when known."""

    images: torch.Tensor
    labels: torch.Tensor | None = None
    classes: list[str] | None = None

    def __len__(self) -> int:
        return self.images.shape[0]

    def batches(self, batch_size: int) -> Iterator[torch.Tensor]:
        """The images in order, ``batch_size`` at a time (the last batch may be smaller)."""
        return iter(self.images.split(batch_size))


def read_images(path: str | Path, *, size: int | None = None, channels: int = 3, limit: int | None = None,
                mean: Sequence[float] | None = None, std: Sequence[float] | None = None) -> ImageSet:
    """Read an image folder or an ``.npz`` file into an :class:`ImageSet`.

    Args:
        path: a folder of images (optionally one sub-folder per class) or an ``.npz`` file.
        size: resize every image so its shorter side is ``size`` and crop the centre ``size``×``size``;
            ``None`` keeps the sizes, which must then all agree.
        channels: 1 (grey) or 3 (RGB); grey images are repeated to RGB, RGB reduced to grey by luma,
            an alpha channel is dropped.
        limit: read at most this many images, evenly spaced over the sorted list (so every class
            folder contributes).
        mean, std: per-channel normalisation applied last: ``(x - mean) / std``.

    Raises:
        DataError: the path is missing or holds no images, a file cannot be decoded, shapes
            disagree, or an array file lacks ``images`` or has a wrong shape.

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
        result = _read_folder(source, size, channels, limit)
    elif source.is_file() and source.suffix.lower() == ".npz":
        result = _read_npz(source, size, channels, limit)
    elif source.exists():
        raise DataError(f"{str(source)!r} is neither an image folder nor an .npz file", where=str(source),
                        fix="give a folder of images (optionally one sub-folder per class) or an .npz file "
                            "with an 'images' array")
    else:
        raise DataError(f"The image source {str(source)!r} does not exist", fix="check the path")
    result.images = _normalise(result.images, mean, std, source)
    return result


# -- folders -------------------------------------------------------------------------------------
def _read_folder(folder: Path, size: int | None, channels: int, limit: int | None) -> ImageSet:
    loose = _image_files(folder)
    class_dirs = [d for d in sorted(folder.iterdir()) if d.is_dir() and _image_files(d)]
    if loose and class_dirs:
        raise DataError(f"The folder {str(folder)!r} mixes loose images with class sub-folders "
                        f"({', '.join(d.name for d in class_dirs[:3])})", where=str(loose[0]),
                        fix="put every image into a class sub-folder, or use a folder of loose images only")
    if class_dirs:
        files = [(f, label) for label, d in enumerate(class_dirs) for f in _image_files(d)]
        classes: list[str] | None = [d.name for d in class_dirs]
    elif loose:
        files = [(f, None) for f in loose]
        classes = None
    else:
        raise DataError(f"The folder {str(folder)!r} holds no images", where=str(folder),
                        fix=f"add image files ({', '.join(IMAGE_SUFFIXES)}), directly or in one sub-folder per class")
    files = [files[i] for i in evenly_spaced(len(files), limit)]
    images = [_fit(_decode(f, channels), size, f) for f, _ in files]
    _require_one_size(images, [str(f) for f, _ in files])
    labels = torch.tensor([label for _, label in files]) if classes is not None else None
    return ImageSet(torch.stack(images), labels, classes)


def _image_files(folder: Path) -> list[Path]:
    return sorted(f for f in folder.iterdir() if f.is_file() and f.suffix.lower() in IMAGE_SUFFIXES)


def _decode(file: Path, channels: int) -> torch.Tensor:
    """One image file as a float32 (C, H, W) tensor in [0, 1]."""
    from PIL import Image, UnidentifiedImageError

    try:
        with Image.open(file) as image:
            _require_tile_size(file, image.width, image.height)
            image = image.convert("L" if channels == 1 else "RGB")
            array = np.asarray(image, dtype=np.uint8)
    except Image.DecompressionBombError as error:   # declared far beyond the limit: Pillow refuses at open
        raise _too_large(file, f"more than {LARGEST_IMAGE_PIXELS:,} pixels ({error})") from error
    except (UnidentifiedImageError, OSError, ValueError) as error:
        raise DataError(f"The image file {str(file)!r} cannot be read ({type(error).__name__}: {error})",
                        where=str(file), fix="replace or remove the damaged file") from error
    tensor = torch.from_numpy(array.copy()).float() / 255.0
    return tensor.unsqueeze(0) if tensor.dim() == 2 else tensor.permute(2, 0, 1)


def _require_tile_size(file: Path, width: int, height: int) -> None:
    """Refuse an image whose header declares more than :data:`LARGEST_IMAGE_PIXELS` pixels."""
    if width * height > LARGEST_IMAGE_PIXELS:
        raise _too_large(file, f"{width:,} × {height:,} pixels")


def _too_large(file: Path, declared: str) -> DataError:
    return DataError(f"The image file {str(file)!r} declares {declared}, far beyond any tile "
                     f"(at most {LARGEST_IMAGE_PIXELS:,} pixels are read); it was not decoded", where=str(file),
                     fix="cut large scenes or slides into tiles first, or remove the file if you do not know "
                         "where it came from")


# -- array files ---------------------------------------------------------------------------------
def _read_npz(file: Path, size: int | None, channels: int, limit: int | None) -> ImageSet:
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
    images = _to_nchw(content["images"], file)
    n = images.shape[0]
    labels = _labels(content.get("labels"), n, file)
    classes = [str(c) for c in content["classes"]] if "classes" in content else None
    keep = evenly_spaced(n, limit)
    images = _match_channels(images[keep], channels, file)
    images = torch.stack([_fit(image, size, file) for image in images]) if size is not None else images
    return ImageSet(images.contiguous(), labels[keep] if labels is not None else None, classes)


def _to_nchw(array: np.ndarray, file: Path) -> torch.Tensor:
    """(N, H, W), (N, H, W, C) or (N, C, H, W) → float32 (N, C, H, W); 8-bit values scaled to [0, 1]."""
    if array.dtype.kind not in "uif":
        raise DataError(f"The 'images' array of {str(file)!r} holds {array.dtype} values, not numbers",
                        where=f"{file}:images", fix="store the images as uint8 (0–255) or float (0–1) values")
    if array.ndim == 3:
        array = array[:, None]
    elif array.ndim == 4:
        last, second = array.shape[-1] in _CHANNEL_COUNTS, array.shape[1] in _CHANNEL_COUNTS
        if last and (not second or array.shape[1] != 3):   # both fit (tiny images): channels-last, unless RGB first
            array = array.transpose(0, 3, 1, 2)
        elif not second:
            raise DataError(f"The 'images' array of {str(file)!r} has shape {array.shape}: no axis of 1, 3 or 4 "
                            "channels", where=f"{file}:images",
                            fix="store images as (N, H, W), (N, H, W, C) or (N, C, H, W) with C = 1, 3 or 4")
    else:
        raise DataError(f"The 'images' array of {str(file)!r} has shape {array.shape}, not a stack of images",
                        where=f"{file}:images", fix="store images as (N, H, W), (N, H, W, C) or (N, C, H, W)")
    if array.shape[0] == 0:
        raise DataError(f"The 'images' array of {str(file)!r} is empty", where=f"{file}:images",
                        fix="store at least one image")
    scale = 255.0 if array.dtype == np.uint8 else 1.0
    return torch.from_numpy(np.ascontiguousarray(array)).float() / scale


def _labels(array: np.ndarray | None, n: int, file: Path) -> torch.Tensor | None:
    if array is None:
        return None
    if array.dtype.kind not in "iu" or array.shape != (n,):
        raise DataError(f"The 'labels' array of {str(file)!r} has shape {array.shape} and type {array.dtype}; "
                        f"expected {n} integers, one per image", where=f"{file}:labels",
                        fix="store one integer class index per image, or leave 'labels' out")
    return torch.from_numpy(array.astype(np.int64))


def _match_channels(images: torch.Tensor, channels: int, file: Path) -> torch.Tensor:
    have = images.shape[1]
    if have == 4:
        images, have = images[:, :3], 3   # drop alpha
    if have == channels:
        return images
    if have == 1:
        return images.expand(-1, channels, -1, -1)
    luma = torch.tensor(_LUMA, dtype=images.dtype).view(1, 3, 1, 1)
    return (images * luma).sum(1, keepdim=True)


# -- shared ----------------------------------------------------------------------------------------
def evenly_spaced(n: int, limit: int | None) -> list[int]:
    """Indices of at most ``limit`` of ``n`` sorted items, evenly spaced, so every class folder contributes."""
    if limit is None or limit >= n:
        return list(range(n))
    return torch.linspace(0, n - 1, limit).round().long().tolist()


def _fit(image: torch.Tensor, size: int | None, file: Path) -> torch.Tensor:
    """Scale the shorter side of a (C, H, W) image to ``size`` (antialiased bilinear) and crop the centre."""
    if size is None:
        return image
    if size < 1:
        raise DataError(f"The image size must be at least 1, got {size}", where=str(file), fix="give a positive size")
    h, w = image.shape[-2:]
    scale = size / min(h, w)
    new_h, new_w = max(size, round(h * scale)), max(size, round(w * scale))
    if (new_h, new_w) != (h, w):
        image = F.interpolate(image[None], size=(new_h, new_w), mode="bilinear", antialias=True,
                              align_corners=False)[0]
    top, left = (new_h - size) // 2, (new_w - size) // 2
    return image[:, top:top + size, left:left + size]


def _require_one_size(images: list[torch.Tensor], names: list[str]) -> None:
    first = tuple(images[0].shape[-2:])
    for image, name in zip(images, names):
        if tuple(image.shape[-2:]) != first:
            raise DataError(f"The images differ in size: {names[0]!r} is {first[0]}×{first[1]}, {name!r} is "
                            f"{image.shape[-2]}×{image.shape[-1]}", where=name,
                            fix="give a size to resize them all to (size=... / --input-size)")


def _normalise(images: torch.Tensor, mean: Sequence[float] | None, std: Sequence[float] | None,
               source: Path) -> torch.Tensor:
    channels = images.shape[1]
    for name, values in (("mean", mean), ("std", std)):
        if values is not None and len(values) != channels:
            raise DataError(f"The normalisation {name} has {len(values)} values for {channels}-channel images",
                            where=str(source), fix=f"give {channels} values")
    if std is not None and any(s <= 0 for s in std):
        raise DataError(f"The normalisation std must be positive, got {list(std)}", where=str(source),
                        fix="give positive standard deviations")
    if mean is not None:
        images = images - torch.tensor(mean, dtype=images.dtype).view(1, -1, 1, 1)
    if std is not None:
        images = images / torch.tensor(std, dtype=images.dtype).view(1, -1, 1, 1)
    return images
