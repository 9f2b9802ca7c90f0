"""Channels-last blocks: permute/movedim, LayerNorm and Linear over the last axis, per-channel layer scales.

The reference for equivariance is torch itself: ``torch.rot90`` and ``torch.flip`` move the input, and
a converted classifier's logits must not change (a map output must move the same way). Everything runs
in float64, where an exact conversion leaves only rounding (~1e-15).
"""

from __future__ import annotations

import pytest
import torch
from torch import nn

import orbify
from orbify.errors import UnsupportedOpError
from orbify.symmetry.layouts import Orbit, Permuted

torchvision = pytest.importorskip("torchvision")



def moved_copies(x: torch.Tensor, group: str) -> list[torch.Tensor]:
    """The input turned by every quarter turn and, under d4, mirrored too (torch.rot90 / torch.flip)."""
    turns = [torch.rot90(x, k, dims=(2, 3)) for k in range(4)]
    return turns + [torch.flip(t, dims=(3,)) for t in turns] if group == "d4" else turns


def relative(a: torch.Tensor, b: torch.Tensor) -> float:
    return float((a - b).detach().norm() / b.detach().norm())


class ChannelsLastBlock(nn.Module):
    """dw conv → channels last → LayerNorm → Linear → GELU → Linear → layer scale → channels first → residual add.

    ``last_scale``: the layer scale, shape (C,), multiplies while channels are last (and the axes move with
    ``torch.movedim``); otherwise a (C, 1, 1) scale multiplies after ``permute`` back (as in torchvision's convnext).
    """

    def __init__(self, channels: int, last_scale: bool = False, drop: float = 0.0):
        super().__init__()
        self.last_scale = last_scale
        self.dw = nn.Conv2d(channels, channels, 7, padding=3, groups=channels)
        self.norm = nn.LayerNorm(channels, eps=1e-6)
        self.fc1 = nn.Linear(channels, 4 * channels)
        self.act = nn.GELU()
        self.fc2 = nn.Linear(4 * channels, channels)
        self.scale = nn.Parameter(torch.randn(channels) if last_scale else torch.randn(channels, 1, 1))
        self.drop = torchvision.ops.StochasticDepth(drop, "row")

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.last_scale:
            y = torch.movedim(self.dw(x), 1, -1)
            y = self.fc2(self.act(self.fc1(self.norm(y)))) * self.scale
            return x + self.drop(torch.movedim(y, -1, 1))
        y = torch.permute(self.dw(x), (0, 2, 3, 1))
        y = self.fc2(self.act(self.fc1(self.norm(y))))
        return x + self.drop(self.scale * y.permute(0, 3, 1, 2))


