"""Augmentation of training tiles (orbify.data.augmentation): repeatable under a seed, the right shape, no group motion."""

import pytest
import torch

from orbify.data import AUGMENT_LEVELS, Preparation, TensorTiles, augmentation
from orbify.errors import OptionError
from orbify.symmetry.groups import parse_group

v2 = pytest.importorskip("torchvision.transforms.v2")   # the transforms come from torchvision, an optional package
SIZE = 12
FLIPS = (v2.RandomHorizontalFlip, v2.RandomVerticalFlip)


def _image(channels: int) -> torch.Tensor:
    return torch.rand(channels, SIZE, SIZE, generator=torch.Generator().manual_seed(channels))


@pytest.mark.parametrize("level", ["light", "strong"])
@pytest.mark.parametrize("channels", [1, 3])
def test_an_augmentation_keeps_the_shape_and_the_range_and_changes_the_image(level, channels):
    augment = augmentation(level, parse_group("c4"), SIZE, channels)
    image = _image(channels)
    torch.manual_seed(0)
    out = augment(image)
    assert out.shape == (channels, SIZE, SIZE) and out.dtype == torch.float32
    assert 0.0 <= float(out.min()) and float(out.max()) <= 1.0
    assert not torch.allclose(out, image, atol=1e-3)


@pytest.mark.parametrize("level", ["light", "strong"])
def test_the_same_seed_gives_the_same_augmentation_and_another_seed_another(level):
    augment = augmentation(level, parse_group("d4"), SIZE, 3)
    image = _image(3)
    outputs = []
    for seed in (7, 7, 8):
        torch.manual_seed(seed)
        outputs.append(augment(image))
    torch.testing.assert_close(outputs[0], outputs[1], rtol=0, atol=0)
    assert not torch.allclose(outputs[0], outputs[2])


def test_tiles_seeded_per_sample_give_repeatable_augmented_items():
    images = torch.rand(3, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(1))
    augment = augmentation("strong", parse_group("c4"), SIZE, 3)
    tiles = TensorTiles(images, preparation=Preparation(augmentation=augment, mean=(0.5,) * 3, std=(0.5,) * 3))
    torch.manual_seed(3)
    first = tiles[1][0]
    torch.manual_seed(3)
    torch.testing.assert_close(tiles[1][0], first, rtol=0, atol=0)


def _transform_types(augment) -> list[type]:
    return [type(step) for step in augment.transforms]


@pytest.mark.parametrize("group", ["d1", "d4", "d8"])
def test_a_dihedral_group_gets_no_flip(group):
    for level in ("light", "strong"):
        assert not set(_transform_types(augmentation(level, parse_group(group), SIZE, 3))) & set(FLIPS)


@pytest.mark.parametrize("group", ["c1", "c4", "c8"])
def test_a_cyclic_group_gets_the_left_right_flip_it_lacks(group):
    assert v2.RandomHorizontalFlip in _transform_types(augmentation("light", parse_group(group), SIZE, 3))


def test_colour_changes_only_for_colour_images():
    def hue_jitters(channels):
        return [step for step in augmentation("strong", parse_group("c4"), SIZE, channels).transforms
                if isinstance(step, v2.ColorJitter) and step.hue is not None]
    assert len(hue_jitters(3)) == 1 and hue_jitters(1) == []


def test_none_is_no_augmentation_and_an_unknown_level_is_refused():
    assert AUGMENT_LEVELS == ("none", "light", "strong")
    assert augmentation("none", parse_group("c4"), SIZE, 3) is None
    with pytest.raises(OptionError, match="medium.*none, light, strong"):
        augmentation("medium", parse_group("c4"), SIZE, 3)
