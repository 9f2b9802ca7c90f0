"""Atomic writes, refusal to overwrite, and safe checkpoint loading."""

from __future__ import annotations

import errno
import hashlib
import os
import zipfile
from pathlib import Path

import pytest
import torch
from torch import nn

from orbify.common.safe_io import atomic_write, load_torch_weights, save_torch, sha256_file
from orbify.errors import CheckpointError, OutputError


class WriterFailed(Exception):
    """Raised by a test writer to interrupt a write half-way."""


def _write_bytes(data: bytes):
    return lambda stream: stream.write(data)


def _listing(directory: Path) -> list[str]:
    return sorted(path.name for path in directory.iterdir())


def test_atomic_write_creates_the_file_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "out.bin"
    returned = atomic_write(target, _write_bytes(b"content"))
    assert returned == target
    assert target.read_bytes() == b"content"
    assert _listing(tmp_path) == ["out.bin"]


def test_existing_output_is_refused_without_force(tmp_path):
    target = tmp_path / "out.bin"
    target.write_bytes(b"previous")
    before = sha256_file(target)
    with pytest.raises(OutputError) as caught:
        atomic_write(target, _write_bytes(b"new"))
    assert str(target) in str(caught.value)
    assert "--force" in str(caught.value)
    assert sha256_file(target) == before
    assert _listing(tmp_path) == ["out.bin"]


def test_force_replaces_an_existing_output(tmp_path):
    target = tmp_path / "out.bin"
    target.write_bytes(b"previous")
    atomic_write(target, _write_bytes(b"new"), force=True)
    assert target.read_bytes() == b"new"
    assert _listing(tmp_path) == ["out.bin"]


def test_interrupted_write_keeps_the_previous_file_byte_identical(tmp_path):
    target = tmp_path / "out.bin"
    target.write_bytes(os.urandom(4096))
    before = sha256_file(target)

    def half_then_fail(stream):
        stream.write(b"partial content")
        raise WriterFailed

    with pytest.raises(WriterFailed):
        atomic_write(target, half_then_fail, force=True)
    assert sha256_file(target) == before
    assert _listing(tmp_path) == ["out.bin"]


def test_interrupted_write_of_a_new_file_leaves_nothing(tmp_path):
    def fail(stream):
        stream.write(b"partial")
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        atomic_write(tmp_path / "out.bin", fail)
    assert _listing(tmp_path) == []


def test_missing_directory_is_a_clear_error(tmp_path):
    target = tmp_path / "no-such-dir" / "out.bin"
    with pytest.raises(OutputError, match="does not exist"):
        atomic_write(target, _write_bytes(b"x"))
    assert not target.parent.exists()


def test_parent_that_is_a_file_is_a_clear_error(tmp_path):
    (tmp_path / "file").write_bytes(b"x")
    with pytest.raises(OutputError, match="is not a directory"):
        atomic_write(tmp_path / "file" / "out.bin", _write_bytes(b"x"))


def test_output_path_that_is_a_directory_is_refused_even_with_force(tmp_path):
    with pytest.raises(OutputError, match="is a directory"):
        atomic_write(tmp_path, _write_bytes(b"x"), force=True)


@pytest.mark.skipif(not Path("/sys/kernel").is_dir(), reason="needs Linux's sysfs at /sys")
def test_directory_the_system_refuses_new_files_in_is_a_clear_error():
    """sysfs (/sys) refuses to create regular files for every user, root included (EACCES, or EROFS where it is
    mounted read-only), unlike a directory without write permission, which root writes into regardless."""
    target = Path("/sys/orbify-test-output.bin")
    with pytest.raises(OutputError, match="Cannot create a file in the directory '/sys'") as caught:
        atomic_write(target, _write_bytes(b"x"))
    assert "choose an output path in a directory you can write to" in str(caught.value)
    assert not target.exists()


def test_a_name_too_long_for_the_file_system_is_a_clear_error(tmp_path):
    """A name within the 255-byte limit of Linux file systems whose temporary sibling (the name with a prefix and
    a suffix) exceeds it: the write fails with ENAMETOOLONG, for root as for anyone, and leaves nothing."""
    target = tmp_path / ("m" * 250 + ".pt")
    with pytest.raises(OutputError, match="Cannot create a file") as caught:
        atomic_write(target, _write_bytes(b"x"))
    assert os.strerror(errno.ENAMETOOLONG) in str(caught.value)
    assert _listing(tmp_path) == []


