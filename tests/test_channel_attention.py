"""Attention across channels (efficient channel attention) and over positions (global context attention).

The motion is torch's own: ``torch.rot90`` and ``torch.flip`` move the input, and a converted classifier's logits
must not change (float64, where an exact conversion leaves only rounding, ~1e-15). The blocks are written here
with plain torch the way the published blocks compute (and, where timm is installed, timm's own ``EcaModule`` and
``GlobalContext`` modules are the originals). The conv along the orbits is checked against numpy's correlation.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import orbify
from orbify.errors import UnsupportedOpError
from orbify.graph.channel_attention import ORBITWISE_NOTE, POSITION_WEIGHTS_NOTE
from orbify.symmetry.layouts import Orbit, Permuted, Plain

GROUPS = ["c4", "d4"]
ORDER = {"c4": 4, "d4": 8}
CHANNELS = 24   # 6 orbits under c4, 3 under d4: more orbits than slots, so orbit and slot axes differ


def moved_copies(x: torch.Tensor, group: str) -> list[torch.Tensor]:
    """The input turned by every quarter turn and, under d4, mirrored too (torch.rot90 / torch.flip)."""
    turns = [torch.rot90(x, k, dims=(2, 3)) for k in range(4)]
    return turns + [torch.flip(t, dims=(3,)) for t in turns] if group == "d4" else turns


def invariance_error(converted: nn.Module, x: torch.Tensor, group: str) -> float:
    with torch.no_grad():
        logits = converted(x)
        return max(float((converted(moved) - logits).norm() / logits.norm()) for moved in moved_copies(x, group))


class ChannelAttention(nn.Module):
    """Efficient channel attention: the pooled channels, a 1-D conv of k taps along them, a sigmoid gate.

    ``form`` "view": ``mean → view(B, 1, C) → conv → view(B, C, 1, 1) → expand_as``; "transpose": ``pool →
    squeeze(-1) → transpose(-1, -2) → conv → transpose(-1, -2) → unsqueeze(-1)``. ``conv_channels`` > 1 makes the
    conv write several conv channels (not a conv along the channels any more), averaged.
    """

    def __init__(self, form: str = "view", kernel: int = 3, conv_channels: int = 1):
        super().__init__()
        self.form = form
        self.conv = nn.Conv1d(1, conv_channels, kernel, padding=kernel // 2, bias=False)
        self.pool = nn.AdaptiveAvgPool2d(1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.form == "view":
            y = self.conv(x.mean((2, 3)).view(x.shape[0], 1, -1)).mean(1, keepdim=True)
            return x * torch.sigmoid(y).view(x.shape[0], -1, 1, 1).expand_as(x)
        y = self.conv(self.pool(x).squeeze(-1).transpose(-1, -2)).transpose(-1, -2).unsqueeze(-1)
        return x * torch.sigmoid(y).expand_as(x)


class GlobalContextBlock(nn.Module):
    """Global context attention: one weight per position (a 1×1 conv to one channel, softmax over the H·W
    positions), the weighted mean of every channel, a 1×1 conv bottleneck and a sigmoid gate."""

    def __init__(self, channels: int, log_weights: bool = False):
        super().__init__()
        self.log_weights = log_weights
        self.attn = nn.Conv2d(channels, 1, 1)
        self.fc1 = nn.Conv2d(channels, channels // 2, 1)
        self.fc2 = nn.Conv2d(channels // 2, channels, 1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        b, c, h, w = x.shape
        logits = self.attn(x).reshape(b, 1, h * w)
        weights = torch.log_softmax(logits, dim=-1).exp() if self.log_weights else F.softmax(logits, dim=-1)
        context = (x.reshape(b, c, h * w).unsqueeze(1) @ weights.unsqueeze(3)).view(b, c, 1, 1)
        return x * torch.sigmoid(self.fc2(F.relu(self.fc1(context))))


class Net(nn.Module):
    """A stem conv, one attention block, the mean over positions and a linear head."""

    def __init__(self, block: nn.Module, channels: int = CHANNELS):
        super().__init__()
        self.stem = nn.Conv2d(3, channels, 3, padding=1)
        self.block = block
        self.head = nn.Linear(channels, 5)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.block(torch.relu(self.stem(x))).mean((2, 3)))


def converted_net(block: nn.Module, group: str, seed: int = 0, side: int = 9):
    torch.manual_seed(seed)
    model = Net(block).double().eval()
    x = torch.randn(3, 3, side, side, dtype=torch.float64)
    converted, plan = orbify.convert(model, group, example_input=x[:1])
    return model, converted, plan, x


# -- efficient channel attention -------------------------------------------------------------------------------
@pytest.mark.parametrize("group", GROUPS)
@pytest.mark.parametrize("form", ["view", "transpose"])
def test_channel_attention_converts_exactly(group, form):
    _, converted, plan, x = converted_net(ChannelAttention(form), group)
    assert invariance_error(converted, x, group) < 1e-9
    conv = plan.layer("block.conv")
    assert conv.layout_out == Permuted(Orbit(CHANNELS // ORDER[group]), (0, 2, 1))
    assert ORBITWISE_NOTE in conv.notes
    assert f"{ORBITWISE_NOTE}: 'block.conv'" in plan.notes   # shown by orbify convert and orbify check


def test_the_plan_lists_every_channel_conv_in_one_note():
    _, _, plan, _ = converted_net(nn.Sequential(ChannelAttention(), ChannelAttention("transpose")), "c4")
    assert [note for note in plan.notes if note.startswith(ORBITWISE_NOTE)] == \
        [f"{ORBITWISE_NOTE}: 'block.0.conv', 'block.1.conv'"]


@pytest.mark.parametrize("group", GROUPS)
def test_channel_conv_runs_the_original_kernel_along_orbits(group):
    model, converted, _, _ = converted_net(ChannelAttention(kernel=5), group, seed=1)
    order, channels = ORDER[group], CHANNELS
    vector = torch.randn(1, 1, channels, dtype=torch.float64)
    got = converted.get_submodule("block.conv")(vector).detach().numpy().reshape(-1, order)   # [orbit, slot]
    kernel = model.block.conv.weight.detach().numpy().reshape(-1)                             # carried as is
    slots = vector.numpy().reshape(-1, order)
    # Reference: numpy's correlation (torch convs correlate) of each slot's column over the orbits, zero-padded.
    expected = np.stack([np.correlate(np.pad(slots[:, s], 2), kernel, mode="valid") for s in range(order)], axis=1)
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12)


def test_channel_conv_equivariance_is_measured_per_layer():
    model, converted, plan, x = converted_net(ChannelAttention(), "d4", seed=2)
    report = orbify.check_model(converted, model, plan, x.float())
    layer = next(layer for layer in report.layers if layer.target == "block.conv")
    assert layer.equivariance_error < 1e-5
    assert report.invariance_error < 1e-5


def test_channel_conv_on_plain_channels_is_left_alone():
    torch.manual_seed(3)
    model = Net(ChannelAttention()).eval()
    x = torch.randn(2, 3, 9, 9)
    converted, _ = orbify.convert(model, "c4", example_input=x[:1], stop_at="stem")
    assert type(converted.get_submodule("block.conv")) is nn.Conv1d
    assert torch.equal(converted.get_submodule("block.conv").weight, model.block.conv.weight)


def test_converted_channel_attention_bakes_to_plain_torch():
    _, converted, _, x = converted_net(ChannelAttention(), "c4", seed=4)
    baked = orbify.bake_model(converted)
    assert all(type(m).__module__.startswith("torch.") for m in baked.modules())
    torch.testing.assert_close(baked(x), converted(x), rtol=0, atol=1e-12)


def test_a_conv_writing_several_channels_is_refused():
    with pytest.raises(UnsupportedOpError, match="more than one conv channel") as error:
        converted_net(ChannelAttention(conv_channels=2), "c4")
    assert "block_conv" in str(error.value)


def test_cutting_a_pooled_vector_is_still_refused():
    class Cut(nn.Module):
        def forward(self, x):
            return x * x.mean((2, 3)).view(x.shape[0], 2, -1).mean(1).repeat(1, 2)[..., None, None]

    with pytest.raises(UnsupportedOpError, match="splits or shuffles channels"):
        converted_net(Cut(), "c4")


def test_unsqueezing_a_map_is_refused():
    class Unsqueezed(nn.Module):
        def forward(self, x):
            return x.unsqueeze(2).mean(2)

    with pytest.raises(UnsupportedOpError, match="An unsqueeze of a orbit"):
        converted_net(Unsqueezed(), "c4")


# -- global context attention -------------------------------------------------------------------------------
@pytest.mark.parametrize("group", GROUPS)
@pytest.mark.parametrize("log_weights", [False, True])
def test_global_context_converts_exactly(group, log_weights):
    _, converted, plan, x = converted_net(GlobalContextBlock(CHANNELS, log_weights), group, seed=5)
    assert invariance_error(converted, x, group) < 1e-9
    assert plan.layer("block.attn").layout_out == Plain(1)   # one weight per position, the same for every slot
    assert POSITION_WEIGHTS_NOTE in plan.layer("block.attn").notes


def test_global_context_weights_turn_with_the_input():
    _, converted, _, x = converted_net(GlobalContextBlock(CHANNELS), "c4", seed=6)
    weights = []
    hook = converted.get_submodule("block.attn").register_forward_hook(lambda m, i, out: weights.append(out))
    converted(x)
    converted(torch.rot90(x, 1, dims=(2, 3)))
    hook.remove()
    torch.testing.assert_close(weights[1], torch.rot90(weights[0], 1, dims=(2, 3)), rtol=0, atol=1e-12)


# -- timm's own modules -----------------------------------------------------------------------------------------
@pytest.mark.parametrize("group", GROUPS)
@pytest.mark.parametrize("kind", ["eca", "gc"])
def test_timm_attention_modules_convert_exactly(group, kind):
    layers = pytest.importorskip("timm.layers")
    # The originals: timm's EcaModule (timm/layers/eca.py) and GlobalContext (timm/layers/global_context.py).
    block = layers.EcaModule(CHANNELS) if kind == "eca" else layers.GlobalContext(CHANNELS)
    _, converted, _, x = converted_net(block, group, seed=7)
    assert invariance_error(converted, x, group) < 1e-9


def test_timm_circular_channel_attention_is_refused_at_its_padding():
    layers = pytest.importorskip("timm.layers")
    with pytest.raises(UnsupportedOpError, match="graph node 'pad'"):
        converted_net(layers.CecaModule(CHANNELS), "c4")   # timm/layers/eca.py: F.pad(..., mode='circular') first
