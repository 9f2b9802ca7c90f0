"""Channel cuts that are not whole orbits (orbify.graph.orbit_cuts, orbify.graph.channel_order,
orbify.conversion.output_widths, orbify.graph.invariant_parts): the converted value is cut at an orbit boundary
near the original's cut, the widths around agree, and the conversion stays exact.

Each small model below reproduces a pattern of a timm backbone in plain torch code (the timm module named beside it is
the original); a group element is applied to the input by torch.rot90 / torch.flip (``Group.act_grid``).
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
import torch
from torch import nn

from orbify import convert, parse_group
from orbify.errors import UnsupportedOpError
from orbify.graph.orbit_cuts import nearest_boundary, orbit_boundaries
from orbify.transfer.channels import ChannelMap

SIZE = 9


def _invariance_error(model: nn.Module, group: str, x: torch.Tensor) -> float:
    """max over g of ‖f(g·x) − f(x)‖ / ‖f(x)‖ in float64, g·x by torch.rot90 / torch.flip (Group.act_grid)."""
    g, model, x = parse_group(group), model.double(), x.double()
    with torch.no_grad():
        y = model(x)
        return max(float((model(g.act_grid(e, x)) - y).norm() / y.norm()) for e in range(g.order))


def _converted(model: nn.Module, group: str, channels: int = 3):
    torch.manual_seed(0)
    model = model.eval()
    converted, plan = convert(model, group, example_input=torch.zeros(1, channels, SIZE, SIZE))
    x = torch.randn(2, channels, SIZE, SIZE)
    assert _invariance_error(model, group, x) > 1e-3   # the check can fail: the original is not invariant
    return converted, plan, _invariance_error(converted, group, x)


def _head(channels: int) -> nn.Module:
    return nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(channels, 5))


# -- where the cuts go ------------------------------------------------------------------------------------------------
def test_the_nearest_boundary_rounds_halves_down():
    """Reference: exact rational arithmetic (Python's fractions, math.ceil): ⌈x − ½⌉, x = position·orbits/total."""
    for total in range(1, 41):
        for orbits in range(1, 13):
            for position in range(total + 1):
                exact = math.ceil(Fraction(position * orbits, total) - Fraction(1, 2))
                assert nearest_boundary(position, total, orbits) == exact


def test_boundaries_give_every_non_empty_part_an_orbit_and_keep_empty_parts_empty():
    assert orbit_boundaries([0, 10, 40], 10) == [0, 2, 10]                  # 2.5 orbits: halves go down
    assert orbit_boundaries([0, 1, 1, 40], 10) == [0, 1, 1, 10]             # 0.25 orbits, but a channel is held
    assert orbit_boundaries([0, 39, 40], 10) == [0, 9, 10]                  # 9.75 orbits, but the last part is held
    assert orbit_boundaries([0, 14, 28], 5, widths=[None, 2]) == [0, 3, 5]   # a width asked for the second part
    assert orbit_boundaries([0, 14, 28], 5, fixed={14: 2}) == [0, 2, 5]     # a cut made before is kept
    assert orbit_boundaries([0, 1, 2, 3, 4], 3) is None                     # 4 parts, 3 orbits
    # a slice x[:, 0:8] of all 8 channels asked for one of the two orbits (to match a value it is added to)
    assert orbit_boundaries([0, 0, 8, 8], 2, needed=[False, True, False], widths=[None, 1, None]) == [0, 0, 1, 2]


def test_a_part_feeds_the_original_channels_it_holds_and_nothing_else():
    """numpy is the reference: a layer reading the part computes, from the channels the part holds, what the
    original's layer computed from the original channels among them (a copy's share going to the copy in the part)."""
    rng = np.random.default_rng(0)
    source = torch.arange(12) % 10               # 12 converted channels for 10 original ones (0 and 1 copied)
    whole = ChannelMap.from_source(source, 10)
    part = whole.part(0, 4, 0, 3)                # the original's channels 0:3, cut at the first orbit boundary (4)
    assert part.source.tolist() == [0, 1, 2, -1]
    values = rng.normal(size=(5, 10))            # the original's value, channel by channel
    held = values[:, source.numpy()][:, 0:4]     # what the converted part holds
    weight = rng.normal(size=(2, 3))             # a layer reading the original's part
    np.testing.assert_allclose((weight @ part.dense_inflow().numpy()) @ held.T, weight @ values[:, 0:3].T)
    rest = whole.part(4, 12, 3, 10)              # the other part: channel 3 sits in the first part, 0 and 1 are not its
    assert rest.source.tolist() == [1, 2, 3, 4, 5, 6, -1, -1] and rest.unfed == 2


# -- timm patterns ----------------------------------------------------------------------------------------------------
class PartialConv(nn.Module):
    """timm.models.fasternet's Partial_conv3 in a block: a 3×3 conv on the first quarter of the channels."""

    def __init__(self, width: int = 40):
        super().__init__()
        self.stem = nn.Conv2d(3, width, 3, padding=1)
        self.partial = nn.Conv2d(width // 4, width // 4, 3, padding=1)
        self.mlp = nn.Sequential(nn.Conv2d(width, 2 * width, 1), nn.BatchNorm2d(2 * width), nn.ReLU(),
                                 nn.Conv2d(2 * width, width, 1))
        self.head = _head(width)
        self.split = [width // 4, width - width // 4]

    def forward(self, x):
        x = self.stem(x)
        first, rest = torch.split(x, self.split, dim=1)
        return self.head(x + self.mlp(torch.cat((self.partial(first), rest), 1)))


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_a_split_inside_an_orbit_is_cut_at_a_boundary_near_it_and_noted(group):
    _, plan, error = _converted(PartialConv(), group)
    assert error < 1e-9
    expected = {"c4": "'split': cut at 10 of 40 channels → 2 of 10 orbits (8 channels)",
                "d4": "'split': cut at 10 of 40 channels → 1 of 5 orbits (8 channels)"}[group]
    assert expected in plan.notes
    assert plan.layer("partial").layout_in.orbits == {"c4": 2, "d4": 1}[group]   # built with the width it receives


class Scales(nn.Module):
    """timm.models.res2net's Bottle2neck: the output of a 1×1 conv cut into 8 parts of 14 channels, each added to the
    previous part's 3×3 conv before its own, all concatenated again."""

    def __init__(self, width: int = 14, scale: int = 8):
        super().__init__()
        self.width = width
        self.conv1 = nn.Conv2d(3, width * scale, 1)
        self.convs = nn.ModuleList(nn.Conv2d(width, width, 3, padding=1) for _ in range(scale - 1))
        self.head = _head(width * scale)

    def forward(self, x):
        parts = torch.split(torch.relu(self.conv1(x)), self.width, 1)
        outputs, part = [], parts[0]
        for i, conv in enumerate(self.convs):
            part = torch.relu(conv(part if i == 0 else part + parts[i]))
            outputs.append(part)
        return self.head(torch.cat(outputs + [parts[-1]], 1))


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_a_layer_only_ever_split_gets_whole_orbits_per_part(group):
    _, plan, error = _converted(Scales(), group)
    assert error < 1e-9
    per_part = {"c4": 4, "d4": 2}[group]             # 14 channels: 3.5 orbits of 4 (halves up), 1.75 of 8
    assert plan.layer("conv1").layout_out.orbits == 8 * per_part
    assert all(plan.layer(f"convs.{i}").layout_in.orbits == per_part for i in range(7))


class Ghost(nn.Module):
    """timm.models.ghostnet's GhostModule and GhostBottleneck: a conv, a depthwise conv of its output, both
    concatenated and cut to the block's width, plus a shortcut conv; a squeeze-excitation gate in between."""

    def __init__(self, out: int = 12):
        super().__init__()
        self.primary = nn.Conv2d(3, out // 2, 1)
        self.cheap = nn.Conv2d(out // 2, out // 2, 3, padding=1, groups=out // 2)
        self.reduce, self.expand = nn.Conv2d(out, 4, 1), nn.Conv2d(4, out, 1)
        self.shortcut = nn.Conv2d(3, out, 1)
        self.out, self.head = out, _head(out)

    def forward(self, x):
        first = self.primary(x)
        y = torch.cat([first, self.cheap(first)], 1)[:, :self.out]
        y = y * torch.sigmoid(self.expand(torch.relu(self.reduce(y.mean((2, 3), keepdim=True)))))
        return self.head(y + self.shortcut(x))


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_layers_combined_with_a_converted_value_take_its_width(group):
    """Two halves of 6 channels get 2 + 2 orbits under c4, 12 channels 3: the shortcut and the gate take 4."""
    _, plan, error = _converted(Ghost(), group)
    assert error < 1e-9
    assert plan.layer("shortcut").layout_out == plan.layer("expand").layout_out == \
        type(plan.layer("primary").layout_out)(2 * plan.layer("primary").layout_out.orbits)


class GatedGhost(nn.Module):
    """timm.models.ghostnet's GhostModuleV2 ('attn'): two halves concatenated, cut to the output width and multiplied
    by a gate computed first but activated and upsampled last (``out[:, :out] * F.interpolate(sigmoid(short(x)))``;
    here the gate is not pooled, so the upsampling keeps its size)."""

    def __init__(self, width: int = 12):
        super().__init__()
        half = math.ceil(width / 2)
        self.width = width
        self.short = nn.Sequential(nn.Conv2d(3, width, 1), nn.BatchNorm2d(width))
        self.gate = nn.Sigmoid()
        self.primary = nn.Conv2d(3, half, 3, padding=1)
        self.cheap = nn.Conv2d(half, half, 3, padding=1, groups=half)
        self.head = _head(width)

    def forward(self, x):
        res = self.short(x)
        first = self.primary(x)
        out = torch.cat([first, self.cheap(first)], dim=1)
        return self.head(out[:, :self.width] * nn.functional.interpolate(
            self.gate(res), size=(out.shape[-2], out.shape[-1]), mode="nearest"))


def test_a_cut_multiplied_by_a_gate_computed_later_in_the_graph_takes_the_gates_width():
    """Under c4 the 12-channel gate gets 3 orbits and the halves of 6 get 2 + 2: the cut of the 4-orbit
    concatenation takes the gate's 3. The gate's layers are converted first, but the graph computes its sigmoid and
    upsampling after the cut (timm's ghostnetv2 under d4 was refused at the product: orbit(10) and orbit(9))."""
    converted, plan, error = _converted(GatedGhost(), "c4")
    assert error < 1e-9
    assert plan.values["getitem"].orbits == plan.layer("short.0").layout_out.orbits == 3


class Reuse(nn.Module):
    """timm.models.rexnet's LinearBottleneck: ``cat([x[:, :in] + shortcut, x[:, in:]])`` with 50 channels in, 61 out."""

    def __init__(self, channels_in: int = 50, channels_out: int = 61):
        super().__init__()
        self.stem = nn.Conv2d(3, channels_in, 3, padding=1)
        self.conv = nn.Conv2d(channels_in, channels_out, 3, padding=1)
        self.channels_in, self.head = channels_in, _head(channels_out)

    def forward(self, x):
        shortcut = self.stem(x)
        x = self.conv(shortcut)
        return self.head(torch.cat([x[:, 0:self.channels_in] + shortcut, x[:, self.channels_in:]], dim=1))


def test_a_slice_added_to_a_value_takes_its_width_and_the_other_slice_follows():
    """61 channels are 15 orbits under c4 and 50 of them 12.3, but the 50-channel shortcut has 13 (12.5, halves up)."""
    converted, plan, error = _converted(Reuse(), "c4")
    assert error < 1e-9
    assert "'getitem': cut at 50 of 61 channels → 13 of 15 orbits (52 channels)" in plan.notes
    assert plan.values["getitem_1"].orbits == 2   # x[:, 50:] starts where x[:, :50] stopped


class GatedConv(nn.Module):
    """timm.models.mambaout's GatedConvBlock: channels last, a Linear split along the last axis into a gate, an empty
    part and a part convolved channels first, joined along the last axis again."""

    def __init__(self, dim: int = 16, hidden: int = 24):
        super().__init__()
        self.stem = nn.Conv2d(3, dim, 3, padding=1)
        self.norm, self.fc1 = nn.LayerNorm(dim), nn.Linear(dim, 2 * hidden)
        self.conv = nn.Conv2d(hidden, hidden, 3, padding=1, groups=hidden)
        self.fc2 = nn.Linear(hidden, dim)
        self.split, self.head = (hidden, 0, hidden), _head(dim)

    def forward(self, x):
        x = self.stem(x).permute(0, 2, 3, 1)
        gate, identity, conv = torch.split(self.fc1(self.norm(x)), self.split, dim=-1)
        conv = self.conv(conv.permute(0, 3, 1, 2)).permute(0, 2, 3, 1)
        x = x + self.fc2(torch.sigmoid(gate) * torch.cat((identity, conv), dim=-1))
        return self.head(x.permute(0, 3, 1, 2))


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_a_split_along_the_last_axis_of_a_channels_last_value(group):
    _, _, error = _converted(GatedConv(), group)
    assert error < 1e-9


class MixedConv(nn.Module):
    """timm.layers.mixed_conv2d's MixedConv2d as an inverted residual's last 1×1 conv: its input cut in two, a 1×1
    conv per part, concatenated and added to the block's input."""

    def __init__(self, channels: int = 40):
        super().__init__()
        self.stem = nn.Conv2d(3, channels, 3, padding=1)
        self.convs = nn.ModuleList(nn.Conv2d(channels // 2, channels // 2, 1) for _ in range(2))
        self.norm, self.head = nn.BatchNorm2d(channels), _head(channels)

    def forward(self, x):
        x = self.stem(x)
        first, second = torch.split(x, [20, 20], 1)
        return self.head(self.norm(torch.cat([self.convs[0](first), self.convs[1](second)], 1)) + x)


def test_layers_concatenated_share_the_width_of_the_whole():
    """Under d4 40 channels are 5 orbits but 20 are 3 (2.5, halves up): the two convs get 2 and 3."""
    _, plan, error = _converted(MixedConv(), "d4")
    assert error < 1e-9
    assert [plan.layer(f"convs.{i}").layout_out.orbits for i in range(2)] == [2, 3]


class FocalModulation(nn.Module):
    """timm.models.focalnet's FocalModulation: one conv computes queries, context and L + 1 gates; each gate is one
    channel broadcast over the context."""

    def __init__(self, dim: int = 16, levels: int = 2):
        super().__init__()
        self.stem = nn.Conv2d(3, dim, 3, padding=1)
        self.f, self.h = nn.Conv2d(dim, 2 * dim + levels + 1, 1), nn.Conv2d(dim, dim, 1)
        self.focal = nn.ModuleList(nn.Conv2d(dim, dim, 3, padding=1, groups=dim) for _ in range(levels))
        self.split, self.levels, self.head = [dim, dim, levels + 1], levels, _head(dim)

    def forward(self, x):
        q, ctx, gates = torch.split(self.f(self.stem(x)), self.split, 1)
        ctx_all = 0
        for level, focal in enumerate(self.focal):
            ctx = torch.relu(focal(ctx))
            ctx_all = ctx_all + ctx * gates[:, level:level + 1]
        ctx_all = ctx_all + ctx.mean((2, 3), keepdim=True) * gates[:, self.levels:]
        return self.head(q * self.h(ctx_all))


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_gates_read_one_channel_at_a_time_get_a_layer_with_invariant_outputs(group):
    _, plan, error = _converted(FocalModulation(), group)
    assert error < 1e-9
    assert str(plan.layer("f_part2").layout_out) == "plain(3)" and plan.layer("f").channels_before[1] == 32
    assert any("'f': the output channels of the parts 2 of 'split'" in note for note in plan.notes)


@pytest.mark.parametrize("build", [PartialConv, Scales, Ghost, Reuse, GatedConv, MixedConv, FocalModulation])
def test_the_structure_alone_is_rebuilt_the_same_and_takes_the_converted_weights(build):
    """What loading a converted-model file does (orbify.load): convert without weights, load the state dict."""
    torch.manual_seed(0)
    original = build().eval()
    converted, _ = convert(original, "d4", example_input=torch.zeros(1, 3, SIZE, SIZE))
    rebuilt, _ = convert(original, "d4", example_input=torch.zeros(1, 3, SIZE, SIZE), carry_weights=False)
    rebuilt.load_state_dict(converted.state_dict())
    x = torch.randn(2, 3, SIZE, SIZE)
    with torch.no_grad():
        torch.testing.assert_close(rebuilt.eval()(x), converted(x))


# -- refusals ---------------------------------------------------------------------------------------------------------
class Quarters(nn.Module):
    """8 channels cut in 4 parts, the whole read too (so its layer keeps the budget's width: one orbit under d4)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.head = _head(16)

    def forward(self, x):
        value = self.conv(x)
        parts = torch.split(value, 2, 1)
        return self.head(torch.cat([torch.relu(parts[i]) for i in range(4)] + [value], 1))


def test_more_parts_than_orbits_are_refused_naming_the_split():
    with pytest.raises(UnsupportedOpError) as refused:
        convert(Quarters().eval(), "d4", example_input=torch.zeros(1, 3, SIZE, SIZE))   # 8 channels: one orbit
    text = str(refused.value)
    assert "'split'" in text and "at 2, 4, 6 into more parts than the 1 orbits" in text


class Disagreeing(nn.Module):
    """A part of 6 channels of a value of 8 (two orbits under c4, the other part needing one) added to a conv of 6
    channels (two orbits)."""

    def __init__(self):
        super().__init__()
        self.conv, self.other = nn.Conv2d(3, 8, 3, padding=1), nn.Conv2d(3, 6, 3, padding=1)
        self.head = _head(16)

    def forward(self, x):
        value, other = self.conv(x), self.other(x)
        first, second = torch.split(value, [6, 2], 1)
        return self.head(torch.cat([first + other, second, value], 1))


def test_a_part_that_cannot_be_as_wide_as_the_value_it_is_added_to_is_refused_naming_both():
    with pytest.raises(UnsupportedOpError) as refused:
        convert(Disagreeing().eval(), "c4", example_input=torch.zeros(1, 3, SIZE, SIZE))
    text = str(refused.value)
    assert "'split'" in text and "'other' of 2 orbits" in text and "Channels 0:6" in text


class BroadcastChannel(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.head = _head(8)

    def forward(self, x):
        x = torch.relu(self.conv(x))   # not a conv's own output: no layer of its own for the channel
        return self.head(x * x[:, 7:8])


def test_one_channel_of_an_orbit_value_broadcast_over_others_is_refused():
    with pytest.raises(UnsupportedOpError) as refused:
        convert(BroadcastChannel().eval(), "c4", example_input=torch.zeros(1, 3, SIZE, SIZE))
    assert "Channel 7 of 'relu', taken alone, is broadcast" in str(refused.value)


# -- a real timm model ------------------------------------------------------------------------------------------------
def test_timm_fasternet_converts_exactly_with_its_partial_convs_cut_at_orbit_boundaries():
    timm = pytest.importorskip("timm")      # the test extra installs it
    torch.manual_seed(0)
    model = timm.create_model("fasternet_t0", pretrained=False, num_classes=5).eval()   # timm's definition
    converted, plan = convert(model, "c4", example_input=torch.zeros(1, 3, 32, 32))
    assert _invariance_error(converted, "c4", torch.randn(2, 3, 32, 32)) < 1e-9
    assert any("cut at 10 of 40 channels → 2 of 10 orbits (8 channels)" in note for note in plan.notes)
