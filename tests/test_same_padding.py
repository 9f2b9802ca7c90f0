"""Padding that depends on the input side ("same" padding), fixed pads, and branches on input sizes while tracing.

Outside references: timm's own modules and helpers (``timm.layers.Conv2dSame``, ``MaxPool2dSame``,
``AvgPool2dSame``, ``get_same_padding``, the VGG head ``timm.models.vgg.ConvMlp`` that branches on its input size)
as the originals; ``torch.rot90`` and ``torch.flip`` as the motions; the models' own eager forward for what a
traced graph must compute. Everything that measures equivariance runs in float64 (an exact conversion leaves only
rounding, ~1e-15).
"""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch import nn

import orbify
from orbify.errors import InputShapeError, TraceError, UnsupportedOpError
from orbify.graph.padding import PaddingViolation, same_pads
from orbify.graph.sizes import SizeChecker
from orbify.graph.tracing import trace

timm = pytest.importorskip("timm")
from timm.layers.conv2d_same import Conv2dSame  # noqa: E402
from timm.layers.padding import get_same_padding  # noqa: E402
from timm.layers.pool2d_same import AvgPool2dSame, MaxPool2dSame  # noqa: E402

TOL = 1e-9


def moved_copies(x: torch.Tensor, group: str) -> list[torch.Tensor]:
    """The input turned by every quarter turn and, under d4, mirrored too (torch.rot90 / torch.flip)."""
    turns = [torch.rot90(x, k, dims=(2, 3)) for k in range(4)]
    return turns + [torch.flip(t, dims=(3,)) for t in turns] if group == "d4" else turns


def invariance_error(model: nn.Module, x: torch.Tensor, group: str) -> float:
    """max over the motions of ‖f(g·x) − f(x)‖ / ‖f(x)‖ for a classifier."""
    with torch.no_grad():
        reference = model(x)
        return max(float((model(moved) - reference).norm() / reference.norm()) for moved in moved_copies(x, group))


def converted_error(model: nn.Module, group: str, side: int) -> float:
    converted, _ = orbify.convert(model.eval(), group, example_input=torch.randn(1, 3, side, side))
    return invariance_error(converted.double().eval(), torch.randn(2, 3, side, side, dtype=torch.float64), group)


class SameNet(nn.Module):
    """The TensorFlow-style stem and downsampling of timm's tf_* families: "same" convs and pools of stride 2."""

    def __init__(self):
        super().__init__()
        self.stem = Conv2dSame(3, 8, 3, stride=2, bias=False)
        self.pool = MaxPool2dSame(3, stride=2)
        self.down = Conv2dSame(8, 16, 5, stride=2, groups=8)
        self.smooth = AvgPool2dSame(3, stride=2)
        self.head = nn.Linear(16, 5)

    def forward(self, x):
        x = self.pool(F.relu(self.stem(x)))
        return self.head(self.smooth(F.relu(self.down(x))).mean((2, 3)))


