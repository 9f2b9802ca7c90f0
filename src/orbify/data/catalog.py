"""Opening the user's data as :class:`~orbify.data.tiles.Tiles`: listing samples, decoding none.

:func:`open_tiles` accepts

* a folder of images, loose, one sub-folder per class, or ``images/`` and ``masks/`` paired by
  stem (the order, labels and masks of :func:`~orbify.data.images.read_images`);
* a ``.csv`` manifest with a header: ``path`` (required; relative to the manifest's folder),
  optionally ``label`` (class indices when every label is a non-negative integer, else class names,
  sorted, which the labels then index) or ``mask`` (the path of the image's mask, like ``path``),
  and ``split`` (``train``, ``val``, or empty for train; the tiles' ``validation`` marks the ``val``
  rows); cells are stripped of surrounding spaces, blank lines skipped;
* an ``.npy`` array (memory-mapped, converted one image at a time; no labels) or an ``.npz`` file
  (read whole: ``images``, optionally ``labels`` and ``classes``, or ``masks``);
* tar shards, ``x.tar`` or a brace pattern ``tiles-{0000..0099}.tar`` (:mod:`orbify.data.shards`).

Every file (mask files too) is stat-ed at open, and the fingerprint covers each one's size and
modification time, so any change to the list or to a file changes it. Errors name the file, and the
line of a manifest.
"""

from __future__ import annotations

import csv
import hashlib
import os
import re
import stat
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import NoReturn

import numpy as np
import torch

from orbify.data.decoding import check_image_array
from orbify.data.images import evenly_spaced, list_folder, load_npz
from orbify.data.shards import is_shard_spec, open_shards
from orbify.data.tiles import ArrayTiles, FileTiles, PackedStrings, Preparation, Tiles
from orbify.errors import DataError

ACCEPTED_FORMS = ("a folder of images (optionally one sub-folder per class, or images/ and masks/), a .csv manifest "
                  "(columns path, label or mask, split), an .npy or .npz array file, or tar shards (tiles.tar, or a "
                  "pattern such as tiles-{0000..0099}.tar)")
_SPLITS = {"": False, "train": False, "val": True}   # split value → in the validation samples
_INDEX = re.compile(r"[0-9]+")


def open_tiles(data: str | Path, *, preparation: Preparation, limit: int | None = None) -> Tiles:
    """The samples of ``data`` (see the module docstring for the forms), prepared by ``preparation`` when read.

    ``limit`` keeps at most that many samples, evenly spaced over the list (so every class contributes).

    Raises:
        DataError: a missing or unrecognised path, a malformed manifest, array or shard, a listed file that
            cannot be stat-ed; reading a sample later raises DataError naming it when it cannot be decoded.
    """
    text, source = str(data), Path(data)
    if limit is not None and limit < 1:
        raise DataError(f"The sample limit must be at least 1, got {limit}", where=text,
                        fix="give a positive limit or none")
    if source.is_dir():
        return _open_folder(source, preparation, limit)
    opener = {".csv": _open_manifest, ".npy": _open_npy, ".npz": _open_npz}.get(source.suffix.lower())
    if opener is not None and source.is_file():
        return opener(source, preparation, limit)
    if is_shard_spec(text):
        return open_shards(text, preparation=preparation, limit=limit)
    what = "is not a form of data orbify reads" if source.exists() else "does not exist"
    raise DataError(f"The data {text!r} {what}", where=text, fix=f"give {ACCEPTED_FORMS}")


# -- file lists ----------------------------------------------------------------------------------
@dataclass
class _Listing:
    """Files relative to a folder, with optional labels, class names, validation marks and mask files;
    ``locate(i)`` says where file ``i`` was listed (for messages)."""

    names: list[str]
    labels: list[int] | None
    classes: list[str] | None
    validation: list[bool] | None
    locate: Callable[[int], str]
    masks: list[str] | None = None


def _open_folder(folder: Path, preparation: Preparation, limit: int | None) -> Tiles:
    listing = list_folder(folder)
    return _file_tiles(folder, _Listing(listing.names, listing.labels, listing.classes, None,
                                        lambda i: str(folder / listing.names[i]), listing.masks), preparation, limit)


