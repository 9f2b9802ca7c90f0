"""Tuning on streamed data: exact mid-epoch resumption, the teacher cache on disk, augmentation with an online teacher,
disjoint shares per process, unreadable samples, and memory that does not grow with the number of images.

The teacher cache is checked against the group-averaged original computed directly (GroupAveraged, itself checked
against scipy in test_tune.py); the per-process shares against DistributedSampler's documented contract (each
process gets a disjoint 1/size of the padded permutation).
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import torch
from PIL import Image

import orbify.tuning.loop as loop
from orbify.errors import OptionError
from orbify.tuning.distributed import World
from orbify.tuning.loop import tune
from orbify.tuning.samples import BatchPlan
from orbify.tuning.teacher import GroupAveraged
from orbify.tuning.teacher_cache import KEY_FILE, ROWS_FILE
from test_tune import SIZE, tiny_data, tiny_original, tiny_student


class Interrupted(Exception):
    pass


def _tune(student, original, images, labels, **overrides):
    options = dict(epochs=2, lr=1e-2, batch_size=8, seed=5, progress=False, device="cpu", workers=0)
    options.update(overrides)
    return tune(student, original, "c4", images, labels, **options)


@pytest.mark.parametrize("settings", [
    dict(teacher="online", augment="light", workers=2),
    dict(teacher="cached", augment="none", workers=0),
], ids=["augmented-online-two-workers", "cached"])
def test_resuming_mid_epoch_ends_bitwise_equal_to_an_uninterrupted_run(tmp_path, monkeypatch, settings):
    original, (images, labels) = tiny_original(), tiny_data()
    common = dict(checkpoint_every=2, teacher_cache=tmp_path / "cache", **settings)
    uninterrupted = tiny_student(original)
    expected = _tune(uninterrupted, original, images, labels, checkpoint_path=tmp_path / "a.pt", **common)

    real_save = loop.save_checkpoint

    def stop_mid_second_epoch(path, student, training, world, result, step=0):
        real_save(path, student, training, world, result, step=step)
        if len(result.history) == 1 and step == 4:
            raise Interrupted

    monkeypatch.setattr(loop, "save_checkpoint", stop_mid_second_epoch)
    with pytest.raises(Interrupted):
        _tune(tiny_student(original), original, images, labels, checkpoint_path=tmp_path / "b.pt", **common)
    monkeypatch.setattr(loop, "save_checkpoint", real_save)
    resumed = tiny_student(original)
    result = _tune(resumed, original, images, labels, checkpoint_path=tmp_path / "b.pt", resume=True, **common)

    assert result.resumed_after == 1
    assert [r.train_loss for r in result.history] == [r.train_loss for r in expected.history]
    reference = uninterrupted.state_dict()
    for key, value in resumed.state_dict().items():
        assert torch.equal(value, reference[key]), key


def test_the_teacher_cache_holds_the_group_averaged_original_and_is_reused(tmp_path):
    original, (images, labels) = tiny_original(), tiny_data()
    cache = tmp_path / "cache"
    first = _tune(tiny_student(original), original, images, labels, epochs=1, teacher_cache=cache)
    assert not first.teacher_reused and first.teacher_seconds > 0
    stored = np.load(cache / ROWS_FILE)
    with torch.no_grad():
        direct = GroupAveraged(original, "c4", "probability")(images)
    assert stored.dtype == np.float16 and stored.shape == tuple(direct.shape)
    np.testing.assert_allclose(stored.astype(np.float32), direct.numpy(), atol=2e-3, rtol=2e-3)

    again = _tune(tiny_student(original), original, images, labels, epochs=1, teacher_cache=cache)
    assert again.teacher_reused and not again.notes
    assert again.teacher_seconds == pytest.approx(first.teacher_seconds)

    changed = _tune(tiny_student(original), original, images, labels, epochs=1, teacher_cache=cache,
                    view_combination="logit")
    assert not changed.teacher_reused and any("key differs (views)" in note for note in changed.notes)
    assert json.loads((cache / KEY_FILE).read_text())["key"]["views"] == "logit"


@pytest.mark.parametrize("damage", ["truncate", "flip"])
def test_a_damaged_cache_is_detected_and_never_used(tmp_path, damage):
    original, (images, labels) = tiny_original(), tiny_data()
    cache = tmp_path / "cache"
    _tune(tiny_student(original), original, images, labels, epochs=1, teacher_cache=cache)
    good = (cache / ROWS_FILE).read_bytes()
    broken = good[:len(good) // 2] if damage == "truncate" else good[:-7] + bytes([good[-7] ^ 0xFF]) + good[-6:]
    (cache / ROWS_FILE).write_bytes(broken)
    result = _tune(tiny_student(original), original, images, labels, epochs=1, teacher_cache=cache)
    assert not result.teacher_reused
    assert any("was recomputed" in note for note in result.notes), result.notes
    assert (cache / ROWS_FILE).read_bytes() == good


def test_augmentation_needs_the_online_teacher():
    original, (images, labels) = tiny_original(), tiny_data()
    with pytest.raises(OptionError, match="cached teacher cannot serve augmented images"):
        _tune(tiny_student(original), original, images, labels, augment="light", teacher="cached")
    assert _tune(tiny_student(original), original, images, labels, augment="light").teacher_online   # auto: online


def test_each_process_reads_a_disjoint_share_of_every_epoch():
    ids = torch.arange(100, 153)       # 53 samples: DistributedSampler pads to 54, 27 per process
    for epoch in (0, 1):
        shares = [torch.cat(BatchPlan(ids, World(rank, 2, torch.device("cpu")), 8, epoch, shuffle=True,
                                      seed=3).batches()) for rank in (0, 1)]
        assert [len(share) for share in shares] == [27, 27]
        assert set(shares[0].tolist()) | set(shares[1].tolist()) == set(ids.tolist())
        assert len(set(shares[0].tolist()) & set(shares[1].tolist())) <= 1     # the one padded repeat
    first = BatchPlan(ids, World(0, 2, torch.device("cpu")), 8, 0, shuffle=True, seed=3).batches()
    resumed = BatchPlan(ids, World(0, 2, torch.device("cpu")), 8, 0, shuffle=True, seed=3, skip=2)
    assert [[key[1] for key in batch] for batch in resumed] == [b.tolist() for b in first[2:]]


def _png_folder(folder, count, side=SIZE, damaged=()):
    folder.mkdir()
    generator = np.random.default_rng(0)
    for index in range(count):
        path = folder / f"tile{index:05d}.png"
        if index in damaged:
            path.write_bytes(b"not a picture")
        else:
            Image.fromarray(generator.integers(0, 256, (side, side), dtype=np.uint8)).save(path)
    return folder


def _cli(*args):
    from typer.testing import CliRunner

    from orbify.cli import app
    return CliRunner().invoke(app, [str(a) for a in args])


def test_an_unreadable_image_stops_the_run_naming_it_unless_skipped(tmp_path):
    data = _png_folder(tmp_path / "tiles", 24, damaged={7})
    torch.save(tiny_original().state_dict(), tmp_path / "original.pt")
    out = tmp_path / "tuned.orb"
    common = ["tune", "test_tune:tiny_original", "--weights", tmp_path / "original.pt", "--group", "c4",
              "--data", data, "--epochs", "1", "--batch-size", "8", "--workers", "0", "-o", out]
    before = sorted(p.name for p in tmp_path.rglob("*"))
    failed = _cli(*common)
    assert failed.exit_code == 2 and "Traceback" not in failed.output, failed.output
    assert "tile00007.png" in " ".join(failed.output.split()) and "--skip-unreadable" in failed.output
    assert sorted(p.name for p in tmp_path.rglob("*")) == before          # no output, no cache, no checkpoint

    skipped = _cli(*common, "--skip-unreadable")
    assert skipped.exit_code == 0, skipped.output
    assert (tmp_path / "tuned.orb.skipped.txt").read_text().split() == [str(data / "tile00007.png")]
    assert out.is_file() and "skipped 1 unreadable image" in skipped.output


def test_a_label_outside_the_classes_is_refused_before_anything_is_written(tmp_path):
    data = _png_folder(tmp_path / "tiles", 12)
    rows = ["path,label"] + [f"tiles/tile{i:05d}.png,{7 if i == 5 else i % 3}" for i in range(12)]
    (tmp_path / "list.csv").write_text("\n".join(rows) + "\n")
    torch.save(tiny_original().state_dict(), tmp_path / "original.pt")
    before = sorted(p.name for p in tmp_path.rglob("*"))
    result = _cli("tune", "test_tune:tiny_original", "--weights", tmp_path / "original.pt", "--data",
                  tmp_path / "list.csv", "--epochs", "1", "--workers", "0", "-o", tmp_path / "tuned.orb")
    assert result.exit_code == 2 and "Traceback" not in result.output, result.output
    flat = " ".join(result.output.split())
    assert "tile00005.png" in flat and "label 7" in flat and "3 classes" in flat
    assert sorted(p.name for p in tmp_path.rglob("*")) == before
    assert data.is_dir()


_MEMORY_PROBE = """
import resource, sys, torch
from pathlib import Path
from orbify.data.catalog import open_tiles
from orbify.data.tiles import Preparation
from orbify.tuning.loop import tune
sys.path.insert(0, {tests!r})
from test_tune import tiny_original, tiny_student
torch.set_num_threads(1)
original = tiny_original()
student, _ = __import__("orbify").convert(original, "c4", example_input=torch.zeros(1, 1, {side}, {side}))
tiles = open_tiles(Path(sys.argv[1]), preparation=Preparation(channels=1, size={side}))
tune(student, original, "c4", tiles, epochs=1, batch_size=32, progress=False, device="cpu", workers=0,
     val_limit=64, recalibrate=False)
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""


