"""Opening data as tiles (orbify.data.open_tiles): every form gives the images and labels that an outside reader gives.

The references: orbify.read_images (itself checked against Pillow and numpy in test_data.py), numpy for
arrays, Python's csv module for manifests and webdataset's own reader and writer for tar shards.
"""

import csv
import io
import multiprocessing
import os
import pickle
import shutil
import sys

import numpy as np
import pytest
import torch
from PIL import Image
from torch.utils.data import DataLoader

from orbify.data import UNLABELLED, Preparation, open_tiles, read_images
from orbify.errors import DataError
from test_untrusted_files import png_header_only

webdataset = pytest.importorskip("webdataset")

CLASSES = ("cross", "dot", "ring")
PER_CLASS = 4
PLAIN = Preparation(channels=3)
FITTED = Preparation(channels=1, size=8, mean=(0.5,), std=(0.25,))


def _png(array: np.ndarray) -> bytes:
    stream = io.BytesIO()
    Image.fromarray(array).save(stream, format="PNG")
    return stream.getvalue()


@pytest.fixture(scope="module")
def pictures():
    """A dozen 12×12 RGB pictures, four per class, as (class, file name, uint8 array)."""
    rng = np.random.default_rng(0)
    return [(cls, f"{cls}-{i}.png", rng.integers(0, 256, size=(12, 12, 3), dtype=np.uint8))
            for cls in CLASSES for i in range(PER_CLASS)]


@pytest.fixture(scope="module")
def data(tmp_path_factory, pictures):
    """The pictures in every form: loose folder, class folders, manifests, .npy, .npz, two tar shards."""
    root = tmp_path_factory.mktemp("forms")
    for folder in ("loose", "classes"):
        for cls, name, array in pictures:
            target = root / folder / (cls if folder == "classes" else "") / name
            target.parent.mkdir(parents=True, exist_ok=True)
            Image.fromarray(array).save(target)
    with open(root / "named.csv", "w", newline="") as stream:
        writer = csv.writer(stream)
        writer.writerow(["path", "label", "split"])
        writer.writerows([f"classes/{cls}/{name}", cls, "val" if i % 5 == 0 else ("train" if i % 2 else "")]
                         for i, (cls, name, _) in enumerate(pictures))
    with open(root / "indexed.csv", "w", newline="") as stream:
        csv.writer(stream).writerows([["path", "label"]] + [[str(root / "classes" / cls / name), CLASSES.index(cls)]
                                                            for cls, name, _ in pictures])
    stack = np.stack([array for _, _, array in pictures])
    labels = np.array([CLASSES.index(cls) for cls, _, _ in pictures])
    np.save(root / "tiles.npy", stack)
    np.savez(root / "tiles.npz", images=stack, labels=labels, classes=np.array(CLASSES))
    for shard in range(2):
        with webdataset.TarWriter(str(root / f"tiles-{shard:04d}.tar")) as sink:
            for i in range(shard * 6, shard * 6 + 6):
                cls, name, array = pictures[i]
                sink.write({"__key__": f"sample{i:03d}", "png": _png(array), "cls": CLASSES.index(cls)})
    return root


def _all_items(tiles):
    images, labels = zip(*(tiles[i] for i in range(len(tiles))))
    return torch.stack(images), list(labels)


def _expected(data, preparation, source="classes"):
    """read_images on the class folders (or the given source) with the same preparation."""
    return read_images(data / source, size=preparation.size, channels=preparation.channels,
                       mean=preparation.mean, std=preparation.std)


FORMS = ["classes", "named.csv", "indexed.csv", "tiles.npz", "tiles-{0000..0001}.tar"]


@pytest.mark.parametrize("preparation", [PLAIN, FITTED], ids=["plain", "fitted"])
@pytest.mark.parametrize("form", FORMS)
def test_every_labelled_form_gives_the_images_and_labels_of_read_images(data, form, preparation):
    # arrays against read_images of the array: grey from RGB is Pillow's rounded luma for files, exact luma for arrays
    expected = _expected(data, preparation, "tiles.npz" if form == "tiles.npz" else "classes")
    tiles = open_tiles(data / form, preparation=preparation)
    images, labels = _all_items(tiles)
    torch.testing.assert_close(images, expected.images)
    assert labels == expected.labels.tolist() == tiles.labels.tolist()
    assert tiles.classes == (None if form == "indexed.csv" or form.endswith(".tar") else list(CLASSES))


@pytest.mark.parametrize("preparation", [PLAIN, FITTED], ids=["plain", "fitted"])
@pytest.mark.parametrize("form", ["loose", "tiles.npy"])
def test_unlabelled_forms_give_the_images_of_read_images(data, form, preparation):
    # the .npy reference: read_images on an .npz of the same array (test_data.py checks that against numpy)
    expected = _expected(data, preparation, "loose" if form == "loose" else "tiles.npz")
    tiles = open_tiles(data / form, preparation=preparation)
    images, labels = _all_items(tiles)
    torch.testing.assert_close(images, expected.images)
    assert labels == [UNLABELLED] * len(tiles) and tiles.labels is None


