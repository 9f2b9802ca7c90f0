"""Small ops of the timm backbones: a power by a constant (StarReLU), reductions over the channel axis (a norm written
out with ``torch.var``), the global response norm (an L2 norm over the map, a mean over the channels, per-channel
affine tensors) and blur pools (a fixed binomial filter applied with ``F.conv2d`` on a model buffer).

The reference for equivariance is torch itself: ``torch.rot90`` and ``torch.flip`` move the input, and a converted
classifier's logits must not change. Everything runs in float64, where an exact conversion leaves only rounding
(~1e-15). The blocks are written here in plain torch; where timm is installed, each is first checked to compute
what timm's own module computes (timm's ``StarReLU``, ``SimpleNorm2d``, ``GlobalResponseNorm`` and ``BlurPool2d``),
and three timm models built from them convert exactly.
"""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch import nn

import orbify
from orbify.errors import UnsupportedOpError
from orbify.graph.tracing import trace
from orbify.symmetry.layouts import Permuted, Plain


def moved_copies(x: torch.Tensor, group: str) -> list[torch.Tensor]:
    """The input turned by every quarter turn and, under d4, mirrored too (torch.rot90 / torch.flip)."""
    turns = [torch.rot90(x, k, dims=(2, 3)) for k in range(4)]
    return turns + [torch.flip(t, dims=(3,)) for t in turns] if group == "d4" else turns


def invariance_error(model: nn.Module, x: torch.Tensor, group: str) -> float:
    with torch.no_grad():
        logits = model(x)
        return max(float((model(moved) - logits).norm() / logits.norm()) for moved in moved_copies(x, group))


# -- the blocks, in plain torch ---------------------------------------------------------------------------------------
class StarReLU(nn.Module):
    """s · relu(x)² + b with one learned scale and bias."""

    def __init__(self):
        super().__init__()
        self.scale = nn.Parameter(torch.tensor([0.8]))
        self.bias = nn.Parameter(torch.tensor([-0.1]))

    def forward(self, x):
        return self.scale * F.relu(x) ** 2 + self.bias


class ChannelsLastRmsNorm(nn.Module):
    """x / √(var over the channels + eps) · weight, computed with the channels last."""

    def __init__(self, channels: int):
        super().__init__()
        self.weight = nn.Parameter(torch.rand(channels) + 0.5)

    def forward(self, x):
        x = x.permute(0, 2, 3, 1)
        v = torch.var(x, dim=-1, keepdim=True)
        return (x * torch.rsqrt(v + 1e-6) * self.weight).permute(0, 3, 1, 2)


class ResponseNorm(nn.Module):
    """Global response norm: the L2 norm of every channel over the map, divided by its mean over the channels, scales
    the value; per-channel weight and bias (channels first, or with the channels last)."""

    def __init__(self, channels: int, channels_last: bool = False):
        super().__init__()
        self.channels_last = channels_last
        self.weight = nn.Parameter(torch.randn(channels))
        self.bias = nn.Parameter(torch.randn(channels))

    def forward(self, x):
        spatial, channel, shape = ((1, 2), -1, (1, 1, 1, -1)) if self.channels_last else ((2, 3), 1, (1, -1, 1, 1))
        x_g = x.norm(p=2, dim=spatial, keepdim=True)
        x_n = x_g / (x_g.mean(dim=channel, keepdim=True) + 1e-6)
        return x + torch.addcmul(self.bias.view(shape), self.weight.view(shape), x * x_n)


def binomial_filter(channels: int) -> torch.Tensor:
    row = torch.tensor([1.0, 2.0, 1.0]) / 4
    return (row[:, None] * row[None, :]).expand(channels, 1, 3, 3).clone()


class BlurPool(nn.Module):
    """Reflect-pad by one, then a fixed depthwise 3×3 filter (a model buffer) with stride 2."""

    def __init__(self, channels: int, filt: torch.Tensor | None = None):
        super().__init__()
        self.channels = channels
        self.register_buffer("filt", binomial_filter(channels) if filt is None else filt, persistent=False)

    def forward(self, x):
        return F.conv2d(F.pad(x, [1, 1, 1, 1], mode="reflect"), self.filt, stride=2, groups=self.channels)


