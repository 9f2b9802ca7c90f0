"""Segmentation masks in the data layer: read raw, paired with their images, prepared and augmented with them.

The references: masks are written with Pillow (grey, 16-bit and palette PNGs) and numpy (.npz), and
every mask read is compared with the array that was written; nearest-neighbour fitting is checked
against numpy indexing of the source pixels; shards are written with webdataset's own TarWriter.
"""

import csv
import io
import os

import numpy as np
import pytest
import torch
from PIL import Image

from orbify.data import UNLABELLED, DatasetTiles, Preparation, TensorTiles, augmentation, open_tiles, read_images
from orbify.errors import DataError
from orbify.symmetry.groups import parse_group
from orbify.tuning.samples import SampleReader, collate

SIDE = 12
CLASSES = 3
IGNORE = 255


def _mask(seed: int, h: int = SIDE, w: int = SIDE) -> np.ndarray:
    """Class indices 0..2 with some pixels at the ignore value."""
    rng = np.random.default_rng(seed)
    mask = rng.integers(0, CLASSES, size=(h, w)).astype(np.uint8)
    mask[rng.random((h, w)) < 0.1] = IGNORE
    return mask


def _image(seed: int, h: int = SIDE, w: int = SIDE) -> np.ndarray:
    return np.random.default_rng(100 + seed).integers(0, 256, size=(h, w, 3), dtype=np.uint8)


def _expected(mask: np.ndarray) -> torch.Tensor:
    """What a prepared mask holds: the stored values, the ignore value as -1 (numpy reference)."""
    return torch.from_numpy(np.where(mask == IGNORE, UNLABELLED, mask.astype(np.int64)))


def _save(path, array):
    """Pillow writes the file: uint8 (H, W) as a grey PNG (mode L), (H, W, 3) as RGB."""
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(array).save(path)


@pytest.fixture
def pairs(tmp_path):
    """Three images and their masks as a segmentation folder (PNGs written by Pillow), a manifest of it and an
    .npz twin (numpy); returns (root, images, masks)."""
    images, masks = [_image(i) for i in range(3)], [_mask(i) for i in range(3)]
    for i, (image, mask) in enumerate(zip(images, masks)):
        _save(tmp_path / "seg" / "images" / f"tile{i}.png", image)
        _save(tmp_path / "seg" / "masks" / f"tile{i}.png", mask)
    with open(tmp_path / "seg.csv", "w", newline="") as stream:
        csv.writer(stream).writerows([["path", "mask"]] + [[f"seg/images/tile{i}.png", f"seg/masks/tile{i}.png"]
                                                            for i in range(3)])
    np.savez(tmp_path / "seg.npz", images=np.stack(images), masks=np.stack(masks))
    return tmp_path, images, masks


@pytest.mark.parametrize("form", ["seg", "seg.csv", "seg.npz"])
def test_every_dense_form_gives_the_written_images_and_masks(pairs, form):
    root, images, masks = pairs
    tiles = open_tiles(root / form, preparation=Preparation(channels=3))
    assert tiles.dense and tiles.labels is None
    for i in range(3):
        image, mask = tiles[i]
        torch.testing.assert_close(image, torch.from_numpy(images[i]).permute(2, 0, 1).float() / 255)
        assert mask.dtype == torch.int64 and torch.equal(mask, _expected(masks[i]))
    if form != "seg.csv":   # read_images reads the same folder and .npz forms
        whole = read_images(root / form)
        assert whole.masks.dtype == torch.int64 and torch.equal(whole.masks, torch.stack([_expected(m) for m in masks]))


def test_classification_forms_stay_as_they_were(pairs):
    root, images, _ = pairs
    tiles = open_tiles(root / "seg" / "images", preparation=Preparation())
    assert not tiles.dense and tiles[0][1] == UNLABELLED and read_images(root / "seg" / "images").masks is None
    assert Preparation().key() == "channels=None size=None mean=None std=None"   # cache keys of earlier runs hold


def test_images_and_masks_pair_by_stem_whatever_the_suffix(tmp_path):
    _save(tmp_path / "images" / "b.bmp", _image(0))
    _save(tmp_path / "images" / "a.png", _image(1))
    _save(tmp_path / "masks" / "a.png", _mask(1))
    _save(tmp_path / "masks" / "b.png", _mask(0))
    tiles = open_tiles(tmp_path, preparation=Preparation())
    assert [os.path.basename(tiles.name(i)) for i in range(2)] == ["a.png", "b.bmp"]
    assert [os.path.basename(tiles.mask_name(i)) for i in range(2)] == ["a.png", "b.png"]
    assert torch.equal(tiles[1][1], _expected(_mask(0)))


