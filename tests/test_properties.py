"""Property tests: random plain CNNs either convert and are invariant, or are refused naming a node.

Models are drawn from the building blocks of docs/design.md §5: convs with random kernel, stride,
padding, groups and dilation; batch norm; activations; max/avg pools; residual adds; channel
concatenations; squeeze-excitation gates; global pool or flatten + linear heads. Groups and budgets
are drawn too. The CI profile ("ci", the default) runs 200 examples; set
``HYPOTHESIS_PROFILE=long`` for 2,000. Every example is counted: at least 60 % must convert exactly, and
every refusal must name the graph node it stopped at.
"""

import os
from collections import Counter

import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from torch import nn

from orbify.conversion.converter import convert
from orbify.errors import OrbifyError
from orbify.graph.sizes import SizeChecker
from orbify.symmetry.groups import parse_group
from orbify.transfer.recalibrate import recalibrate_batch_norm

settings.register_profile("quick", max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
settings.register_profile("ci", max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow],
                          derandomize=True)
settings.register_profile("long", max_examples=2000, deadline=None, suppress_health_check=[HealthCheck.too_slow])
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))

ACTIVATIONS = [nn.ReLU, nn.SiLU, nn.Hardswish, nn.GELU, nn.Identity]


class Block(nn.Module):
    """One drawn block: conv (+bn) (+act), optionally wrapped as residual / concat / SE."""

    def __init__(self, conv: nn.Conv2d, norm: bool, act: type, wrap: str):
        super().__init__()
        self.conv = conv
        self.norm = nn.BatchNorm2d(conv.out_channels) if norm else nn.Identity()
        self.act = act()
        self.wrap = wrap
        if wrap == "se":
            squeeze = max(1, conv.out_channels // 4)
            self.fc1 = nn.Conv2d(conv.out_channels, squeeze, 1)
            self.fc2 = nn.Conv2d(squeeze, conv.out_channels, 1)

    def forward(self, x):
        y = self.act(self.norm(self.conv(x)))
        if self.wrap == "residual":
            return x + y
        if self.wrap == "concat":
            return torch.cat([x, y], 1)
        if self.wrap == "se":
            gate = torch.sigmoid(self.fc2(torch.relu(self.fc1(y.mean((2, 3), keepdim=True)))))
            return y * gate
        return y


class Net(nn.Module):
    def __init__(self, blocks, pool, head, channels, spatial, classes=5):
        super().__init__()
        self.blocks = nn.Sequential(*blocks)
        self.pool = pool
        self.head_kind = head
        features = channels * (spatial * spatial if head == "flatten" else 1)
        self.fc = nn.Linear(features, classes)

    def forward(self, x):
        x = self.pool(self.blocks(x))
        if self.head_kind == "global":
            x = nn.functional.adaptive_avg_pool2d(x, 1)
        return self.fc(torch.flatten(x, 1))


#: The first block's wrap. A residual add or a concatenation with the input image itself joins its plain
#: channels to orbit ones, which the conversion refuses (an UnsupportedOpError naming the add or cat node).
#: Drawn as often as the other wraps, it made over half of the examples refusals of this one kind (113 of the
#: 200, measured); drawn one time in five it keeps that refusal tested without crowding out conversions.
WRAPS_ON_IMAGE = ["plain", "se"] * 4 + ["residual", "concat"]


@st.composite
def networks(draw):
    width_unit = draw(st.sampled_from([2, 4, 8]))
    channels = 3
    blocks = []
    for _ in range(draw(st.integers(1, 3))):
        wrap = draw(st.sampled_from(WRAPS_ON_IMAGE if not blocks else ["plain", "residual", "concat", "se"]))
        kernel = draw(st.sampled_from([1, 3, 5]))
        dilation = draw(st.sampled_from([1, 2])) if kernel > 1 else 1
        stride = 1 if wrap in ("residual", "concat") else draw(st.sampled_from([1, 2]))
        out = channels if wrap == "residual" else width_unit * draw(st.integers(1, 4))
        groups = 1
        if channels > 3 and draw(st.booleans()):
            groups = draw(st.sampled_from([d for d in (2, 4, channels) if channels % d == 0 and out % d == 0] or [1]))
            if wrap == "residual" or groups == channels:
                out = channels
        padding = dilation * (kernel - 1) // 2 if wrap in ("residual", "concat") else draw(st.integers(0, 2))
        conv = nn.Conv2d(channels, out, kernel, stride=stride, padding=padding, dilation=dilation, groups=groups,
                         bias=draw(st.booleans()))
        blocks.append(Block(conv, draw(st.booleans()), draw(st.sampled_from(ACTIVATIONS)), wrap))
        channels = channels + out if wrap == "concat" else out
    pool = draw(st.sampled_from([nn.Identity(), nn.MaxPool2d(2), nn.AvgPool2d(3, stride=2, padding=1)]))
    head = draw(st.sampled_from(["global", "flatten"]))
    return blocks, pool, head, channels


def _first_safe_size(model, low=13, high=40):
    checker = SizeChecker(model)
    for size in range(low, high):
        if checker.is_safe(size):
            with torch.no_grad():
                try:
                    model(torch.zeros(1, 3, size, size))
                except RuntimeError:
                    continue
            return size
    return None


def _spatial_out(probe, size):
    with torch.no_grad():
        return probe(torch.zeros(1, 3, size, size)).shape[-1]


def _outcome(drawn, group_name: str, budget: str, seed: int) -> str:
    """Convert one drawn network: "exact" (converted and invariant), "refused" (an error naming a graph node)
    or "no size" (no input size in range runs it). Raises AssertionError on anything else."""
    blocks, pool, head, channels = drawn
    probe = nn.Sequential(*blocks, pool).eval()
    size = _first_safe_size(probe)
    if size is None:
        return "no size"
    spatial = _spatial_out(probe, size)
    torch.manual_seed(seed)
    model = Net(blocks, pool, head, channels, spatial).eval()
    x = torch.randn(2, 3, size, size)
    try:
        converted, plan = convert(model, group_name, budget=budget, example_input=x)
    except OrbifyError as error:   # a refusal is one explained paragraph that names the node it stopped at
        assert error.where and "graph node '" in error.where and error.fix, str(error)
        return "refused"
    recalibrate_batch_norm(converted, [torch.randn(4, 3, size, size)])
    converted, x = converted.double().eval(), x.double()   # float64: structural error, not float32 rounding
    group = parse_group(group_name)
    with torch.no_grad():   # every moved copy in one batch (eval mode: the images do not interact)
        y = converted(torch.cat([group.act_grid(g, x) for g in range(group.order)])).unflatten(0, (group.order, -1))
    scale = y[0].norm().clamp_min(1e-12)
    for g in range(1, group.order):
        assert float((y[g] - y[0]).norm() / scale) <= 1e-5, (group_name, budget, g)
    return "exact"


#: Share of the drawn networks that must convert exactly. Measured over the 200 of the ci profile: 163 exact and
#: 37 refused (0.82). A conversion that refused everything would count 0 exact and fail.
EXACT_SHARE = 0.6


def test_random_networks_convert_invariantly_or_are_refused():
    outcomes: Counter[str] = Counter()

    @given(networks(), st.sampled_from(["c2", "c4", "d1", "d2", "d4"]),
           st.sampled_from(["channels", "params", "fields"]), st.integers(0, 2**16))
    def example(drawn, group_name, budget, seed):
        outcomes[_outcome(drawn, group_name, budget, seed)] += 1

    example()
    drawn = sum(outcomes.values())
    assert drawn >= settings.default.max_examples, outcomes   # every example counted, none skipped
    assert outcomes["exact"] >= EXACT_SHARE * drawn, outcomes