class SmallOpsNet(nn.Module):
    """conv → StarReLU → channels-last RMS norm → conv → response norm (both forms) → blur pool → conv → pooled head."""

    def __init__(self, channels: int = 16, classes: int = 5):
        super().__init__()
        self.stem = nn.Conv2d(3, channels, 3, padding=1)
        self.act = StarReLU()
        self.norm = ChannelsLastRmsNorm(channels)
        self.conv = nn.Conv2d(channels, channels, 3, padding=1)
        self.grn = ResponseNorm(channels)
        self.grn_last = ResponseNorm(channels, channels_last=True)
        self.blur = BlurPool(channels)
        self.conv2 = nn.Conv2d(channels, channels, 3, padding=1)
        self.head = nn.Linear(channels, classes)

    def forward(self, x):
        y = self.grn(self.conv(self.norm(self.act(self.stem(x)))))
        y = self.grn_last(y.permute(0, 2, 3, 1)).permute(0, 3, 1, 2)
        return self.head(self.conv2(self.blur(y)).relu().mean((2, 3)))


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_the_small_ops_convert_exactly(group):
    torch.manual_seed(0)
    model = SmallOpsNet().double().eval()
    x = torch.randn(3, 3, 9, 9, dtype=torch.float64)   # 9 + 2 − 3 is even: the blur pool's grid is symmetric
    assert invariance_error(model, x, group) > 1e-2   # the original is not invariant: the test can fail
    converted, plan = orbify.convert(model, group, example_input=x[:1])
    assert invariance_error(converted, x, group) < 1e-12
    notes = " ".join(plan.notes)
    for tensor in ("norm.weight", "grn.weight", "grn.bias", "grn_last.weight", "grn_last.bias"):
        assert tensor in notes   # the per-channel tensors are tied per orbit
    assert torch.equal(converted.get_submodule("blur").filt, model.blur.filt)   # the fixed filter is kept as it is


def test_a_blur_pool_on_a_buffer_stays_a_fixed_filter():
    # Turning F.conv2d(x, self.filt) into an nn.Conv2d holding the buffer as its weight failed ("attribute 'weight'
    # already exists"); a filter nobody learns is not a layer to tie: the call stays, reading the buffer.
    graph = trace(BlurPool(4), torch.zeros(1, 4, 9, 9)).graph
    calls = [node for node in graph.nodes if node.target is F.conv2d]
    assert len(calls) == 1 and calls[0].args[1].op == "get_attr" and calls[0].args[1].target == "filt"


class _FilterNet(nn.Module):
    def __init__(self, filt: torch.Tensor | None = None, learned: bool = False):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.blur = BlurPool(8, filt)
        self.learned = nn.Parameter(binomial_filter(8)) if learned else None
        self.out = nn.Conv2d(8, 2, 1)   # the layer before the filter writes orbits

    def forward(self, x):
        y = self.conv(x)
        return self.out(F.conv2d(y, self.learned * 2, groups=8) if self.learned is not None else self.blur(y))


def _shifted_filter(channels: int) -> torch.Tensor:
    """A blur whose centre is off the middle pixel: a quarter turn moves it."""
    filt = torch.zeros(channels, 1, 3, 3)
    filt[:, 0, 0, 1] = 1.0
    return filt


def _filter_differing_per_channel(channels: int) -> torch.Tensor:
    return binomial_filter(channels) * torch.arange(1.0, channels + 1).view(-1, 1, 1, 1)


@pytest.mark.parametrize("filt, learned, words", [
    (_shifted_filter(8), False, "does not commute with the group"),
    (_filter_differing_per_channel(8), False, "differs between channels"),
    (None, True, "not a fixed model buffer"),
])
def test_filters_that_do_not_commute_with_the_group_are_refused_naming_the_node(filt, learned, words):
    with pytest.raises(UnsupportedOpError) as error:
        orbify.convert(_FilterNet(filt, learned).eval(), "c4", head="map", example_input=torch.zeros(1, 3, 9, 9))
    assert words in str(error.value) and "graph node 'conv2d'" in str(error.value)


def test_safe_sizes_see_the_strided_fixed_filter():
    # The stride rule (common practice for strided sampling grids, docs/design.md §6): a window of k with stride s
    # on a side padded to H + 2p keeps its grid under quarter turns iff (H + 2p − k) is divisible by s; the blur pool
    # pads by one and filters 3×3 with stride 2 behind a stride-1 conv, so only odd sides are safe.
    sizes = orbify.safe_sizes(_FilterNet(), near=16, count=4)
    assert sizes and all((side + 2 - 3) % 2 == 0 for side in sizes)