@pytest.mark.parametrize("alone", ["images/c.png", "masks/c.png"])
def test_an_unpaired_image_or_mask_is_refused_naming_it_before_any_image_is_read(tmp_path, alone):
    for name in ("a", "b"):
        _save(tmp_path / "images" / f"{name}.png", _image(0))
        _save(tmp_path / "masks" / f"{name}.png", _mask(0))
    (tmp_path / "images" / "a.png").write_bytes(b"not a png")   # decoding it would raise another error
    _save(tmp_path / alone, _mask(0))
    for read in (lambda: open_tiles(tmp_path, preparation=Preparation()), lambda: read_images(tmp_path)):
        with pytest.raises(DataError, match=f"{alone.split('/')[0][:-1]} .*{alone}.* has no .*unpaired") as error:
            read()
        assert error.value.where == str(tmp_path / alone)


def test_a_palette_mask_is_read_as_its_indices_and_16_bit_values_are_not_scaled(tmp_path):
    indices = np.array([[0, 1, 2], [2, 1, 0]], dtype=np.uint8)
    palette = Image.fromarray(indices, mode="P")
    palette.putpalette([0, 0, 0, 255, 0, 0, 0, 0, 255] + [0] * (3 * 253))   # index 1 red, 2 blue
    palette.save(tmp_path / "palette.png")
    deep = np.array([[0, 300], [1000, 65535]], dtype=np.uint16)
    Image.fromarray(deep).save(tmp_path / "deep.png")                          # Pillow writes a 16-bit grey PNG
    from orbify.data.masks import decode_mask
    assert torch.equal(decode_mask(tmp_path / "palette.png"), torch.from_numpy(indices.astype(np.int64)))
    assert torch.equal(decode_mask(tmp_path / "deep.png"), torch.from_numpy(deep.astype(np.int64)))


def test_a_colour_mask_is_refused_asking_for_class_indices(tmp_path):
    _save(tmp_path / "images" / "a.png", _image(0))
    _save(tmp_path / "masks" / "a.png", _image(1))                             # RGB
    tiles = open_tiles(tmp_path, preparation=Preparation())
    with pytest.raises(DataError, match=r"masks/a.png.* RGB image.*grey.*palette") as error:
        tiles[0]
    assert error.value.where == str(tmp_path / "masks" / "a.png")


def test_a_mask_of_another_size_than_its_image_is_refused_naming_it(tmp_path):
    _save(tmp_path / "images" / "a.png", _image(0))
    _save(tmp_path / "masks" / "a.png", _mask(0, SIDE, SIDE + 1))
    for read in (lambda: open_tiles(tmp_path, preparation=Preparation(size=8))[0], lambda: read_images(tmp_path)):
        with pytest.raises(DataError, match=r"masks/a.png' is 12×13 pixels, but its image is 12×12") as error:
            read()
        assert error.value.where == str(tmp_path / "masks" / "a.png")


def test_a_value_outside_the_classes_is_refused_naming_file_and_value_and_the_ignore_value_is_unlabelled(pairs):
    root, _, masks = pairs
    bad = np.where(masks[1] == IGNORE, 0, masks[1]).astype(np.uint8)   # no ignored pixel in this one
    bad[3, 4] = 7
    _save(root / "seg" / "masks" / "tile1.png", bad)
    tiles = open_tiles(root / "seg", preparation=Preparation()).with_preparation(classes=CLASSES)
    assert torch.equal(tiles[0][1], _expected(masks[0])) and int((tiles[0][1] == UNLABELLED).sum()) > 0
    with pytest.raises(DataError, match=r"tile1.png' holds the value 7, outside the 3 classes.*not the ignored "
                                        r"value 255") as error:
        tiles[1]
    assert error.value.where == str(root / "seg" / "masks" / "tile1.png")
    other = tiles.with_preparation(ignore=7)   # 7 now marks pixels to leave out; 255 is a value outside the classes
    with pytest.raises(DataError, match="holds the value 255"):
        other[0]
    assert int(other[1][1][3, 4]) == UNLABELLED