def _open_manifest(file: Path, preparation: Preparation, limit: int | None) -> Tiles:
    return _file_tiles(file.parent, _read_manifest(file), preparation, limit)


def _file_tiles(root: Path, listing: _Listing, preparation: Preparation, limit: int | None) -> Tiles:
    keep = evenly_spaced(len(listing.names), limit)
    names = [listing.names[i] for i in keep]
    labels = torch.tensor([listing.labels[i] for i in keep], dtype=torch.long) if listing.labels is not None else None
    validation = torch.tensor([listing.validation[i] for i in keep]) if listing.validation is not None else None
    masks = [listing.masks[i] for i in keep] if listing.masks is not None else None
    digest = hashlib.sha256()
    for i, name in zip(keep, names):
        digest.update(f"{name}\0{_file_stamp(root / name, listing.locate(i))}\n".encode("utf-8", "surrogateescape"))
    for i, mask in zip(keep, masks or []):
        digest.update(f"{mask}\0{_file_stamp(root / mask, listing.locate(i), 'mask')}\n".encode("utf-8",
                                                                                             "surrogateescape"))
    for extra in (labels, validation):
        digest.update(extra.numpy().tobytes() if extra is not None else b"-")
    digest.update("\0".join(listing.classes).encode() if listing.classes is not None else b"-")
    return FileTiles(root, PackedStrings(names), preparation=preparation, labels=labels, classes=listing.classes,
                     validation=validation, fingerprint=f"files n={len(names)} sha256={digest.hexdigest()}",
                     masks=PackedStrings(masks) if masks is not None else None)


def _file_stamp(file: Path, where: str, kind: str = "image") -> str:
    """``size mtime_ns`` of a regular file (an image, or a mask), else DataError located at ``where``."""
    try:
        info = os.stat(file)
    except OSError as error:
        raise DataError(f"The {kind} file {str(file)!r} cannot be opened ({error.strerror})", where=where,
                        fix="check the path (a manifest's relative paths start at the manifest's folder)") from error
    if not stat.S_ISREG(info.st_mode):
        raise DataError(f"{str(file)!r} is not a file", where=where, fix="list image files only")
    return f"{info.st_size} {info.st_mtime_ns}"


# -- manifests -----------------------------------------------------------------------------------
def _read_manifest(file: Path) -> _Listing:
    """The rows of a CSV manifest (read with the csv module; a blank line is skipped)."""
    paths, labels, masks, splits, lines = [], [], [], [], []
    try:
        with open(file, newline="", encoding="utf-8-sig") as stream:
            reader = csv.reader(stream)
            columns = _manifest_columns(file, next(reader, None))
            for row in reader:
                if not row:
                    continue
                line = reader.line_num
                if len(row) > len(columns):
                    _manifest_error(file, line, f"has {len(row)} cells but the header names {len(columns)} columns",
                                    "quote paths that contain commas")
                cells = dict(zip(columns, (cell.strip() for cell in row)))
                paths.append(_manifest_path(file, line, cells.get("path", "")))
                labels.append(_manifest_label(file, line, cells.get("label", "")) if "label" in columns else None)
                masks.append(_manifest_mask(file, line, cells.get("mask", "")) if "mask" in columns else None)
                splits.append(_manifest_split(file, line, cells.get("split", "")) if "split" in columns else None)
                lines.append(line)
    except (OSError, UnicodeDecodeError, csv.Error) as error:
        raise DataError(f"The manifest {str(file)!r} cannot be read ({type(error).__name__}: {error})",
                        where=str(file), fix="give a CSV file in UTF-8 with a header line") from error
    if not paths:
        raise DataError(f"The manifest {str(file)!r} lists no images", where=str(file),
                        fix="add one row per image below the header (a column 'path')")
    indices, classes = _class_indices(labels) if "label" in columns else (None, None)
    validation = [bool(s) for s in splits] if "split" in columns else None
    return _Listing(paths, indices, classes, validation, lambda i: f"{file}:{lines[i]}",
                    masks if "mask" in columns else None)