def test_a_filter_symmetric_under_half_turns_only_converts_under_c2_and_is_refused_under_c4():
    bar = torch.zeros(8, 1, 3, 3)
    bar[:, 0, 1] = torch.tensor([1.0, 2.0, 1.0])   # a horizontal bar: a half turn keeps it, a quarter turn does not
    torch.manual_seed(1)
    model = _FilterNet(bar).double().eval()
    x = torch.randn(2, 3, 9, 9, dtype=torch.float64)
    converted, _ = orbify.convert(model, "c2", head="map", example_input=x[:1])
    half_turn = torch.rot90(x, 2, dims=(2, 3))
    assert torch.allclose(converted(half_turn), torch.rot90(converted(x), 2, dims=(2, 3)), rtol=1e-12, atol=1e-12)
    with pytest.raises(UnsupportedOpError, match=r"does not commute with the group element\(s\) \[1, 3\]"):
        orbify.convert(model, "c4", head="map", example_input=x[:1])


# -- reductions ---------------------------------------------------------------------------------------------------------
REDUCTIONS = {
    "mean": lambda y, dims: y.mean(dims, keepdim=True),
    "sum": lambda y, dims: torch.sum(y, dim=dims, keepdim=True),
    "var": lambda y, dims: torch.var(y, dim=dims, keepdim=True),
    "std": lambda y, dims: y.std(dim=dims, keepdim=True),
    "norm": lambda y, dims: y.norm(p=3, dim=dims, keepdim=True),
    "vector_norm": lambda y, dims: torch.linalg.vector_norm(y, 2, dims, True),
    "amax": lambda y, dims: torch.amax(y, dim=dims, keepdim=True),
    "amin": lambda y, dims: y.amin(dim=dims, keepdim=True),
    "logsumexp": lambda y, dims: torch.logsumexp(y, dim=dims, keepdim=True),
}


class _Reduced(nn.Module):
    """conv → y · (1 + reduction of y over ``dims``) → pooled head; ``last``: the reduction runs with channels last."""

    def __init__(self, reduction: str, dims: tuple[int, ...], last: bool = False):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.reduce, self.dims, self.last = REDUCTIONS[reduction], dims, last
        self.head = nn.Linear(8, 3)

    def forward(self, x):
        y = self.conv(x)
        if self.last:
            y = y.permute(0, 2, 3, 1)
            y = (y * (1 + self.reduce(y, self.dims))).permute(0, 3, 1, 2)
        else:
            y = y * (1 + self.reduce(y, self.dims))
        return self.head(y.mean((2, 3)))


@pytest.mark.parametrize("reduction", sorted(REDUCTIONS))
@pytest.mark.parametrize("dims, last", [((1,), False), ((2, 3), False), ((1, 2, 3), False), ((-1,), True),
                                        ((1, 2), True)])
def test_reductions_over_the_channels_or_the_whole_map_are_exact(reduction, dims, last):
    torch.manual_seed(2)
    model = _Reduced(reduction, dims, last).double().eval()
    x = torch.randn(2, 3, 7, 7, dtype=torch.float64)
    converted, _ = orbify.convert(model, "d4", example_input=x[:1])
    assert invariance_error(converted, x, "d4") < 1e-12


@pytest.mark.parametrize("dims, last", [((1,), False), ((-1,), True)])
def test_a_channel_statistic_is_one_plain_channel(dims, last):
    model = _Reduced("var", dims, last).eval()
    _, plan = orbify.convert(model, "d4", example_input=torch.zeros(1, 3, 7, 7))
    assert plan.values["var"] == (Permuted(Plain(1), (0, 2, 3, 1)) if last else Plain(1))


class _StatisticRead(nn.Module):
    """The variance over the channels (channels first, or last) read by a conv as a one-channel map, and multiplied
    into the value from the left."""

    def __init__(self, last: bool):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.last = last
        self.read = nn.Conv2d(1, 8, 3, padding=1)
        self.mix = nn.Conv2d(8, 8, 1)
        self.head = nn.Linear(8, 3)

    def forward(self, x):
        y = self.conv(x)
        v = torch.var(y.permute(0, 2, 3, 1), dim=-1, keepdim=True).permute(0, 3, 1, 2) if self.last else \
            torch.var(y, dim=1, keepdim=True)
        y = self.mix(torch.rsqrt(v + 1) * y) + self.read(v)
        return self.head(y.mean((2, 3)))


@pytest.mark.parametrize("last", [False, True])
@pytest.mark.parametrize("group", ["c4", "d4"])
def test_a_channel_statistic_read_by_layers_converts_exactly(last, group):
    # The conv reading the statistic reads one channel, as in the original; the one reading the value scaled by it
    # reads the value's channels: the weights of both are carried at their own widths.
    torch.manual_seed(3)
    model = _StatisticRead(last).double().eval()
    x = torch.randn(2, 3, 7, 7, dtype=torch.float64)
    converted, plan = orbify.convert(model, group, example_input=x[:1])
    assert invariance_error(converted, x, group) < 1e-12
    assert converted.get_submodule("read").weight.shape == model.read.weight.shape


