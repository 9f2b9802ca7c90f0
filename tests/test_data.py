"""Reading image folders and .npz files (the inputs of check, tune and the command line)."""

import numpy as np
import pytest
import torch
from PIL import Image

from orbify.data import read_images
from orbify.errors import DataError


def _save_png(path, array):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(array).save(path)


def _rgb(seed, h=12, w=12):
    return np.random.default_rng(seed).integers(0, 256, size=(h, w, 3), dtype=np.uint8)


def test_class_folders_give_labels_and_class_names_in_sorted_order(tmp_path):
    pictures = {("ring", "b.png"): _rgb(0), ("ring", "a.png"): _rgb(1), ("cross", "z.png"): _rgb(2)}
    for (cls, name), array in pictures.items():
        _save_png(tmp_path / cls / name, array)
    data = read_images(tmp_path)
    assert data.classes == ["cross", "ring"]
    assert data.labels.tolist() == [0, 1, 1]
    assert data.images.shape == (3, 3, 12, 12) and data.images.dtype == torch.float32
    # pixel values: PNG is lossless, so the read image is the saved array / 255 (channels first)
    expected = torch.from_numpy(pictures[("ring", "a.png")]).permute(2, 0, 1).float() / 255
    torch.testing.assert_close(data.images[1], expected)


def test_loose_images_have_no_labels_and_grey_is_repeated_to_rgb(tmp_path):
    grey = np.arange(64, dtype=np.uint8).reshape(8, 8)
    _save_png(tmp_path / "one.png", grey)
    _save_png(tmp_path / "two.png", grey[::-1].copy())
    data = read_images(tmp_path, channels=3)
    assert data.labels is None and data.classes is None
    assert data.images.shape == (2, 3, 8, 8)
    torch.testing.assert_close(data.images[0, 2], torch.from_numpy(grey).float() / 255)


def test_resize_scales_the_shorter_side_and_crops_the_centre(tmp_path):
    # A 10x20 image with a left (0) and right (255) half: after scaling the shorter side to 5 (5x10)
    # and cropping the centre 5x5 (columns 2-6 of 10), columns 0-2 come from the dark half and 3-4 from
    # the bright one; antialiasing blurs the edge by about one pixel.
    array = np.zeros((10, 20), dtype=np.uint8)
    array[:, 10:] = 255
    _save_png(tmp_path / "half.png", array)
    image = read_images(tmp_path, size=5, channels=1).images[0, 0]
    assert image.shape == (5, 5)
    assert image[:, :2].max() < 0.05 and image[:, 4].min() > 0.95
    assert float(image.mean()) == pytest.approx(0.4, abs=0.05)


def test_npz_layouts_scaling_limit_and_normalisation(tmp_path):
    rng = np.random.default_rng(0)
    nhwc = rng.integers(0, 256, size=(6, 9, 9, 3), dtype=np.uint8)
    np.savez(tmp_path / "nhwc.npz", images=nhwc, labels=np.arange(6))
    np.savez(tmp_path / "nchw.npz", images=nhwc.transpose(0, 3, 1, 2).astype(np.float32) / 255)
    a = read_images(tmp_path / "nhwc.npz")
    b = read_images(tmp_path / "nchw.npz")
    torch.testing.assert_close(a.images, b.images)
    assert a.labels.tolist() == list(range(6)) and b.labels is None
    limited = read_images(tmp_path / "nhwc.npz", limit=3)
    assert limited.labels.tolist() == [0, 2, 5]          # evenly spaced over 0..5, ends included
    normalised = read_images(tmp_path / "nhwc.npz", mean=[0.5] * 3, std=[0.25] * 3)
    torch.testing.assert_close(normalised.images, (a.images - 0.5) / 0.25)


def test_npz_grey_stack_to_one_channel_and_rgb_to_grey_by_luma(tmp_path):
    rgb = np.zeros((1, 5, 5, 3), dtype=np.uint8)
    rgb[..., 0] = 255
    np.savez(tmp_path / "red.npz", images=rgb)
    # ITU-R BT.601 luma of pure red is 0.299 (common practice; Pillow's "L" conversion uses it)
    grey = read_images(tmp_path / "red.npz", channels=1).images
    assert grey.shape == (1, 1, 5, 5)
    torch.testing.assert_close(grey, torch.full((1, 1, 5, 5), 0.299))
    np.savez(tmp_path / "stack.npz", images=np.ones((2, 5, 7), dtype=np.float32))
    assert read_images(tmp_path / "stack.npz", channels=1).images.shape == (2, 1, 5, 7)


def test_unreadable_inputs_raise_data_errors_naming_the_file(tmp_path):
    broken = tmp_path / "imgs" / "broken.png"
    broken.parent.mkdir()
    broken.write_bytes(b"not an image at all")
    with pytest.raises(DataError, match="broken.png"):
        read_images(broken.parent)
    with pytest.raises(DataError, match="does not exist"):
        read_images(tmp_path / "missing")
    (tmp_path / "empty").mkdir()
    with pytest.raises(DataError, match="holds no images"):
        read_images(tmp_path / "empty")
    np.savez(tmp_path / "nokey.npz", pictures=np.zeros((1, 4, 4)))
    with pytest.raises(DataError, match="no 'images' array"):
        read_images(tmp_path / "nokey.npz")
    np.savez(tmp_path / "badlabels.npz", images=np.zeros((3, 4, 4)), labels=np.zeros(2, dtype=int))
    with pytest.raises(DataError, match="labels"):
        read_images(tmp_path / "badlabels.npz")
    (tmp_path / "garbage.npz").write_bytes(b"PK\x03\x04 truncated")
    with pytest.raises(DataError, match="garbage.npz"):
        read_images(tmp_path / "garbage.npz")


def test_images_of_different_sizes_need_a_size(tmp_path):
    _save_png(tmp_path / "a.png", _rgb(0, 8, 8))
    _save_png(tmp_path / "b.png", _rgb(1, 10, 12))
    with pytest.raises(DataError, match="differ in size"):
        read_images(tmp_path)
    assert read_images(tmp_path, size=6).images.shape == (2, 3, 6, 6)


def test_mixed_loose_images_and_class_folders_are_refused(tmp_path):
    _save_png(tmp_path / "loose.png", _rgb(0))
    _save_png(tmp_path / "cls" / "x.png", _rgb(1))
    with pytest.raises(DataError, match="mixes loose images"):
        read_images(tmp_path)