class ChannelsLastNet(nn.Module):
    """A stem conv, two channels-last blocks (one of each form) and either a pooled linear head or the map."""

    def __init__(self, channels: int = 16, classes: int = 5, dense: bool = False, drop: float = 0.0):
        super().__init__()
        self.stem = nn.Conv2d(3, channels, 3, padding=1)
        self.block1 = ChannelsLastBlock(channels, drop=drop)
        self.block2 = ChannelsLastBlock(channels, last_scale=True, drop=drop)
        self.dense = dense
        self.head = nn.Linear(channels, classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.block2(self.block1(self.stem(x)))
        return y if self.dense else self.head(y.mean((2, 3)))


def per_orbit(values: torch.Tensor, order: int) -> torch.Tensor:
    """Orbit averaging by hand: the mean of every |G| consecutive entries, repeated over them."""
    return values.reshape(-1, order).mean(1).repeat_interleave(order)


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_block_converts_exactly_with_its_layer_scale_tied(group):
    torch.manual_seed(0)
    model = ChannelsLastNet().double().eval()
    x = torch.randn(3, 3, 12, 12, dtype=torch.float64)
    converted, plan = orbify.convert(model, group, example_input=x[:1], match=False)
    logits = converted(x)
    assert max(relative(converted(moved), logits) for moved in moved_copies(x, group)) < 1e-12
    order = len(moved_copies(x, group))
    layouts = {layer.target: layer.layout_out for layer in plan.layers}
    assert layouts["block1.fc1"] == Permuted(Orbit(64 // order), (0, 2, 3, 1))
    assert layouts["block2.norm"] == Permuted(Orbit(16 // order), (0, 2, 3, 1))
    assert "block1.scale" in " ".join(plan.notes) and "block2.scale" in " ".join(plan.notes)
    # weights carried: without matching, channel c stays channel c, so the layer scales and the LayerNorm's
    # affine weights are the originals averaged over every run of |G| channels
    for name in ("block1", "block2"):
        original, new = model.get_submodule(name), converted.get_submodule(name)
        assert new.scale.shape == original.scale.shape
        assert torch.allclose(new.scale.flatten(), per_orbit(original.scale.detach().flatten(), order))
        assert torch.allclose(new.norm.weight, per_orbit(original.norm.weight.detach(), order))
    # every converted layer, channels-last ones included, is equivariant in the check (its hooks act on
    # permuted values with their axes put back)
    report = orbify.check_model(converted, model, plan, x)
    assert max(layer.equivariance_error for layer in report.layers) < 1e-12
    assert any(layer.layout_out.startswith("permuted(") for layer in report.layers)


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_block_map_moves_with_the_input(group):
    torch.manual_seed(1)
    model = ChannelsLastNet(dense=True).double().eval()
    x = torch.randn(2, 3, 10, 10, dtype=torch.float64)
    converted, _ = orbify.convert(model, group, head="map", example_input=x[:1])
    reference = moved_copies(converted(x), group)
    outputs = [converted(moved) for moved in moved_copies(x, group)]
    assert max(relative(out, ref) for out, ref in zip(outputs, reference)) < 1e-12


def test_stochastic_depth_keeps_the_block_exact_in_training_and_eval():
    # torchvision.ops.StochasticDepth drops whole samples at random in training mode: with the same random
    # draws, the turned input must give the same logits. Kept as a module (leaf_types), it follows the
    # converted model's mode; traced through, it would keep the mode the model had when converted.
    torch.manual_seed(2)
    model = ChannelsLastNet(drop=0.5).double().eval()
    x = torch.randn(8, 3, 8, 8, dtype=torch.float64)
    converted, _ = orbify.convert(model, "c4", example_input=x[:1], leaf_types=(torchvision.ops.StochasticDepth,))
    for training in (True, False):
        converted.train(training)
        outputs = []
        for moved in moved_copies(x, "c4"):
            torch.manual_seed(3)
            outputs.append(converted(moved))
        torch.manual_seed(4)
        assert (relative(converted(x), outputs[0]) > 1e-3) == training   # the draws matter in training only
        assert max(relative(out, outputs[0]) for out in outputs[1:]) < 1e-12


class _MovedAxes(nn.Module):
    def __init__(self, source, destination):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 1)
        self.source, self.destination = source, destination

    def forward(self, x):
        return torch.movedim(self.conv(x), self.source, self.destination)


@pytest.mark.parametrize("source, destination", [(1, -1), (1, 2), ((1, 2), (3, 1)), (-3, 3)])
def test_movedim_layout_follows_torch(source, destination):
    # The axes a movedim leaves, compared with torch's own movedim on a tensor of distinct axis sizes
    _, plan = orbify.convert(_MovedAxes(source, destination), "c4", head="map", example_input=torch.zeros(1, 3, 5, 5))
    layout = plan.values["movedim"]
    sizes = (2, 8, 5, 7)
    expected = torch.empty(sizes).movedim(source, destination).shape
    assert isinstance(layout, Permuted) and tuple(sizes[d] for d in layout.dims) == tuple(expected)


class _Refused(nn.Module):
    def __init__(self, kind: str):
        super().__init__()
        self.kind = kind
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.norm = nn.LayerNorm(6)
        self.linear = nn.Linear(6, 6)
        self.position = nn.Parameter(torch.randn(1, 8, 6, 6))

    def forward(self, x):
        y = self.conv(x)
        if self.kind == "norm":
            return self.norm(y)   # over the width, not the channels
        if self.kind == "linear":
            return self.linear(y)
        return y + self.position   # varies over pixels


@pytest.mark.parametrize("kind, node, words", [("norm", "norm", "LayerNorm is supported over the channel axis"),
                                                ("linear", "linear", "Linear over an axis"),
                                                ("position", "add", "'position'")])
def test_ops_over_other_axes_are_refused_naming_the_node(kind, node, words):
    with pytest.raises(UnsupportedOpError) as error:
        orbify.convert(_Refused(kind).eval(), "c4", head="map", example_input=torch.zeros(1, 3, 6, 6))
    assert words in str(error.value) and f"graph node '{node}'" in str(error.value)


class _TopTensors(nn.Module):
    """Per-channel tensors of the top module: a parameter (C,) reshaped to broadcast, a buffer (C, 1, 1)."""

    def __init__(self, reshape_to: tuple[int, ...] = (1, -1, 1, 1)):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.scale = nn.Parameter(torch.randn(8))
        self.register_buffer("shift", torch.randn(8, 1, 1))
        self.reshape_to = reshape_to
        self.head = nn.Linear(8, 3)

    def forward(self, x):
        y = self.conv(x) * self.scale.reshape(self.reshape_to) + self.shift
        return self.head(y.relu().mean((2, 3)))


@pytest.mark.parametrize("budget, channels", [("channels", 8), ("params", 16)])
def test_top_module_tensors_are_tied_at_the_converted_width(budget, channels):
    torch.manual_seed(8)
    model = _TopTensors().double().eval()
    x = torch.randn(2, 3, 9, 9, dtype=torch.float64)
    converted, _ = orbify.convert(model, "c4", budget=budget, example_input=x[:1])
    logits = converted(x)
    assert max(relative(converted(moved), logits) for moved in moved_copies(x, "c4")) < 1e-12
    held = converted.get_submodule("channel_tensors")
    assert held.scale.shape == (channels,) and held.shift.shape == (channels, 1, 1)
    for tensor in (held.scale, held.shift):
        assert torch.allclose(tensor.flatten(), per_orbit(tensor.detach().flatten(), 4), rtol=1e-12, atol=0)


def test_a_tensor_reshaped_to_its_width_by_number_is_refused_when_the_width_changes():
    with pytest.raises(UnsupportedOpError, match="reshaped to its 8 channels by number"):
        orbify.convert(_TopTensors(reshape_to=(1, 8, 1, 1)).eval(), "c4", budget="params",
                       example_input=torch.zeros(1, 3, 9, 9))


def _random_layer_scales(model: nn.Module, names: tuple[str, ...]) -> None:
    """Give every layer scale random entries: their initial 1e-6 would hide an untied one."""
    with torch.no_grad():
        for name, parameter in model.named_parameters():
            if name.rpartition(".")[2] in names:
                parameter.copy_(torch.randn_like(parameter))


@pytest.fixture(scope="module")
def convnext_tiny():
    # Architecture: torchvision's convnext_tiny (torchvision.models.convnext), random weights, eval mode.
    torch.manual_seed(5)
    model = torchvision.models.convnext_tiny().eval()
    _random_layer_scales(model, ("layer_scale",))
    return model.double()


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_torchvision_convnext_tiny_is_invariant(convnext_tiny, group):
    size = orbify.safe_sizes(convnext_tiny, near=32, count=1)[0]   # 32: the smallest that runs
    x = torch.randn(2, 3, size, size, dtype=torch.float64)
    converted, plan = orbify.convert(convnext_tiny, group, example_input=x[:1])
    logits = converted(x)
    assert max(relative(converted(moved), logits) for moved in moved_copies(x, group)) < 1e-5
    assert sum(layer.op == "Linear" and isinstance(layer.layout_in, Permuted) for layer in plan.layers) == 36


def test_timm_convnext_atto_is_invariant():
    timm = pytest.importorskip("timm")
    torch.manual_seed(6)
    # Architecture: timm's convnext_atto (timm.create_model, no weights downloaded), random weights, eval mode.
    model = timm.create_model("convnext_atto", pretrained=False).eval()
    _random_layer_scales(model, ("gamma",))
    model = model.double()
    size = orbify.safe_sizes(model, near=32, count=1)[0]
    x = torch.randn(2, 3, size, size, dtype=torch.float64)
    converted, plan = orbify.convert(model, "c4", example_input=x[:1])
    logits = converted(x)
    assert max(relative(converted(moved), logits) for moved in moved_copies(x, "c4")) < 1e-5
    assert "stages.0.blocks.0.gamma" in " ".join(plan.notes)