class _BadReduction(nn.Module):
    def __init__(self, kind: str):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.kind = kind
        self.out = nn.Conv2d(8, 2, 1)

    def forward(self, x):
        y = self.conv(x)
        if self.kind == "height":
            y = y * y.mean(2, keepdim=True)    # a quarter turn makes the height the width
        elif self.kind == "batch":
            y = y * y.sum(0, keepdim=True)
        else:
            y = y * torch.var(y, dim=1).unsqueeze(1)   # no keepdim: the channel axis is gone
        return self.out(y)


@pytest.mark.parametrize("kind, node, words", [("height", "mean", "one spatial axis without the other"),
                                               ("batch", "sum_1", "reduces the batch"),
                                               ("channels", "var", "without keepdim")])
def test_reductions_that_do_not_commute_are_refused_naming_the_node(kind, node, words):
    with pytest.raises(UnsupportedOpError) as error:
        orbify.convert(_BadReduction(kind).eval(), "c4", head="map", example_input=torch.zeros(1, 3, 6, 6))
    assert words in str(error.value) and f"graph node '{node}'" in str(error.value)


# -- against timm --------------------------------------------------------------------------------------------------------
def test_the_blocks_compute_what_timms_modules_compute():
    timm_layers = pytest.importorskip("timm.layers")
    from timm.layers.grn import GlobalResponseNorm
    from timm.models.metaformer import StarReLU as TimmStarReLU

    torch.manual_seed(3)
    x = torch.randn(2, 8, 9, 9, dtype=torch.float64)
    pairs = [(StarReLU(), TimmStarReLU()), (ChannelsLastRmsNorm(8), timm_layers.SimpleNorm2d(8, eps=1e-6)),
             (ResponseNorm(8), GlobalResponseNorm(8, channels_last=False)), (BlurPool(8), timm_layers.BlurPool2d(8))]
    for ours, theirs in pairs:
        theirs.load_state_dict(ours.state_dict())
        ours, theirs = ours.double(), theirs.double()
        assert torch.allclose(ours(x), theirs(x), rtol=1e-12, atol=1e-12), type(theirs).__name__
    last, theirs = ResponseNorm(8, channels_last=True).double(), GlobalResponseNorm(8).double()
    theirs.load_state_dict(last.state_dict())
    moved = x.permute(0, 2, 3, 1)
    assert torch.allclose(last(moved), theirs(moved), rtol=1e-12, atol=1e-12)


def _randomised(model: nn.Module, names: tuple[str, ...]) -> nn.Module:
    """Random values for the tensors whose name ends in one of ``names`` (timm starts some at zero or one, which would
    make their blocks identities and the test blind to them)."""
    with torch.no_grad():
        for name, tensor in model.named_parameters():
            if name.endswith(names):
                tensor.copy_(torch.randn_like(tensor))
    return model


@pytest.mark.parametrize("name, size, tensors, group", [
    ("convnext_zepto_rms", 32, ("norm.weight",), "d4"),     # channels-last norms written with torch.var
    ("convnextv2_atto", 32, ("grn.weight", "grn.bias"), "c4"),   # global response norms
    ("resnetblur18", 33, (), "c4"),                          # blur pools (33: every strided grid symmetric)
])
def test_timm_models_with_these_ops_convert_exactly(name, size, tensors, group):
    timm = pytest.importorskip("timm")
    torch.manual_seed(4)
    # Architecture: timm's model of that name (timm.create_model, no weights downloaded), random weights, eval mode.
    model = _randomised(timm.create_model(name, pretrained=False), tensors).double().eval()
    x = torch.randn(1, 3, size, size, dtype=torch.float64)
    converted, plan = orbify.convert(model, group, example_input=x)
    assert invariance_error(converted, x, group) < 1e-10
    assert all(tensor in " ".join(plan.notes) for tensor in tensors)


class GridReshape(nn.Module):
    """A conv, then a view that cuts the grid into 4×4 cells (as a space-to-depth stem does), then a mean."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)

    def forward(self, x):
        y = self.conv(x)
        b, c, h, w = y.shape
        return y.view(b, c, h // 4, 4, w // 4, 4).mean((3, 5))


def test_a_reshape_that_rearranges_the_grid_is_refused_naming_the_node():
    with pytest.raises(UnsupportedOpError, match="rearranges the spatial grid") as info:
        orbify.convert(GridReshape().eval(), "c4", example_input=torch.randn(1, 3, 16, 16))
    assert "'view'" in str(info.value)