def test_memory_does_not_grow_with_the_number_of_images(tmp_path):
    side = 81                        # float32 tiles of 81×81: 26 kB each, 39 MB for 1,500 if held in memory
    script = tmp_path / "probe.py"
    from pathlib import Path
    script.write_text(textwrap.dedent(_MEMORY_PROBE.format(tests=str(Path(__file__).parent), side=side)))
    peaks = {}
    for count in (150, 1500):
        folder = _png_folder(tmp_path / f"tiles{count}", count, side=side)
        finished = subprocess.run([sys.executable, str(script), str(folder)], capture_output=True, text=True,
                                  timeout=300)
        assert finished.returncode == 0, finished.stderr[-2000:]
        peaks[count] = int(finished.stdout.split()[-1]) / 1024      # ru_maxrss is in kB on Linux
    held_in_memory = 1350 * side * side * 4 / 2**20
    assert peaks[1500] - peaks[150] < held_in_memory / 3, (peaks, held_in_memory)


def test_the_command_takes_a_manifest_with_a_validation_split(tmp_path):
    _png_folder(tmp_path / "tiles", 30)
    rows = ["path,label,split"] + [f"tiles/tile{i:05d}.png,{i % 3},{'val' if i % 5 == 0 else 'train'}"
                                   for i in range(30)]
    (tmp_path / "list.csv").write_text("\n".join(rows) + "\n")
    torch.save(tiny_original().state_dict(), tmp_path / "original.pt")
    out = tmp_path / "tuned.orb"
    result = _cli("tune", "test_tune:tiny_original", "--weights", tmp_path / "original.pt", "--data",
                  tmp_path / "list.csv", "--epochs", "1", "--batch-size", "8", "--workers", "0",
                  "--augment", "light", "--teacher", "online", "-o", out)
    assert result.exit_code == 0, result.output
    flat = " ".join(result.output.split())
    assert "24 training, 6 held-out images" in flat and "teacher: online" in flat
    assert out.is_file() and not (tmp_path / "tuned.orb.teacher").exists()
    refused = _cli("tune", "test_tune:tiny_original", "--weights", tmp_path / "original.pt", "--data",
                   tmp_path / "list.csv", "--augment", "light", "--teacher", "cached", "-o", tmp_path / "again.orb")
    assert refused.exit_code == 2 and "cached teacher cannot serve augmented images" in " ".join(refused.output.split())
