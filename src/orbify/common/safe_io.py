"""Reading and writing files safely.

Outputs are written atomically: into a temporary file beside the target, flushed to disk, then
renamed over the target in one step, so a reader sees either the old file or the complete new
one, never a half-written file. An existing output is replaced only when asked (``force``).

Checkpoints are read with ``torch.load(weights_only=True)``, which cannot run code from the
file; every way that can fail becomes a :class:`~orbify.errors.CheckpointError` that names the
file and says what to do.
"""

from __future__ import annotations

import hashlib
import os
import pickle
import secrets
from pathlib import Path
from typing import BinaryIO, Callable

import torch

from orbify.errors import CheckpointError, OutputError

PathLike = str | os.PathLike[str]


def atomic_write(path: PathLike, write_fn: Callable[[BinaryIO], object], *, force: bool = False) -> Path:
    """Write a file atomically and return its path.

    ``write_fn`` receives a binary file object open for writing and writes the whole content.
    The content goes to a temporary file in the target's directory, is flushed and fsynced,
    and then replaces the target with ``os.replace``.

    Raises :class:`OutputError` when the target exists and ``force`` is false, when it is a
    directory, or when its directory is missing or cannot be written. If ``write_fn`` raises,
    the temporary file is removed, a previous file at ``path`` is left untouched and the
    exception propagates.
    """
    target = Path(path)
    directory = target.parent
    _check_output_path(target, force=force)
    temporary = directory / f".{target.name}.{secrets.token_hex(8)}.tmp"
    try:
        descriptor = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    except OSError as error:
        raise OutputError(
            f"Cannot create a file in the directory {str(directory)!r}: {error.strerror or error}",
            where=str(target),
            fix="choose an output path in a directory you can write to",
        ) from error
    try:
        with os.fdopen(descriptor, "wb") as stream:
            write_fn(stream)
            stream.flush()
            os.fsync(stream.fileno())
        # Checked again: another process may have created the target while write_fn ran.
        _check_output_path(target, force=force)
        os.replace(temporary, target)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    _fsync_directory(directory)
    return target


def _check_output_path(target: Path, *, force: bool) -> None:
    """Raise :class:`OutputError` unless ``target`` may be written (see :func:`atomic_write`)."""
    if target.is_dir():
        raise OutputError(
            f"The output path {str(target)!r} is a directory",
            fix="give a file name inside it, for example " + repr(str(target / "model.pt")),
        )
    if target.exists() and not force:
        raise OutputError(
            f"The output file {str(target)!r} already exists",
            fix="choose another path, or pass --force to replace it",
        )
    directory = target.parent
    if not directory.is_dir():
        what = "is not a directory" if directory.exists() else "does not exist"
        raise OutputError(
            f"Cannot write {str(target)!r}: the directory {str(directory)!r} {what}",
            fix="create the directory first or choose another output path",
        )


def _fsync_directory(directory: Path) -> None:
    """Make a rename in ``directory`` durable where the platform allows it (POSIX)."""
    try:
        descriptor = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(descriptor)
    except OSError:
        pass
    finally:
        os.close(descriptor)


def save_torch(obj: object, path: PathLike, *, force: bool = False) -> Path:
    """``torch.save`` ``obj`` to ``path`` atomically (see :func:`atomic_write`) and return the path."""
    return atomic_write(path, lambda stream: torch.save(obj, stream), force=force)


def unsafe_globals(path: PathLike) -> list[str]:
    """Names of the Python objects (``module.Class``) that weights-only loading of ``path`` refuses.

    Found without running anything from the file. Empty when the file holds only tensors and
    plain containers, and also when it is not a readable ``torch.save`` archive.
    """
    try:
        return torch.serialization.get_unsafe_globals_in_checkpoint(path)
    except Exception:
        return []


def load_torch_weights(path: PathLike, *, what: str = "weights file") -> object:
    """Load a ``torch.save`` file with ``weights_only=True`` onto the CPU and return its content.

    ``what`` names the file's role in messages ("weights file", "model file", ...). Raises
    :class:`CheckpointError` naming the file when it is missing, empty, truncated or damaged,
    or holds Python objects that weights-only loading refuses.
    """
    source = Path(path)
    if not source.exists():
        raise CheckpointError(f"The {what} {str(source)!r} does not exist", fix="check the path")
    if not source.is_file():
        raise CheckpointError(f"The {what} {str(source)!r} is not a file", fix="give the path of a file")
    if source.stat().st_size == 0:
        raise CheckpointError(
            f"The {what} {str(source)!r} is empty",
            fix="the save that wrote it probably failed; save it again",
        )
    try:
        return torch.load(source, weights_only=True, map_location="cpu")
    except pickle.UnpicklingError as error:
        refused = unsafe_globals(source)
        if not refused:
            raise damaged_file_error(source, what, error) from error
        raise CheckpointError(
            f"The {what} {str(source)!r} holds pickled Python objects ({', '.join(refused[:5])}) "
            "that safe loading refuses, because unpickling them can run arbitrary code",
            fix="save only tensors, e.g. torch.save(model.state_dict(), path); or, if it is a whole "
            "model from a source you trust, give it as the model SOURCE with --trust-pickle",
        ) from error
    except Exception as error:
        raise damaged_file_error(source, what, error) from error


def damaged_file_error(source: Path, what: str, error: Exception) -> CheckpointError:
    """The :class:`CheckpointError` for a file that ``torch.load`` failed to read with ``error``."""
    text = str(error).strip()
    detail = text.splitlines()[0].split(". ")[0] if text else type(error).__name__
    return CheckpointError(
        f"The {what} {str(source)!r} is truncated, damaged or not a PyTorch file ({detail})",
        fix="save or copy the file again; it must be written by torch.save",
    )


def sha256_file(path: PathLike) -> str:
    """Hex SHA-256 digest of a file's bytes (used to show that inputs are never modified)."""
    digest = hashlib.sha256()
    with open(path, "rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


SAFETENSORS_SUFFIX = ".safetensors"


def load_weights_any(path: PathLike, *, what: str = "weights file") -> object:
    """A weights file's content: a ``.safetensors`` file (no pickle at all) as a dict of tensors, anything else
    through :func:`load_torch_weights`. Raises :class:`CheckpointError` naming the file for a missing, empty or
    damaged file, or a ``.safetensors`` file without the safetensors package installed."""
    source = Path(path)
    if source.suffix.lower() != SAFETENSORS_SUFFIX:
        return load_torch_weights(source, what=what)
    if not source.is_file() or source.stat().st_size == 0:
        state = "does not exist" if not source.exists() else "is empty" if source.is_file() else "is not a file"
        raise CheckpointError(f"The {what} {str(source)!r} {state}", fix="check the path")
    try:
        from safetensors.torch import load_file
    except ImportError as error:
        raise CheckpointError(f"Reading the {what} {str(source)!r} needs the safetensors package",
                              fix="pip install 'orbify[timm]' (or pip install safetensors)") from error
    try:
        return load_file(str(source), device="cpu")
    except Exception as error:   # safetensors reports a damaged header or truncated data with its own error types
        raise damaged_file_error(source, what, error) from error