def _manifest_columns(file: Path, header: list[str] | None) -> list[str]:
    if header is None:
        raise DataError(f"The manifest {str(file)!r} is empty", where=str(file),
                        fix="write a header line (path, optionally label or mask, and split), then one row per "
                            "image")
    columns = [name.strip().lower() for name in header]
    if "path" not in columns:
        _manifest_error(file, 1, f"has no 'path' column (the header names: {', '.join(columns) or 'nothing'})",
                        "name the column of image paths 'path' in the header line")
    if "label" in columns and "mask" in columns:
        _manifest_error(file, 1, "has both a 'label' and a 'mask' column",
                        "give class labels (classification) or mask paths (segmentation), not both")
    return columns


def _manifest_path(file: Path, line: int, path: str) -> str:
    if not path:
        _manifest_error(file, line, "has no path", "give every row the path of its image, or delete the row")
    return path


def _manifest_label(file: Path, line: int, label: str) -> str:
    if not label:
        _manifest_error(file, line, "has an empty label while the manifest has a 'label' column",
                        "give every row a label (a class index or a class name), or remove the 'label' column")
    return label


def _manifest_mask(file: Path, line: int, mask: str) -> str:
    if not mask:
        _manifest_error(file, line, "has no mask while the manifest has a 'mask' column",
                        "give every row the path of its mask (relative to the manifest, like 'path')")
    return mask


def _manifest_split(file: Path, line: int, split: str) -> bool:
    if split not in _SPLITS:
        _manifest_error(file, line, f"has the split {split!r}", "use 'train', 'val' or leave it empty (train)")
    return _SPLITS[split]


def _manifest_error(file: Path, line: int, what: str, fix: str) -> NoReturn:
    raise DataError(f"Line {line} of the manifest {str(file)!r} {what}", where=f"{file}:{line}", fix=fix)


def _class_indices(labels: list[str]) -> tuple[list[int], list[str] | None]:
    """Labels that are all non-negative integers are class indices; otherwise class names, sorted, which the
    indices returned point into."""
    if all(_INDEX.fullmatch(label) for label in labels):
        return [int(label) for label in labels], None
    classes = sorted(set(labels))
    position = {name: i for i, name in enumerate(classes)}
    return [position[label] for label in labels], classes


# -- arrays --------------------------------------------------------------------------------------
def _open_npy(file: Path, preparation: Preparation, limit: int | None) -> Tiles:
    try:
        array = np.load(file, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError, EOFError) as error:
        raise DataError(f"The array file {str(file)!r} cannot be read ({type(error).__name__}: {error})",
                        where=str(file), fix="write it with numpy.save(path, images) (uncompressed)") from error
    if not isinstance(array, np.ndarray):
        raise DataError(f"The array file {str(file)!r} does not hold one array", where=str(file),
                        fix="write it with numpy.save(path, images)")
    return _array_tiles(array, file, preparation, limit, memory_mapped=True)


def _open_npz(file: Path, preparation: Preparation, limit: int | None) -> Tiles:
    content = load_npz(file)
    return _array_tiles(content.images, file, preparation, limit, labels=content.labels, classes=content.classes,
                        masks=content.masks)


def _array_tiles(array: np.ndarray, file: Path, preparation: Preparation, limit: int | None, *,
                 memory_mapped: bool = False, labels: torch.Tensor | None = None,
                 classes: list[str] | None = None, masks: np.ndarray | None = None) -> Tiles:
    check_image_array(array, file)
    keep = np.asarray(evenly_spaced(array.shape[0], limit), dtype=np.int64)
    info = file.stat()
    digest = hashlib.sha256(keep.tobytes())
    fingerprint = (f"array {file.resolve()} size={info.st_size} mtime_ns={info.st_mtime_ns} shape={array.shape} "
                   f"dtype={array.dtype} kept={len(keep)} sha256={digest.hexdigest()}")
    return ArrayTiles(array, file, keep, preparation=preparation, memory_mapped=memory_mapped,
                      labels=labels[torch.from_numpy(keep)] if labels is not None else None, classes=classes,
                      fingerprint=fingerprint, masks=masks)