def test_directory_refusing_new_files_is_a_clear_error(tmp_path, monkeypatch):
    """The operating system's answer for an unwritable directory (EACCES), injected so that the
    check also runs as root, which the mode bits do not stop."""
    locked = tmp_path / "locked"
    locked.mkdir()
    real_open = os.open

    def refusing_open(path, flags, *args, **kwargs):
        if Path(path).parent == locked and flags & os.O_CREAT:
            raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(path))
        return real_open(path, flags, *args, **kwargs)

    monkeypatch.setattr(os, "open", refusing_open)
    with pytest.raises(OutputError) as caught:
        atomic_write(locked / "out.bin", _write_bytes(b"x"))
    monkeypatch.undo()
    assert str(locked) in str(caught.value)
    assert "Permission denied" in str(caught.value)
    assert _listing(locked) == []


def test_save_torch_round_trips_through_load_torch_weights(tmp_path):
    state = nn.Linear(4, 3).state_dict()
    path = save_torch(state, tmp_path / "weights.pt")
    loaded = load_torch_weights(path)
    assert loaded.keys() == state.keys()
    for key in state:
        assert torch.equal(loaded[key], state[key])


def test_save_torch_refuses_an_existing_output(tmp_path):
    target = tmp_path / "weights.pt"
    save_torch({"a": torch.zeros(2)}, target)
    before = sha256_file(target)
    with pytest.raises(OutputError, match="--force"):
        save_torch({"a": torch.ones(2)}, target)
    assert sha256_file(target) == before
    save_torch({"a": torch.ones(2)}, target, force=True)
    assert torch.equal(load_torch_weights(target)["a"], torch.ones(2))


@pytest.fixture
def weights_file(tmp_path) -> Path:
    path = tmp_path / "weights.pt"
    torch.save(nn.Conv2d(3, 8, 3).state_dict(), path)
    return path


def test_missing_weights_file(tmp_path):
    with pytest.raises(CheckpointError, match="does not exist") as caught:
        load_torch_weights(tmp_path / "absent.pt")
    assert "absent.pt" in str(caught.value)


def test_weights_path_that_is_a_directory(tmp_path):
    with pytest.raises(CheckpointError, match="is not a file"):
        load_torch_weights(tmp_path)


def test_empty_weights_file(tmp_path):
    path = tmp_path / "empty.pt"
    path.write_bytes(b"")
    with pytest.raises(CheckpointError, match="is empty") as caught:
        load_torch_weights(path, what="converted-model file")
    assert "converted-model file" in str(caught.value)
    assert str(path) in str(caught.value)


def test_truncated_weights_file(weights_file):
    data = weights_file.read_bytes()
    weights_file.write_bytes(data[: len(data) // 2])
    with pytest.raises(CheckpointError, match="truncated, damaged") as caught:
        load_torch_weights(weights_file)
    assert str(weights_file) in str(caught.value)
    assert "What to do" in str(caught.value)


def test_file_that_is_not_a_checkpoint(tmp_path):
    path = tmp_path / "notes.pt"
    path.write_text("these are not weights\n" * 20)
    with pytest.raises(CheckpointError, match="truncated, damaged"):
        load_torch_weights(path)


def test_damaged_pickle_inside_a_valid_archive(weights_file, tmp_path):
    """An archive whose zip structure is intact but whose pickled index is garbage."""
    damaged = tmp_path / "damaged.pt"
    with zipfile.ZipFile(weights_file) as original, zipfile.ZipFile(damaged, "w") as copy:
        for entry in original.infolist():
            content = original.read(entry)
            if entry.filename.endswith("/data.pkl"):
                content = b"\x80\x02" + bytes(range(200, 256)) + content[len(content) // 2:]
            copy.writestr(entry, content)
    with pytest.raises(CheckpointError, match="truncated, damaged"):
        load_torch_weights(damaged)


def test_pickled_module_is_refused_as_weights(tmp_path):
    path = tmp_path / "whole-model.pt"
    torch.save(nn.Linear(4, 3), path)
    before = sha256_file(path)
    with pytest.raises(CheckpointError) as caught:
        load_torch_weights(path)
    message = str(caught.value)
    assert "torch.nn.modules.linear.Linear" in message
    assert "--trust-pickle" in message
    assert "state_dict" in message
    assert sha256_file(path) == before


def test_sha256_file_matches_hashlib(tmp_path):
    # Reference: Python's hashlib over the whole byte string.
    data = os.urandom(3 << 20)
    path = tmp_path / "blob"
    path.write_bytes(data)
    assert sha256_file(path) == hashlib.sha256(data).hexdigest()