# -- the padding itself ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kernel,stride,dilation", [(3, 2, 1), (5, 2, 1), (2, 2, 1), (3, 1, 2), (7, 4, 1), (1, 2, 1)])
def test_same_pads_match_timm(kernel, stride, dilation):
    for side in range(1, 40):
        before, after = same_pads(side, kernel, stride, dilation)
        total = get_same_padding(side, kernel, stride, dilation)   # timm/layers/padding.py, the padding applied
        assert (before + after, before) == (total, total // 2), side


@pytest.mark.parametrize("layer", [lambda: Conv2dSame(2, 2, 3, stride=2), lambda: Conv2dSame(2, 2, 5, stride=2),
                                   lambda: MaxPool2dSame(3, stride=2), lambda: AvgPool2dSame(2, stride=2)],
                         ids=["conv3", "conv5", "maxpool3", "avgpool2"])
def test_safe_sides_are_those_where_the_layer_commutes_with_quarter_turns(layer):
    """The size search accepts a side exactly when timm's layer (a conv with a kernel made symmetric by hand)
    commutes with torch.rot90 and torch.flip there, measured numerically."""
    module = layer().double().eval()
    if isinstance(module, nn.Conv2d):
        with torch.no_grad():
            w = module.weight
            module.weight.copy_(sum(torch.rot90(w, k, dims=(2, 3)) + torch.rot90(w.flip(3), k, dims=(2, 3))
                                    for k in range(4)) / 8)
            module.bias.zero_()
    checker = SizeChecker(nn.Sequential(module), channels=2)
    for side in range(6, 22):
        x = torch.randn(1, 2, side, side, dtype=torch.float64)
        commutes = all(torch.allclose(module(moved), expected, atol=1e-12)
                       for moved, expected in zip(moved_copies(x, "d4"), moved_copies(module(x), "d4")))
        assert checker.is_safe(side) == commutes, side


def test_uneven_padding_is_named_with_the_sides_it_needs():
    checker = SizeChecker(SameNet())
    broken = checker.violations(64)
    assert broken and isinstance(broken[0], PaddingViolation)
    assert "pads top/bottom 0/1" in str(broken[0]) and "conv2d_same.py" in str(broken[0])
    assert broken[0].needs.startswith("an input side ≡ 1 (mod 2)")
    assert checker.safe_sizes(64, 2) == [65, 49]   # odd at every stride-2 step: 1 (mod 16), as hand-computed


def test_same_layers_kept_whole_are_judged_like_traced_ones():
    """A "same" conv or pool kept as one node (a leaf, as the standardized "same" convs are) is safe at the same
    sides as when its padding is traced as a node of its own."""
    leaves = trace(SameNet(), leaf_types=(Conv2dSame, MaxPool2dSame, AvgPool2dSame))
    assert {type(m) for m in leaves.modules()} >= {Conv2dSame, MaxPool2dSame, AvgPool2dSame}
    whole, traced = SizeChecker(leaves), SizeChecker(SameNet())
    assert [whole.is_safe(side) for side in range(24, 90)] == [traced.is_safe(side) for side in range(24, 90)]
    assert isinstance(whole.violations(64)[0], PaddingViolation)


def test_a_same_padding_never_even_is_refused_with_its_reason():
    model = nn.Sequential(Conv2dSame(3, 4, 2, stride=1), nn.AdaptiveAvgPool2d(1))   # pads (0, 1) at every side
    with pytest.raises(InputShapeError) as info:
        orbify.safe_sizes(model, near=32)
    assert "at no input side" in str(info.value)


def test_same_padding_conflicting_with_a_pool_is_named():
    """A same conv exact on odd sides beside a 2×2 stride-2 pool exact on even ones: no side serves both."""
    class Pair(nn.Module):
        def __init__(self):
            super().__init__()
            self.down = Conv2dSame(3, 4, 3, stride=2)
            self.short = nn.Sequential(nn.AvgPool2d(2), nn.Conv2d(3, 4, 1))

        def forward(self, x):
            return (self.down(x) + self.short(x)).mean((2, 3))

    with pytest.raises(InputShapeError) as info:
        orbify.safe_sizes(Pair(), near=32)
    assert "conflict between" in str(info.value) and "same" in str(info.value)


# -- conversion -------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("group", ["c4", "d4"])
def test_same_padding_layers_convert_exactly_at_a_safe_size(group):
    torch.manual_seed(0)
    model = SameNet()
    side = orbify.safe_sizes(model, near=40, count=1)[0]
    assert converted_error(model, group, side) <= TOL


def test_converted_model_keeps_the_dynamic_padding():
    """At another safe side the converted model pads as timm does there: it runs and stays invariant."""
    torch.manual_seed(0)
    converted, _ = orbify.convert(SameNet().eval(), "c4", example_input=torch.randn(1, 3, 49, 49))
    assert converted(torch.randn(1, 3, 81, 81)).shape == (1, 5)
    assert invariance_error(converted.double(), torch.randn(1, 3, 81, 81, dtype=torch.float64), "c4") <= TOL


def test_real_tf_model_converts_exactly():
    torch.manual_seed(0)
    model = timm.create_model("tf_mobilenetv3_small_075", pretrained=False, num_classes=10)
    side = orbify.safe_sizes(model, near=64, count=1)[0]
    assert side % 32 == 1
    assert converted_error(model, "c4", side) <= TOL


# -- fixed pads -------------------------------------------------------------------------------------------------------
class Padded(nn.Module):
    """A pad (``F.pad`` amounts, or a pad module) before a conv."""

    def __init__(self, pad):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3)
        self.pad = pad
        self.head = nn.Linear(8, 4)

    def forward(self, x):
        x = self.pad(x) if isinstance(self.pad, nn.Module) else F.pad(x, self.pad)
        return self.head(F.relu(self.conv(x)).mean((2, 3)))


@pytest.mark.parametrize("pad", [(1, 1, 1, 1), nn.ZeroPad2d(2), nn.ReflectionPad2d(1), nn.ReplicationPad2d(1)],
                         ids=["F.pad", "zero", "reflect", "replicate"])
def test_symmetric_pads_convert_exactly(pad):
    torch.manual_seed(0)
    assert converted_error(Padded(pad), "d4", 12) <= TOL


def test_a_pad_symmetric_per_axis_converts_under_half_turns_only():
    torch.manual_seed(0)
    model = Padded((1, 1, 2, 2))
    converted, _ = orbify.convert(model.eval(), "c2", example_input=torch.randn(1, 3, 12, 12))
    x = torch.randn(2, 3, 12, 12, dtype=torch.float64)
    converted = converted.double().requires_grad_(False)
    assert float((converted(torch.rot90(x, 2, dims=(2, 3))) - converted(x)).norm() / converted(x).norm()) <= TOL
    with pytest.raises(UnsupportedOpError, match="width and the height differently"):
        orbify.convert(model.eval(), "c4", example_input=torch.randn(1, 3, 12, 12))


