"""Channel orders that keep orbits whole (orbify.graph.channel_order): channel shuffles rewritten to shuffle orbits,
split/chunk and channel slices at orbit boundaries, and the refusal of a slice that cuts an orbit."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from orbify import convert, parse_group
from orbify.layers.shuffles import shuffle_blocks
from orbify.transfer.channels import ChannelMap

SIZE = 9


def _shuffle(x: torch.Tensor, groups: int = 2) -> torch.Tensor:
    """The channel shuffle as ShuffleNet writes it (view, transpose, contiguous, view)."""
    batch, channels, height, width = x.size()
    x = x.view(batch, groups, channels // groups, height, width)
    return torch.transpose(x, 1, 2).contiguous().view(batch, -1, height, width)


class ShuffleUnits(nn.Module):
    """Two shuffle units: concatenate two branches, shuffle, split in halves, convolve one half, and again."""

    def __init__(self, width: int = 16):
        super().__init__()
        self.width = width
        self.left, self.right = nn.Conv2d(1, width, 3, padding=1), nn.Conv2d(1, width, 3, padding=1)
        self.branch = nn.Sequential(nn.Conv2d(width, width, 1), nn.BatchNorm2d(width), nn.ReLU(),
                                    nn.Conv2d(width, width, 3, padding=1, groups=width))
        self.head = nn.Sequential(nn.Conv2d(2 * width, 5, 1), nn.AdaptiveAvgPool2d(1), nn.Flatten())

    def forward(self, x):
        y = _shuffle(torch.cat([self.left(x), self.right(x)], 1))
        kept, changed = y.chunk(2, dim=1)
        y = _shuffle(torch.cat([kept, self.branch(changed)], 1))
        first, second = y.split(self.width, dim=1)
        return self.head(torch.cat([second, first], 1))


class Sliced(nn.Module):
    def __init__(self, stop: int):
        super().__init__()
        self.stop = stop
        self.conv = nn.Conv2d(1, 16, 3, padding=1)
        self.head = nn.Sequential(nn.Conv2d(stop, 3, 1), nn.AdaptiveAvgPool2d(1), nn.Flatten())

    def forward(self, x):
        return self.head(self.conv(x)[:, :self.stop])


def _invariance_error(model: nn.Module, group: str, x: torch.Tensor) -> float:
    """max over g of ‖f(g·x) − f(x)‖ / ‖f(x)‖ in float64, g·x by torch.rot90 / torch.flip (Group.act_grid)."""
    g, model, x = parse_group(group), model.double(), x.double()
    with torch.no_grad():
        y = model(x)
        return max(float((model(g.act_grid(e, x)) - y).norm() / y.norm()) for e in range(g.order))


def _with_statistics(model: nn.Module) -> nn.Module:
    torch.manual_seed(0)
    with torch.no_grad():
        model.train()(torch.randn(16, 1, SIZE, SIZE))
    return model.eval()


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_shuffles_and_splits_convert_exactly(group):
    torch.manual_seed(0)
    original = _with_statistics(ShuffleUnits())
    converted, plan = convert(original, group, example_input=torch.zeros(1, 1, SIZE, SIZE))
    assert any("2 channel shuffles rewritten" in note for note in plan.notes)
    assert _invariance_error(converted, group, torch.randn(3, 1, SIZE, SIZE)) < 1e-12
    assert _invariance_error(original, group, torch.randn(3, 1, SIZE, SIZE)) > 1e-3   # the check can fail


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_shuffles_of_halves_that_are_not_whole_orbits_of_the_original_convert_exactly(group):
    """Branches of 6 channels (not a multiple of |G|) round to whole orbits; the shuffle then moves whole orbits of the
    converted value (as torchvision's shufflenet_v2_x1_0, 116 channels in halves of 58, needs)."""
    torch.manual_seed(0)
    original = _with_statistics(ShuffleUnits(width=6))
    converted, plan = convert(original, group, example_input=torch.zeros(1, 1, SIZE, SIZE))
    assert any("2 channel shuffles rewritten" in note for note in plan.notes)
    assert _invariance_error(converted, group, torch.randn(3, 1, SIZE, SIZE)) < 1e-12


@pytest.mark.parametrize("groups, width", [(2, 1), (3, 1), (2, 4), (4, 2)])
def test_the_block_shuffle_is_shufflenets_shuffle_of_blocks(groups, width):
    """Against numpy: ShuffleNet's shuffle of C channels in g groups is reshape (g, C/g), transpose, flatten; the
    block shuffle applies it to blocks of ``width`` channels, each block kept in order."""
    channels = 24
    x = torch.randn(2, channels, 3, 3)
    block_order = np.arange(channels // width).reshape(groups, -1).T.reshape(-1)
    order = (block_order[:, None] * width + np.arange(width)).reshape(-1)
    np.testing.assert_array_equal(shuffle_blocks(x, groups, width).numpy(), x.numpy()[:, order])


def test_under_the_trivial_group_the_rewritten_shuffles_compute_the_original():
    torch.manual_seed(0)
    original = _with_statistics(ShuffleUnits())
    converted, _ = convert(original, "c1", example_input=torch.zeros(1, 1, SIZE, SIZE))
    x = torch.randn(3, 1, SIZE, SIZE)
    with torch.no_grad():
        torch.testing.assert_close(converted(x), original(x), rtol=1e-6, atol=1e-7)


def test_weights_are_carried_through_the_shuffles_channel_maps():
    """Under c2 the converted model stays nearer the original when each converted channel reads the original weights
    of the channel it stands for. Measured: relative output distance 0.66; with the shuffle's channel maps left
    unreordered (the converted channels then read other channels' weights) 1.01."""
    torch.manual_seed(0)
    original = _with_statistics(ShuffleUnits())
    converted, _ = convert(original, "c2", example_input=torch.zeros(1, 1, SIZE, SIZE))
    x = torch.randn(64, 1, SIZE, SIZE)
    with torch.no_grad():
        before, after = original(x), converted(x)
    assert float((after - before).norm() / before.norm()) < 0.8


def test_a_reordered_map_follows_both_orders():
    """numpy indexing is the reference: converted channel p holds original channel source[p] before and after."""
    rng = np.random.default_rng(0)
    source = torch.from_numpy(rng.permutation(12))
    channel_map = ChannelMap.from_source(source, 12)
    original_order = torch.from_numpy(rng.permutation(12))
    converted_order = torch.from_numpy(rng.permutation(12))
    values = rng.normal(size=(2, 12))                          # the original's value, channel by channel
    held = values[:, source.numpy()]                           # the converted value
    moved = channel_map.reordered(converted_order, original_order)
    np.testing.assert_array_equal(held[:, converted_order.numpy()],
                                  values[:, original_order.numpy()][:, moved.source.numpy()])
    weight = rng.normal(size=(3, 12))                          # a layer reading the original's reordered value
    np.testing.assert_allclose(weight @ values[:, original_order.numpy()].T,
                               (weight @ moved.dense_inflow().numpy()) @ held[:, converted_order.numpy()].T)


def test_a_part_keeps_the_channels_of_the_part_and_feeds_nothing_from_outside():
    source = torch.tensor([0, 5, 2, 3, 4, 1, 6, 7])
    part = ChannelMap.from_source(source, 8).part(0, 4)
    assert part.source.tolist() == [0, -1, 2, 3] and part.unfed == 1
    assert part.dense_inflow().shape == (4, 4) and float(part.dense_inflow()[:, 1].abs().sum()) == 0


@pytest.mark.parametrize("stop", [8, 12])
def test_a_channel_slice_at_orbit_boundaries_converts_exactly(stop):
    original = Sliced(stop).eval()
    converted, _ = convert(original, "c4", example_input=torch.zeros(1, 1, SIZE, SIZE))
    assert _invariance_error(converted, "c4", torch.randn(2, 1, SIZE, SIZE)) < 1e-12


def test_timm_ghostnet_slices_its_ghost_channels_at_orbit_boundaries():
    timm = pytest.importorskip("timm")      # the test extra installs it
    model = timm.create_model("ghostnet_100", pretrained=False, num_classes=5).eval()   # timm's definition
    converted, _ = convert(model, "c4", example_input=torch.zeros(1, 3, 33, 33))
    assert _invariance_error(converted, "c4", torch.randn(2, 3, 33, 33)) < 1e-9
