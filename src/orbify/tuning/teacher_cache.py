"""The teacher's outputs on every training sample, computed once and kept on disk (docs/design.md §13).

A cache is a folder with two files:

``teacher.npy``
    float16 (samples, classes) (a dense teacher: (samples, classes, H, W)): the teacher's log-probabilities
    under the chosen view combination, row ``i`` for sample ``i`` of the training data; memory-mapped, so a run holds only the pages
    it touches.
``key.json``
    what the rows depend on (:class:`CacheKey`: the original's weights, the group, the view
    combination, the data list and its preparation), the array's shape and the SHA-256 of
    ``teacher.npy``. It is written last, atomically, once every row is on disk.

:func:`open_teacher_cache` reuses a cache whose key matches and whose file is whole (size and
checksum); any other, a changed key or a damaged or truncated file, is recomputed and says why.
Under ``torchrun`` every process computes its share of the rows into the one file, which must
therefore be on storage that every process sees. A pass that fails (an unreadable image) leaves
no cache behind.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import time
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import torch
from torch import nn

from orbify.common.safe_io import atomic_write, sha256_file
from orbify.tuning.distributed import World

CACHE_FORMAT = "orbify-teacher-cache"
CACHE_VERSION = 2
ROWS_FILE = "teacher.npy"
KEY_FILE = "key.json"

RowBatches = Callable[[], Iterator[tuple[torch.Tensor, torch.Tensor]]]
"""Yields this process's (sample indices, log-probability rows) batch after batch."""


@dataclass(frozen=True)
class CacheKey:
    """Everything the cached rows depend on."""

    teacher: str
    group: str
    views: str
    data: str
    samples: int
    row_shape: list[int]


def weights_digest(model: nn.Module) -> str:
    """SHA-256 of a model's state dict: every name, dtype, shape and value."""
    digest = hashlib.sha256()
    for name, tensor in model.state_dict().items():
        tensor = tensor.detach().cpu().contiguous()
        digest.update(f"{name}|{tensor.dtype}|{tuple(tensor.shape)}".encode())
        digest.update(tensor.reshape(-1).view(torch.uint8).numpy())
    return digest.hexdigest()


@dataclass
class TeacherCache:
    """An opened cache: :meth:`rows` reads the log-probabilities of some samples. ``reused`` says whether the rows
    came from an earlier run, ``seconds`` what computing them took (then or now), ``note`` why they were recomputed."""

    folder: Path
    rows_array: np.ndarray
    reused: bool
    seconds: float
    note: str | None = None

    def rows(self, indices: torch.Tensor) -> torch.Tensor:
        """float32 (len(indices), classes) log-probabilities."""
        picked = self.rows_array[np.asarray(indices, dtype=np.int64)]
        return torch.from_numpy(np.asarray(picked, dtype=np.float32))


def open_teacher_cache(folder: Path, key: CacheKey, batches: RowBatches, world: World) -> TeacherCache:
    """Reuse the cache in ``folder`` when ``key`` matches and the file is whole; else compute it with ``batches``."""
    problem = world.from_main(_problem(folder, key) if world.is_main else None)
    if problem is None:
        seconds = float(json.loads((folder / KEY_FILE).read_text()).get("seconds", 0.0))
        return TeacherCache(folder, _open_rows(folder, "r"), reused=True, seconds=seconds)
    started = time.perf_counter()
    existed = folder.exists()
    if world.is_main:
        _start(folder, key)
    world.from_main(None)                       # every process waits for the empty file
    try:
        rows = _open_rows(folder, "r+")
        for indices, values in batches():
            rows[np.asarray(indices, dtype=np.int64)] = values.to(torch.float16).numpy()
        rows.flush()
        del rows
    except BaseException:
        if world.is_main:                       # a failed pass leaves nothing behind
            (folder / ROWS_FILE).unlink(missing_ok=True)
            if not existed:
                shutil.rmtree(folder, ignore_errors=True)
        raise
    world.from_main(None)                       # every share is on disk
    seconds = time.perf_counter() - started
    if world.is_main:
        _finish(folder, key, seconds)
    world.from_main(None)
    note = None if problem == "absent" else f"the teacher cache {str(folder)!r} was recomputed: {problem}"
    return TeacherCache(folder, _open_rows(folder, "r"), reused=False, seconds=seconds, note=note)


def _problem(folder: Path, key: CacheKey) -> str | None:
    """Why the cache in ``folder`` cannot be used for ``key`` ("absent" when there is none), or None."""
    key_file, rows_file = folder / KEY_FILE, folder / ROWS_FILE
    if not key_file.exists():
        return "absent" if not rows_file.exists() else "it was never completed"
    try:
        stored = json.loads(key_file.read_text())
        expected = {"format": CACHE_FORMAT, "version": CACHE_VERSION, "key": asdict(key)}   # as JSON stores it
        changed = [name for name in expected if stored.get(name) != expected[name]]
        if changed:
            details = [field for field, value in asdict(key).items() if stored.get("key", {}).get(field) != value]
            return "its key differs (" + ", ".join(details or changed) + ")"
        shape = tuple(np.load(rows_file, mmap_mode="r").shape)
    except (OSError, ValueError, AttributeError) as error:
        return f"it cannot be read ({type(error).__name__}: {error})"
    if shape != (key.samples, *key.row_shape):
        return f"its array has shape {shape}, not {(key.samples, *key.row_shape)}"
    if rows_file.stat().st_size != stored.get("bytes") or sha256_file(rows_file) != stored.get("sha256"):
        return "its array is truncated or damaged (size or checksum differs)"
    return None


def _start(folder: Path, key: CacheKey) -> None:
    """Remove an old cache and create the (samples, *row shape) float16 array, filled with NaN."""
    if folder.exists() and not folder.is_dir():
        folder.unlink()
    folder.mkdir(parents=True, exist_ok=True)
    (folder / KEY_FILE).unlink(missing_ok=True)
    rows = np.lib.format.open_memmap(folder / ROWS_FILE, mode="w+", dtype=np.float16,
                                     shape=(key.samples, *key.row_shape))
    rows[:] = np.nan
    rows.flush()
    del rows


def _finish(folder: Path, key: CacheKey, seconds: float) -> None:
    """Write the key file last (with what computing the rows took): from now on the cache is complete."""
    rows_file = folder / ROWS_FILE
    text = json.dumps({"format": CACHE_FORMAT, "version": CACHE_VERSION, "key": asdict(key),
                       "bytes": rows_file.stat().st_size, "sha256": sha256_file(rows_file), "seconds": seconds},
                      indent=1)
    atomic_write(folder / KEY_FILE, lambda stream: stream.write(text.encode()), force=True)


def _open_rows(folder: Path, mode: str) -> np.ndarray:
    return np.load(folder / ROWS_FILE, mmap_mode=mode)


def remove_cache(folder: Path) -> None:
    """Delete a cache folder (a temporary one, at the end of a run)."""
    shutil.rmtree(folder, ignore_errors=True)