@pytest.mark.parametrize("extent", [(10, 15), (15, 10), (5, 7)])
def test_nearest_fitting_keeps_the_masks_values_at_the_source_pixels_numpy_picks(extent):
    h, w = extent
    size = 6
    mask = np.random.default_rng(h * w).integers(0, 200, size=(h, w))
    tiles = TensorTiles(torch.rand(1, 1, h, w), masks=torch.from_numpy(mask)[None],
                        preparation=Preparation(size=size, ignore=-5))
    image, fitted = tiles[0]
    # numpy reference: shorter side to size, each output pixel takes the source pixel under its centre, then the
    # centre crop, as the image is fitted (docs/design.md §17)
    scale = size / min(h, w)
    new_h, new_w = max(size, round(h * scale)), max(size, round(w * scale))
    rows = np.minimum(((np.arange(new_h) + 0.5) * h / new_h).astype(int), h - 1)
    cols = np.minimum(((np.arange(new_w) + 0.5) * w / new_w).astype(int), w - 1)
    top, left = (new_h - size) // 2, (new_w - size) // 2
    expected = mask[np.ix_(rows, cols)][top:top + size, left:left + size]
    assert image.shape[-2:] == fitted.shape == (size, size)
    assert np.array_equal(fitted.numpy(), expected) and set(fitted.unique().tolist()) <= set(mask.ravel().tolist())


