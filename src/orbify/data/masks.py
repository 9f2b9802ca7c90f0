"""Segmentation masks: class indices per pixel, read raw, checked against their image and prepared with it.

A mask file is an image whose pixel values are class indices: a grey PNG (Pillow mode ``L``, 8 bits, or
``I;16``/``I``, 16 or 32 bits), a palette PNG (mode ``P``: the palette *index* is the class, whatever its
colour) or a two-level image (mode ``1``: classes 0 and 1). The values are read as stored, never scaled
or converted; a colour mask (RGB, RGBA, ...) is refused, since its colours would need a table to become
classes. :func:`prepare_mask` checks a mask against its image (the same height and width) and the classes,
turns the ``ignore`` value into :data:`UNLABELLED` and fits the mask to the input size with its image by
nearest neighbour, so no value the mask did not hold appears (docs/design.md §17).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import torch

from orbify.data.decoding import decode_pixels, fit
from orbify.errors import DataError

UNLABELLED = -1
"""The label of a sample without one, and the class of a mask pixel to leave out (the ``ignore`` value)."""
MASK_MODES = frozenset({"1", "L", "P", "I", "I;16", "I;16B", "I;16L", "I;16N"})
"""The Pillow modes whose pixel values are read as class indices."""
_SAVE_INDICES = ("save the class index of every pixel as a grey (mode L, or I;16 beyond 255 classes) or a palette "
                 "(mode P) PNG, e.g. PIL.Image.fromarray(indices.astype(numpy.uint8)).save('mask.png')")


def decode_mask(file: Path | str, *, data: bytes | None = None) -> torch.Tensor:
    """The class indices of the mask file ``file`` (or of the encoded bytes ``data``, which ``file`` then names),
    as an int64 (H, W) tensor of the stored values.

    Raises:
        DataError: the file cannot be read, declares too many pixels, or is not grey, palette or two-level.
    """
    return torch.from_numpy(decode_pixels(file, lambda image: _indices(image, file), data=data).astype(np.int64))


def _indices(image, file: Path | str) -> np.ndarray:
    if image.mode not in MASK_MODES:
        raise DataError(f"The mask {str(file)!r} is a {image.mode} image, not one of class indices",
                        where=str(file), fix=_SAVE_INDICES)
    return np.asarray(image)   # a palette image gives its indices; grey and 16-bit images their stored values


def prepare_mask(mask: torch.Tensor, image_size: tuple[int, int], *, size: int | None, ignore: int,
                 classes: int | None, name: str) -> torch.Tensor:
    """The (H, W) mask ``mask`` of an image of ``image_size`` (H, W, before fitting), ready for training: int64,
    ``ignore`` pixels :data:`UNLABELLED`, fitted to ``size`` by nearest neighbour (shorter side scaled, centre
    cropped, as :func:`~orbify.data.decoding.fit` fits its image).

    Raises:
        DataError naming the mask ``name``: a mask of another height or width than its image; a value that is
            not ``ignore`` and is negative or, with ``classes`` set, not below ``classes``.
    """
    if tuple(mask.shape) != tuple(image_size):
        raise DataError(f"The mask {name!r} is {_extent(mask.shape)} pixels, but its image is {_extent(image_size)}",
                        where=name, fix="give every image a mask of its own height and width")
    mask = mask.long()
    kept = mask != ignore
    wrong = kept & ((mask < 0) | (mask >= classes if classes is not None else False))
    if bool(wrong.any()):
        value = int(mask[wrong][0])
        within = f"outside the {classes} classes (0 to {classes - 1})" if classes is not None else "negative"
        raise DataError(f"The mask {name!r} holds the value {value}, {within}, and it is not the ignored value "
                        f"{ignore}", where=name,
                        fix=f"give pixels class indices 0 to (classes − 1), and {ignore} where no class is known "
                            "(the ignored value is set by --ignore-index, ignore_index in Python)")
    mask = torch.where(kept, mask, torch.full_like(mask, UNLABELLED))
    return fit(mask[None], size, Path(name), nearest=True)[0].contiguous()


def require_mask_stack(masks: np.ndarray | torch.Tensor, images: tuple[int, ...], where: str) -> None:
    """Refuse ``masks`` that are not an integer (N, H, W) stack for images of shape ``images`` (N, C, H, W)."""
    dtype = str(masks.dtype).removeprefix("torch.")
    integer = dtype == "bool" or dtype.startswith(("int", "uint"))
    expected = (images[0], *images[-2:])
    if not integer or tuple(masks.shape) != expected:
        raise DataError(f"The masks (shape {tuple(masks.shape)}, {dtype}) do not fit {images[0]} images of "
                        f"{_extent(images[-2:])} pixels", where=where,
                        fix=f"give one integer mask of class indices per image, shape {expected}")


def _extent(shape) -> str:
    return f"{shape[-2]}×{shape[-1]}"


def pair_by_stem(images: list[str], masks: list[str], image_folder: Path, mask_folder: Path) -> list[str]:
    """The mask file of each of the ``images`` (file names in ``image_folder``), found among ``masks`` (file names
    in ``mask_folder``) by stem: ``a.jpg`` pairs with ``a.png``.

    Raises:
        DataError naming the file: two files of one folder with one stem, an image without a mask, or a mask
            without an image.
    """
    image_stems, mask_stems = _by_stem(images, image_folder), _by_stem(masks, mask_folder)
    for have, lack, kind, other, folder in ((image_stems, mask_stems, "image", "mask", image_folder),
                                            (mask_stems, image_stems, "mask", "image", mask_folder)):
        alone = sorted(set(have) - set(lack))
        if alone:
            file = str(folder / have[alone[0]])
            other_folder = mask_folder if other == "mask" else image_folder
            raise DataError(f"The {kind} {file!r} has no {other} of the same name (stem {alone[0]!r}) in "
                            f"{str(other_folder)!r}; {len(alone)} {kind}(s) are unpaired", where=file,
                            fix=f"give every image its mask under the same name (a.jpg and a.png pair), or "
                                f"remove the unpaired {kind}s")
    return [mask_stems[Path(name).stem] for name in images]


def _by_stem(names: list[str], folder: Path) -> dict[str, str]:
    stems: dict[str, str] = {}
    for name in names:
        stem = Path(name).stem
        if stem in stems:
            raise DataError(f"The files {str(folder / stems[stem])!r} and {str(folder / name)!r} share the name "
                            f"{stem!r}, so images and masks cannot be paired", where=str(folder / name),
                            fix="keep one file per name in the images and the masks folders")
        stems[stem] = name
    return stems
