"""Decoding and preparing single images and image arrays, shared by whole reads and streamed tiles.

Every function raises :class:`~orbify.errors.DataError` naming the file for bad input. An image
file declaring more than :data:`LARGEST_IMAGE_PIXELS` pixels is refused from its header, before any
pixel is decoded (an untrusted file cannot make orbify allocate gigabytes).
"""

from __future__ import annotations

import io
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import torch
import torch.nn.functional as F

from orbify.errors import DataError

if TYPE_CHECKING:
    from PIL.Image import Image as PillowImage

CHANNEL_COUNTS = (1, 3, 4)
LARGEST_IMAGE_PIXELS = 8192 * 8192
"""The most pixels an image file may declare: 64 times a 1024×1024 tile, below Pillow's own
decompression-bomb limit (about 89 million pixels), so a larger file is refused from its header."""
# ITU-R BT.601 luma weights, the ones Pillow's "L" conversion uses (common practice).
_LUMA = (0.299, 0.587, 0.114)
# Pillow modes of grey images (with or without alpha, 1 to 32 bits).
_GREY_MODES = frozenset({"1", "L", "LA", "La", "I", "I;16", "I;16B", "I;16L", "I;16N", "F"})


def decode_image(file: Path | str, channels: int | None, *, data: bytes | None = None) -> torch.Tensor:
    """One image as a float32 (C, H, W) tensor in [0, 1]: the file ``file``, or the encoded bytes ``data`` when
    given (then ``file`` only names them in messages, e.g. ``shard.tar:member``).

    ``channels`` 1 gives grey, 3 RGB (by Pillow's conversions), None the image's own: grey for a grey image,
    else RGB. The size guard applies to bytes exactly as to files.
    """
    array = decode_pixels(file, lambda image: np.asarray(image.convert(_pillow_mode(image.mode, channels)),
                                                         dtype=np.uint8), data=data)
    tensor = torch.from_numpy(array.copy()).float() / 255.0
    return tensor.unsqueeze(0) if tensor.dim() == 2 else tensor.permute(2, 0, 1)


def decode_pixels(file: Path | str, pixels: Callable[[PillowImage], np.ndarray], *,
                  data: bytes | None = None) -> np.ndarray:
    """``pixels(image)`` of the Pillow image in ``file`` (or in the bytes ``data``, which ``file`` then names).

    The file's header is checked against :data:`LARGEST_IMAGE_PIXELS` before ``pixels`` decodes anything; a
    file Pillow cannot read raises :class:`~orbify.errors.DataError` naming it (so does ``pixels``, for its own
    refusals).
    """
    from PIL import Image, UnidentifiedImageError

    try:
        with Image.open(io.BytesIO(data) if data is not None else file) as image:
            _require_tile_size(file, image.width, image.height)
            return pixels(image)
    except Image.DecompressionBombError as error:   # declared far beyond the limit: Pillow refuses at open
        raise _too_large(file, f"more than {LARGEST_IMAGE_PIXELS:,} pixels ({error})") from error
    except (UnidentifiedImageError, OSError, ValueError, SyntaxError, EOFError) as error:
        raise DataError(f"The image file {str(file)!r} cannot be read ({type(error).__name__}: {error})",
                        where=str(file), fix="replace or remove the damaged file") from error


def _pillow_mode(mode: str, channels: int | None) -> str:
    """The Pillow mode to convert to: "L" for one channel (or a grey image kept as it is), else "RGB"."""
    if channels is None:
        return "L" if mode in _GREY_MODES else "RGB"
    return "L" if channels == 1 else "RGB"


def _require_tile_size(file: Path, width: int, height: int) -> None:
    """Refuse an image whose header declares more than :data:`LARGEST_IMAGE_PIXELS` pixels."""
    if width * height > LARGEST_IMAGE_PIXELS:
        raise _too_large(file, f"{width:,} × {height:,} pixels")


def _too_large(file: Path, declared: str) -> DataError:
    return DataError(f"The image file {str(file)!r} declares {declared}, far beyond any tile "
                     f"(at most {LARGEST_IMAGE_PIXELS:,} pixels are read); it was not decoded", where=str(file),
                     fix="cut large scenes or slides into tiles first, or remove the file if you do not know "
                         "where it came from")


def to_nchw(array: np.ndarray, file: Path) -> torch.Tensor:
    """(N, H, W), (N, H, W, C) or (N, C, H, W) → float32 (N, C, H, W); 8-bit values scaled to [0, 1]."""
    if array.dtype.kind not in "uif":
        raise DataError(f"The 'images' array of {str(file)!r} holds {array.dtype} values, not numbers",
                        where=f"{file}:images", fix="store the images as uint8 (0–255) or float (0–1) values")
    if array.ndim == 3:
        array = array[:, None]
    elif array.ndim == 4:
        last, second = array.shape[-1] in CHANNEL_COUNTS, array.shape[1] in CHANNEL_COUNTS
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


def check_image_array(array: np.ndarray, file: Path) -> None:
    """Raise what :func:`to_nchw` raises for ``array``, converting at most one image (a memory-mapped array stays
    on disk)."""
    to_nchw(array[:1] if array.ndim in (3, 4) else array, file)


def check_labels(array: np.ndarray | None, n: int, file: Path) -> torch.Tensor | None:
    if array is None:
        return None
    if array.dtype.kind not in "iu" or array.shape != (n,):
        raise DataError(f"The 'labels' array of {str(file)!r} has shape {array.shape} and type {array.dtype}; "
                        f"expected {n} integers, one per image", where=f"{file}:labels",
                        fix="store one integer class index per image, or leave 'labels' out")
    return torch.from_numpy(array.astype(np.int64))


def match_channels(images: torch.Tensor, channels: int, file: Path) -> torch.Tensor:
    have = images.shape[1]
    if have == 4:
        images, have = images[:, :3], 3   # drop alpha
    if have == channels:
        return images
    if have == 1:
        return images.expand(-1, channels, -1, -1)
    luma = torch.tensor(_LUMA, dtype=images.dtype).view(1, 3, 1, 1)
    return (images * luma).sum(1, keepdim=True)


def fit(image: torch.Tensor, size: int | None, file: Path, *, nearest: bool = False) -> torch.Tensor:
    """Scale the shorter side of a (C, H, W) image to ``size`` and crop the centre: antialiased bilinear, or with
    ``nearest`` the nearest pixel centre (for masks: only values the image holds come out, in its dtype)."""
    if size is None:
        return image
    if size < 1:
        raise DataError(f"The image size must be at least 1, got {size}", where=str(file), fix="give a positive size")
    h, w = image.shape[-2:]
    scale = size / min(h, w)
    new_h, new_w = max(size, round(h * scale)), max(size, round(w * scale))
    if (new_h, new_w) != (h, w) and nearest:   # float64 holds every integer class index exactly
        image = F.interpolate(image[None].double(), size=(new_h, new_w), mode="nearest-exact")[0].to(image.dtype)
    elif (new_h, new_w) != (h, w):
        image = F.interpolate(image[None], size=(new_h, new_w), mode="bilinear", antialias=True,
                              align_corners=False)[0]
    top, left = (new_h - size) // 2, (new_w - size) // 2
    return image[:, top:top + size, left:left + size]


def normalise(images: torch.Tensor, mean: Sequence[float] | None, std: Sequence[float] | None,
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