def test_npy_items_equal_numpy_and_the_array_stays_memory_mapped(data):
    tiles = open_tiles(data / "tiles.npy", preparation=Preparation())
    stack = np.load(data / "tiles.npy")
    assert isinstance(tiles.array, np.memmap)
    # numpy reference: channels first, 8-bit values over 255
    torch.testing.assert_close(tiles[5][0], torch.from_numpy(stack[5]).permute(2, 0, 1).float() / 255)
    assert tiles.name(5) == f"{data / 'tiles.npy'}[5]"


def test_shards_agree_with_webdatasets_own_reader(data):
    pattern = f"{data}/tiles-{{0000..0001}}.tar"
    tiles = open_tiles(pattern, preparation=Preparation())
    reference = list(webdataset.WebDataset(pattern, shardshuffle=False).decode("rgb8"))
    assert len(tiles) == len(reference) == 12
    for i, sample in enumerate(reference):
        image, label = tiles[i]
        torch.testing.assert_close(image, torch.tensor(sample["png"]).permute(2, 0, 1).float() / 255)
        assert label == sample["cls"]
        assert tiles.name(i) == f"{sample['__url__']}:{sample['__key__']}.png"


def test_manifest_split_marks_the_validation_rows_as_csv_reads_them(data):
    with open(data / "named.csv", newline="") as stream:
        rows = list(csv.DictReader(stream))   # Python's csv module: the reference
    tiles = open_tiles(data / "named.csv", preparation=PLAIN)
    assert tiles.validation.tolist() == [row["split"] == "val" for row in rows]
    assert any(tiles.validation.tolist()) and tiles.name(0) == os.path.join(data, rows[0]["path"])


def test_limit_takes_evenly_spaced_samples_in_every_form(data):
    expected = read_images(data / "classes", limit=5)
    for form in ("classes", "named.csv", "tiles.npz", "tiles-{0000..0001}.tar"):
        tiles = open_tiles(data / form, preparation=PLAIN, limit=5)
        images, labels = _all_items(tiles)
        torch.testing.assert_close(images, expected.images)
        assert labels == expected.labels.tolist(), form


# -- errors ---------------------------------------------------------------------------------------
MANIFEST_ERRORS = [
    ("path,label\nclasses/dot/dot-0.png,dot\n,dot\n", 3, "has no path"),
    ("path,label\nclasses/dot/dot-0.png,dot\nclasses/dot/dot-1.png,\n", 3, "empty label"),
    ("path,split\nclasses/dot/dot-0.png,train\nclasses/dot/dot-1.png,test\n", 3, "split 'test'"),
    ("file,label\nclasses/dot/dot-0.png,1\n", 1, "no 'path' column"),
    ("path,label\nclasses/dot/missing.png,1\n", 2, "cannot be opened"),
    ("path\nclasses/dot/dot-0.png,extra\n", 2, "2 cells"),
]


@pytest.mark.parametrize("text, line, what", MANIFEST_ERRORS)
def test_manifest_errors_name_the_file_and_the_line(data, text, line, what):
    manifest = data / "bad.csv"   # beside the pictures, which its rows name relative to it
    manifest.write_text(text)
    with pytest.raises(DataError, match=what) as caught:
        open_tiles(manifest, preparation=PLAIN)
    assert f"Where: {manifest}:{line}." in str(caught.value)


@pytest.mark.parametrize("text", ["", "path,label\n"])
def test_an_empty_manifest_is_refused(tmp_path, text):
    (tmp_path / "empty.csv").write_text(text)
    with pytest.raises(DataError, match="empty.csv"):
        open_tiles(tmp_path / "empty.csv", preparation=PLAIN)


def _write_shard(path, samples):
    with webdataset.TarWriter(str(path)) as sink:
        for sample in samples:
            sink.write(sample)
    return path


def test_shard_errors_name_the_shard(data, tmp_path):
    with pytest.raises(DataError, match="tiles-0002.tar.*does not exist"):
        open_tiles(f"{data}/tiles-{{0000..0002}}.tar", preparation=PLAIN)
    (tmp_path / "text.tar").write_text("not a tar file at all" * 40)
    with pytest.raises(DataError, match="text.tar.*not an uncompressed tar"):
        open_tiles(tmp_path / "text.tar", preparation=PLAIN)
    notes = _write_shard(tmp_path / "notes.tar", [{"__key__": "a", "txt": "hello"}])
    with pytest.raises(DataError, match="notes.tar.*no image"):
        open_tiles(notes, preparation=PLAIN)
    picture = _png(np.zeros((4, 4), dtype=np.uint8))
    partly = _write_shard(tmp_path / "partly.tar", [{"__key__": "a", "png": picture, "cls": 1},
                                                     {"__key__": "b", "png": picture}])
    with pytest.raises(DataError, match="1 of 2 samples have no 'cls'.*partly.tar:b.png"):
        open_tiles(partly, preparation=PLAIN)