def _encoded_tile(side: int = 32) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """A grey image whose pixel value encodes its mask class (blocks of 8×8 pixels), and the class levels."""
    grid = torch.from_numpy(np.random.default_rng(3).integers(0, 4, size=(side // 8, side // 8)))
    mask = grid.repeat_interleave(8, 0).repeat_interleave(8, 1)
    levels = torch.tensor([0.2, 0.4, 0.6, 0.8])
    return levels[mask][None], mask, levels


def test_augmentation_moves_the_mask_with_the_image():
    image, mask, levels = _encoded_tile()
    augment = augmentation("light", parse_group("c4"), image.shape[-1], 1)
    tiles = TensorTiles(image[None], masks=mask[None], preparation=Preparation(augmentation=augment))
    moved, filled = 0, 0
    for seed in range(6):
        torch.manual_seed(seed)
        out, out_mask = tiles[0]
        assert out_mask.dtype == torch.int64 and set(out_mask.unique().tolist()) <= {UNLABELLED, 0, 1, 2, 3}
        # away from edges (a 5×5 neighbourhood of one class) every pixel of a class has one value, and the classes
        # keep the order of their levels: brightness and contrast are increasing affine maps of the value
        padded = torch.nn.functional.pad(out_mask[None, None].float(), (2, 2, 2, 2), value=-2.0)
        patches = torch.nn.functional.unfold(padded, 5)[0].view(25, *out_mask.shape)
        interior = (patches == out_mask.float()).all(0) & (out_mask >= 0)
        means = []
        for cls in out_mask[interior].unique().tolist():
            values = out[0][interior & (out_mask == cls)]
            assert float(values.max() - values.min()) < 1e-4, f"seed {seed}: class {cls} spans image values"
            means.append(float(values.mean()))
        assert means == sorted(means) and len(means) >= 2
        moved += int(not torch.equal(out_mask, mask))
        filled += int((out_mask == UNLABELLED).any())
    assert moved == 6 and filled >= 1   # every draw moved the mask; a turn brought in unlabelled corners


def test_the_same_seed_gives_the_same_image_and_mask_and_another_seed_others():
    image, mask, _ = _encoded_tile()
    augment = augmentation("strong", parse_group("c4"), image.shape[-1], 1)
    tiles = TensorTiles(image[None], masks=mask[None], preparation=Preparation(augmentation=augment))
    reader = SampleReader(tiles, seed=5)
    first, again, other = reader[(0, 0)], reader[(0, 0)], reader[(1, 0)]
    assert torch.equal(first[1], again[1]) and torch.equal(first[2], again[2])
    assert not torch.equal(first[2], other[2])
    plain = TensorTiles(image[None], preparation=Preparation(augmentation=augment))
    torch.manual_seed(9)
    alone = plain[0][0]
    torch.manual_seed(9)
    assert torch.equal(tiles[0][0], alone)   # carrying a mask changes no draw of the image's augmentation


def test_tensor_masks_are_checked_and_read(pairs):
    images = torch.rand(2, 3, SIDE, SIDE)
    masks = torch.from_numpy(np.stack([_mask(0), _mask(1)]))
    tiles = TensorTiles(images, masks=masks)
    assert tiles.dense and torch.equal(tiles[1][1], _expected(_mask(1)))
    assert TensorTiles(images, masks=masks).fingerprint != TensorTiles(images, masks=masks.flip(0)).fingerprint
    for wrong in (masks.float(), masks[:1], masks[:, :-1]):
        with pytest.raises(DataError, match=r"masks .* do not fit 2 images of 12×12") as error:
            TensorTiles(images, masks=wrong)
        assert error.value.where == "masks"
    with pytest.raises(DataError, match="Both labels and masks"):
        TensorTiles(images, torch.tensor([0, 1]), masks=masks)


def test_a_dataset_of_image_and_mask_pairs_is_dense():
    items = [(torch.rand(1, SIDE, SIDE), torch.from_numpy(_mask(i))) for i in range(2)]
    tiles = DatasetTiles(items)
    assert tiles.dense and torch.equal(tiles[1][1], _expected(_mask(1)))
    assert not DatasetTiles([(torch.rand(1, 4, 4), 2)]).dense
    with pytest.raises(DataError, match="Item 1 of the data set has a label, but item 0 has a mask"):
        DatasetTiles(items[:1] + [(torch.rand(1, SIDE, SIDE), 1)])[1]


def test_the_manifest_mask_column_is_checked_at_open(pairs):
    root, _, _ = pairs
    (root / "missing.csv").write_text("path,mask\nseg/images/tile0.png,seg/masks/none.png\n")
    with pytest.raises(DataError, match="mask file .*none.png.* cannot be opened") as error:
        open_tiles(root / "missing.csv", preparation=Preparation())
    assert error.value.where == f"{root / 'missing.csv'}:2"
    (root / "both.csv").write_text("path,label,mask\nseg/images/tile0.png,1,seg/masks/tile0.png\n")
    with pytest.raises(DataError, match="both a 'label' and a 'mask' column"):
        open_tiles(root / "both.csv", preparation=Preparation())


def test_npz_masks_of_a_wrong_shape_or_type_are_refused(tmp_path):
    images = np.stack([_image(0), _image(1)])
    for wrong in (np.zeros((2, SIDE, SIDE), dtype=np.float32), np.zeros((1, SIDE, SIDE), dtype=np.uint8),
                  np.zeros((2, SIDE - 1, SIDE), dtype=np.uint8)):
        np.savez(tmp_path / "bad.npz", images=images, masks=wrong)
        for read in (lambda: open_tiles(tmp_path / "bad.npz", preparation=Preparation()),
                     lambda: read_images(tmp_path / "bad.npz")):
            with pytest.raises(DataError, match="masks .* do not fit 2 images of 12×12") as error:
                read()
            assert error.value.where == f"{tmp_path / 'bad.npz'}:masks"


def test_the_fingerprint_covers_the_masks_and_the_key_the_ignore_value(pairs):
    root, _, masks = pairs
    first = open_tiles(root / "seg", preparation=Preparation())
    mask_file = root / "seg" / "masks" / "tile2.png"
    info = mask_file.stat()
    os.utime(mask_file, ns=(info.st_atime_ns, info.st_mtime_ns + 10**9))
    assert open_tiles(root / "seg", preparation=Preparation()).fingerprint != first.fingerprint
    assert first.cache_key() != first.with_preparation(ignore=0).cache_key()


def test_shards_carry_masks_as_key_mask_png_members(pairs, tmp_path):
    webdataset = pytest.importorskip("webdataset")
    _, images, masks = pairs

    def png(array):
        stream = io.BytesIO()
        Image.fromarray(array).save(stream, format="PNG")
        return stream.getvalue()

    with webdataset.TarWriter(str(tmp_path / "seg.tar")) as sink:
        for i in range(3):
            sink.write({"__key__": f"s{i}", "png": png(images[i]), "mask.png": png(masks[i])})
    tiles = open_tiles(tmp_path / "seg.tar", preparation=Preparation())
    assert tiles.dense and tiles.mask_name(2) == f"{tmp_path / 'seg.tar'}:s2.mask.png"
    assert all(torch.equal(tiles[i][1], _expected(masks[i])) for i in range(3))


def test_collate_stacks_masks_and_fails_a_sample_whose_mask_differs():
    image = torch.zeros(1, 4, 4)
    dense = collate([(0, image, torch.zeros(4, 4, dtype=torch.long), None),
                     (1, image, torch.ones(4, 4, dtype=torch.long), None),
                     (2, image, torch.ones(3, 4, dtype=torch.long), None),
                     (3, None, UNLABELLED, ("unreadable", None))])
    assert dense.labels.shape == (2, 4, 4) and dense.labels.dtype == torch.int64 and dense.indices.tolist() == [0, 1]
    assert [failure[0] for failure in dense.failures] == [3, 2] and "mask has shape (3, 4)" in dense.failures[1][1]
    labelled = collate([(0, image, 2, None), (1, image, UNLABELLED, None)])
    assert labelled.labels.tolist() == [2, UNLABELLED] and labelled.labels.shape == (2,)
