"""Tuning on two processes launched by torchrun (gloo on the CPU): the replicas end identical.

Run as a script (``python -m torch.distributed.run --nproc_per_node=2 tests/test_tune_distributed.py OUT``)
this file is the worker: every process tunes the same tiny converted model on images streamed from
a memory-mapped .npy file, both computing their share of one teacher cache, and saves its own final
state dict, so the test can compare the replicas.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

from test_tune import tiny_data, tiny_original, tiny_student

GROUP = "c4"


def worker(out: Path) -> None:
    from orbify.data.catalog import open_tiles
    from orbify.data.tiles import Preparation
    from orbify.tuning.loop import tune

    original = tiny_original()
    student = tiny_student(original, GROUP)
    tiles = open_tiles(out / "images.npy", preparation=Preparation(channels=1))
    result = tune(student, original, GROUP, tiles, epochs=2, lr=1e-2, batch_size=8, seed=3, use_labels=False,
                  checkpoint_path=out / "checkpoint.pt", teacher_cache=out / "teacher", checkpoint_every=2,
                  progress=False, workers=1)
    rank = int(os.environ["RANK"])
    torch.save(student.state_dict(), out / f"rank{rank}.pt")
    (out / f"rank{rank}.json").write_text(json.dumps({"processes": result.processes,
                                                      "train_loss": [r.train_loss for r in result.history]}))


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@pytest.mark.slow
def test_two_processes_end_with_identical_weights(tmp_path):
    np.save(tmp_path / "images.npy", tiny_data()[0].numpy())
    command = [sys.executable, "-m", "torch.distributed.run", "--nproc_per_node=2", "--nnodes=1",
               "--master_addr=127.0.0.1", f"--master_port={_free_port()}", __file__, str(tmp_path)]
    finished = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert finished.returncode == 0, finished.stdout[-3000:] + finished.stderr[-3000:]

    replicas = [torch.load(tmp_path / f"rank{rank}.pt", weights_only=True) for rank in (0, 1)]
    assert replicas[0].keys() == replicas[1].keys()
    for key in replicas[0]:
        assert torch.equal(replicas[0][key], replicas[1][key]), key
    reports = [json.loads((tmp_path / f"rank{rank}.json").read_text()) for rank in (0, 1)]
    assert reports[0]["processes"] == reports[1]["processes"] == 2
    assert reports[0]["train_loss"] == reports[1]["train_loss"]   # the loss is averaged over both processes
    assert (tmp_path / "checkpoint.pt").is_file()
    assert json.loads((tmp_path / "teacher" / "key.json").read_text())["key"]["samples"] == 60
    assert not list(tmp_path.glob(".*.tmp"))

    # Gradients reached the tied bases under DDP: every stored base weight moved.
    start = tiny_student(tiny_original(), GROUP).state_dict()
    bases = [key for key in start if key.endswith("parametrizations.weight.original")]
    assert bases
    for key in bases:
        assert not torch.equal(start[key], replicas[0][key]), key


if __name__ == "__main__":
    worker(Path(sys.argv[1]))