class OffsetStem(nn.Module):
    """hgnetv2's stem: ``F.pad(x, (0, 1, 0, 1))`` before a 2×2 stride-1 max pool (timm/models/hgnet.py)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, stride=2, padding=1)
        self.pool = nn.MaxPool2d(2, stride=1, ceil_mode=True)

    def forward(self, x):
        return self.pool(F.pad(self.conv(x), (0, 1, 0, 1))).mean((2, 3))


@pytest.mark.parametrize("model,node", [(OffsetStem(), "'pad'"),
                                        (nn.Sequential(nn.Conv2d(3, 8, 1), nn.ZeroPad2d((-1, 1, -1, 1)),
                                                       nn.AvgPool2d(1, stride=2), nn.Conv2d(8, 8, 1)), "'_1'")],
                         ids=["hgnetv2-stem", "nasnet-shifted-path"])
def test_asymmetric_pads_are_refused_naming_the_node(model, node):
    with pytest.raises(UnsupportedOpError) as info:
        orbify.convert(model.eval(), "c4", example_input=torch.randn(1, 3, 13, 13))
    message = str(info.value)
    assert f"graph node {node}" in message and "one side of an axis more than the other" in message


class PaddedVector(nn.Module):
    """A pad of pooled channels: on a (B, C) value the last axis holds the orbits' slots, not a spatial axis."""

    def __init__(self):
        super().__init__()
        self.conv, self.fc = nn.Conv2d(3, 8, 3, padding=1), nn.Linear(10, 2)

    def forward(self, x):
        return self.fc(F.pad(self.conv(x).mean((2, 3)), (1, 1)))


@pytest.mark.parametrize("group", ["c2", "c4"])
def test_a_pad_of_orbit_channels_is_refused_naming_the_node(group):
    """Before: under c2 the converted graph failed at run time with a raw reshape error, under c4 the message spoke of
    width and height."""
    with pytest.raises(UnsupportedOpError) as info:
        orbify.convert(PaddedVector().eval(), group, example_input=torch.randn(1, 3, 9, 9))
    message = str(info.value)
    assert "graph node 'pad'" in message and "last two axes are not the spatial ones" in message


# -- branches on the input size ---------------------------------------------------------------------------------------
def vgg_like() -> nn.Module:
    """Two stride-2 convs and timm's VGG head, which pools a map smaller than its 7×7 kernel up to 7×7 first."""
    from timm.models.vgg import ConvMlp

    return nn.Sequential(nn.Conv2d(3, 8, 3, stride=2, padding=1), nn.ReLU(), nn.Conv2d(8, 8, 3, stride=2, padding=1),
                         ConvMlp(8, 8, kernel_size=7), nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 4)).eval()


@pytest.mark.parametrize("side", [13, 41])   # maps of 4×4 (pooled up to 7×7) and 11×11 (not pooled)
def test_a_branch_on_sizes_is_traced_as_taken_at_the_example(side):
    torch.manual_seed(0)
    model = vgg_like()
    x = torch.randn(1, 3, side, side)
    traced = trace(model, x)
    with torch.no_grad():
        assert torch.allclose(traced(x), model(x), atol=1e-6)   # the model's own forward at that size
    pooled = any(node.target is F.adaptive_avg_pool2d for node in traced.graph.nodes)
    assert pooled == (side == 13)


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_a_model_branching_on_sizes_converts_exactly(group):
    torch.manual_seed(0)
    assert converted_error(vgg_like(), group, 13) <= TOL


def test_a_size_taking_another_branch_is_refused_by_the_converted_model():
    converted, _ = orbify.convert(vgg_like(), "c4", example_input=torch.randn(1, 3, 13, 13))
    with pytest.raises(InputShapeError, match="traced at 13×13"):
        converted(torch.randn(1, 3, 41, 41))


def test_the_plan_notes_the_fixed_branch():
    _, plan = orbify.convert(vgg_like(), "c4", example_input=torch.randn(1, 3, 13, 13))
    assert any("fixed as taken at 13×13" in note and "timm/models/vgg.py" in note for note in plan.notes)


def test_the_size_search_follows_each_branch():
    checker = SizeChecker(vgg_like())
    assert checker.is_safe(13) and checker.is_safe(41) and not checker.is_safe(14)   # odd sides, both branches


def test_without_an_example_a_branch_on_sizes_is_refused_clearly():
    with pytest.raises(TraceError) as info:
        trace(vgg_like())
    assert "decides by its input size" in str(info.value) and "example input" in str(info.value)


def test_a_branch_on_values_stays_refused():
    class Branchy(nn.Module):
        def forward(self, x):
            return -x if x.mean() > 0 else x

    with pytest.raises(TraceError, match="depends on tensor values"):
        trace(Branchy(), torch.randn(1, 3, 8, 8))