def test_shards_without_webdataset_ask_for_the_extra(data, monkeypatch):
    for name in [name for name in sys.modules if name == "webdataset" or name.startswith("webdataset.")]:
        monkeypatch.setitem(sys.modules, name, None)   # every import of webdataset now fails
    with pytest.raises(DataError, match=r"orbify\[shards\]"):
        open_tiles(data / "tiles-0000.tar", preparation=PLAIN)


def test_unknown_and_missing_paths_list_the_accepted_forms(tmp_path):
    (tmp_path / "notes.txt").write_text("hello")
    for path, what in ((tmp_path / "notes.txt", "not a form"), (tmp_path / "gone.npy", "does not exist")):
        with pytest.raises(DataError, match=f"{what}.*manifest.*shards"):
            open_tiles(path, preparation=PLAIN)


def test_oversized_and_damaged_images_raise_when_read_naming_the_file(tmp_path):
    Image.fromarray(np.zeros((4, 4), dtype=np.uint8)).save(tmp_path / "a-good.png")
    png_header_only(tmp_path / "b-bomb.png", 40_000, 40_000)
    (tmp_path / "c-damaged.png").write_bytes((tmp_path / "a-good.png").read_bytes()[:40])
    tiles = open_tiles(tmp_path, preparation=PLAIN)   # opening lists and stats, it decodes nothing
    assert tiles[0][0].shape == (3, 4, 4)
    with pytest.raises(DataError, match="b-bomb.png.*far beyond any tile"):
        tiles[1]
    with pytest.raises(DataError, match="c-damaged.png.*cannot be read"):
        tiles[2]
    shard = _write_shard(tmp_path / "bomb.tar", [{"__key__": "bomb", "png": (tmp_path / "b-bomb.png").read_bytes()}])
    with pytest.raises(DataError, match="bomb.tar:bomb.png.*far beyond any tile"):
        open_tiles(shard, preparation=PLAIN)[0]


# -- fingerprints and workers ---------------------------------------------------------------------
@pytest.mark.parametrize("form", ["loose", "named.csv", "tiles.npy", "tiles-0000.tar"])
def test_the_fingerprint_stays_for_a_reopen_and_changes_with_a_file(data, tmp_path, form):
    source = shutil.copytree(data, tmp_path / "copy")   # a private copy this test may change
    first = open_tiles(source / form, preparation=PLAIN).fingerprint
    assert first is not None and open_tiles(source / form, preparation=PLAIN).fingerprint == first
    changed = {"loose": "loose/dot-1.png", "named.csv": "classes/dot/dot-1.png"}.get(form, form)
    info = os.stat(source / changed)
    (source / changed).write_bytes((source / changed).read_bytes())   # same bytes: only the time changes
    os.utime(source / changed, ns=(info.st_atime_ns, info.st_mtime_ns + 1_000_000_000))
    assert open_tiles(source / form, preparation=PLAIN).fingerprint != first


@pytest.mark.parametrize("form", ["classes", "tiles-{0000..0001}.tar"])
def test_a_dataloader_with_two_workers_gives_what_indexing_gives(data, form):
    tiles = open_tiles(data / form, preparation=FITTED)
    direct = _all_items(tiles)   # opens the shards in this process before the workers fork
    loaded = list(DataLoader(tiles, batch_size=5, num_workers=2))
    torch.testing.assert_close(torch.cat([images for images, _ in loaded]), direct[0])
    assert torch.cat([labels for _, labels in loaded]).tolist() == direct[1]


def test_a_forked_process_reads_shards_through_its_own_handles(data):
    tiles = open_tiles(data / "tiles-0000.tar", preparation=PLAIN)
    tiles[0]
    handle = tiles._files._open[0]   # the parent's handle on the shard, left after reading sample 0
    position = handle.tell()
    child = multiprocessing.get_context("fork").Process(target=tiles.__getitem__, args=(5,))
    child.start()
    child.join()
    # an inherited handle shares its file position with the parent: the child's seek would have moved it
    assert child.exitcode == 0 and handle.tell() == position


@pytest.mark.parametrize("form", ["tiles.npy", "tiles-0000.tar"])
def test_tiles_survive_pickling_for_spawned_workers(data, form):
    tiles = open_tiles(data / form, preparation=FITTED)
    tiles[0]
    pickled = pickle.dumps(tiles)   # fails on an open shard handle
    assert np.load(data / "tiles.npy")[0].tobytes() not in pickled   # the memory-mapped pixels stay on disk
    twin = pickle.loads(pickled)
    torch.testing.assert_close(twin[3][0], tiles[3][0])
