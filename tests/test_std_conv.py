"""Weight-standardized convs (orbify.graph.standardized_convs): timm's StdConv2d, ScaledStdConv2d and their "same"
forms (fixed or following the input size) convert exactly, keep their standardization (checked against numpy's
mean and variance) and carry their gain tied per orbit. The originals are timm's own modules; the motions are torch.rot90 and torch.flip."""

from __future__ import annotations

from functools import partial

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import orbify
from orbify import convert, parse_group
from orbify.errors import UnsupportedOpError
from orbify.layers.tied import tie_conv
from orbify.symmetry.layouts import Orbit

timm_layers = pytest.importorskip("timm.layers")
StdConv2d, ScaledStdConv2d = timm_layers.StdConv2d, timm_layers.ScaledStdConv2d
StdConv2dSame, ScaledStdConv2dSame = timm_layers.StdConv2dSame, timm_layers.ScaledStdConv2dSame

TOL = 1e-9   # float64


def _motions(group: str) -> list:
    """The elements of c4 / d4 as torch.rot90 (quarter turns) after torch.flip (the mirror)."""
    mirrors = (False, True) if group == "d4" else (False,)
    return [lambda x, k=k, m=m: torch.rot90(x.flip(-1) if m else x, k, dims=(-2, -1))
            for m in mirrors for k in range(4)]


def _invariance_error(model: nn.Module, group: str, x: torch.Tensor) -> float:
    """max over the group of ‖f(g·x) − f(x)‖ / ‖f(x)‖ in float64."""
    model, x = model.double(), x.double()
    with torch.no_grad():
        y = model(x)
        return max(float((model(move(x)) - y).norm() / y.norm()) for move in _motions(group))


def _standardized(weight: np.ndarray, eps: float) -> np.ndarray:
    """Each output filter minus its mean, over its standard deviation (numpy; biased variance, as batch norm uses)."""
    flat = weight.reshape(weight.shape[0], -1)
    mean, var = flat.mean(1, keepdims=True), flat.var(1, keepdims=True)
    return ((flat - mean) / np.sqrt(var + eps)).reshape(weight.shape)


class Standardized(nn.Module):
    """A normalizer-free block: scaled and plain weight-standardized convs (a grouped one, the static 'same' forms)."""

    def __init__(self):
        super().__init__()
        self.stem = ScaledStdConv2d(3, 16, 3, stride=2, padding=1)
        self.grouped = ScaledStdConv2d(16, 16, 3, padding=1, groups=2)
        self.plain = StdConv2d(16, 16, 1, bias=True)
        self.same = StdConv2dSame(16, 16, 3)
        self.scaled_same = ScaledStdConv2dSame(16, 8, 3)
        self.head = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 3))
        with torch.no_grad():
            for conv in (self.stem, self.grouped, self.scaled_same):
                conv.gain.uniform_(0.5, 2.0)

    def forward(self, x):
        x = torch.relu(self.stem(x))
        x = torch.relu(self.plain(torch.relu(self.grouped(x))) + x)
        return self.head(self.scaled_same(torch.relu(self.same(x))))


def standardized_model() -> nn.Module:
    """:class:`Standardized` with seeded weights (a factory the saved file names)."""
    torch.manual_seed(0)
    return Standardized().eval()


def test_a_same_padding_that_follows_the_input_size_is_kept():
    """timm's "same" forms with a strided kernel pad by the input's side (``same_pad``): the converted convs keep
    that, and the model is exact at 17 (both pads even: 2 at 17 and at 9, by timm's own get_same_padding) but not at
    16 (an odd pad, 1 at 8)."""
    torch.manual_seed(0)
    model = nn.Sequential(ScaledStdConv2dSame(3, 16, 3, stride=2), nn.ReLU(), StdConv2dSame(16, 16, 3, stride=2),
                          nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(16, 3)).eval()
    same_padding = timm_layers.get_same_padding
    assert [same_padding(side, 3, 2, 1) for side in (17, 9, 16, 8)] == [2, 2, 1, 1]
    for side, exact in ((17, True), (16, False)):
        x = torch.randn(2, 3, side, side)
        converted, _ = convert(model, "d4", example_input=x[:1])
        assert converted.get_submodule("0").same_pad and converted.get_submodule("2").same_pad
        assert (_invariance_error(converted, "d4", x) <= TOL) == exact


def test_standardizing_a_tied_weight_leaves_it_tied():
    """The filters of one orbit are the same numbers in other places, so they share mean and variance (numpy):
    standardizing a tied weight gives a weight its own orbit average Π leaves unchanged."""
    torch.manual_seed(0)
    group = parse_group("d4")
    conv = tie_conv(nn.Conv2d(16, 24, 3), group, Orbit(2), Orbit(3))
    tied = conv.weight.detach().double()
    standardized = torch.from_numpy(_standardized(tied.numpy(), 1e-6))
    tying = conv.parametrizations.weight[0]
    assert not torch.allclose(standardized, tied)
    assert torch.allclose(tying(tying.right_inverse(standardized)), standardized, rtol=0, atol=1e-12)


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_standardized_convs_convert_exactly_and_keep_their_class(group):
    model, x = standardized_model(), torch.randn(2, 3, 13, 13)
    converted, plan = convert(model, group, example_input=x[:1])
    assert _invariance_error(converted, group, x) <= TOL
    for name in ("stem", "grouped", "plain", "same", "scaled_same"):
        assert type(converted.get_submodule(name)).__bases__[0] is type(model.get_submodule(name))
    assert [layer.op for layer in plan.layers][:5] == ["ScaledStdConv2d", "ScaledStdConv2d", "StdConv2d",
                                                       "StdConv2dSame", "ScaledStdConv2dSame"]


def test_the_converted_conv_standardizes_its_tied_weight_and_scales_it_by_its_gain():
    """The converted module's output is torch's conv2d with its tied weight standardized by numpy, times gain·scale
    (timm's formula: scale = gamma / √fan-in, gamma 1 here), plus its bias."""
    model, x = standardized_model(), torch.randn(2, 16, 7, 7, dtype=torch.float64)
    converted, _ = convert(model, "d4", example_input=torch.randn(1, 3, 13, 13))
    conv = converted.get_submodule("grouped").double()
    weight = conv.weight.detach().numpy()
    assert conv.scale == pytest.approx(1 / np.sqrt(weight[0].size), rel=1e-12)
    effective = _standardized(weight, conv.eps) * conv.gain.detach().numpy() * conv.scale
    expected = F.conv2d(x, torch.from_numpy(effective), conv.bias, padding=1, groups=conv.groups)
    with torch.no_grad():
        assert torch.allclose(conv(x), expected, rtol=0, atol=1e-10)


def test_the_gain_is_carried_by_channel_and_averaged_per_orbit():
    """Without channel matching each orbit of the 16 channels takes the gains of its 4 (c4) original channels and
    stores their mean (numpy)."""
    model = standardized_model()
    converted, _ = convert(model, "c4", example_input=torch.randn(1, 3, 13, 13), match=False)
    original = model.stem.gain.detach().numpy().reshape(4, 4)
    expected = np.repeat(original.mean(1), 4)
    assert np.allclose(converted.get_submodule("stem").gain.detach().numpy().reshape(-1), expected, atol=1e-7)


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_the_embedding_init_reproduces_a_standardized_conv_reading_the_image(group):
    """A scaled standardized conv on the image, then a plain head: with the lossless embedding the converted model
    equals timm's model averaged over the group (torch.rot90 / torch.flip on the original)."""
    torch.manual_seed(0)
    model = nn.Sequential(ScaledStdConv2d(3, 6, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                          nn.Linear(6, 3)).eval().double()
    with torch.no_grad():
        model[0].gain.uniform_(0.5, 2.0)
    x = torch.randn(2, 3, 9, 9, dtype=torch.float64)
    converted, _ = convert(model, group, budget="fields", init="embed", example_input=x[:1])
    with torch.no_grad():
        averaged = torch.stack([model(move(x)) for move in _motions(group)]).mean(0)
        assert torch.allclose(converted(x), averaged, rtol=0, atol=1e-12)


def test_a_width_change_rescales_by_the_new_fan_in():
    """The 'params' budget widens the layers: scale follows timm's gamma / √fan-in at the new fan-in, and the plan
    says so."""
    model = standardized_model()
    converted, plan = convert(model, "c4", budget="params", example_input=torch.randn(1, 3, 13, 13))
    conv = converted.get_submodule("grouped")
    fan_in = conv.in_channels // conv.groups * 9
    assert fan_in != 8 * 9
    assert conv.scale == pytest.approx(fan_in ** -0.5, rel=1e-12)
    assert any("fan-in 72 → " in note for note in plan.layer("grouped").notes)


@pytest.mark.parametrize("options, words", [
    (dict(init="calibrated", calibration=torch.randn(4, 3, 13, 13)), "Calibration does not refit a weight-standard"),
    (dict(budget="fields", init="embed"), "'embed' initialisation cannot reproduce a weight-standardized conv"),
])
def test_initialisations_that_cannot_hold_the_standardization_are_refused(options, words):
    with pytest.raises(UnsupportedOpError, match=words) as info:
        convert(standardized_model(), "c4", example_input=torch.randn(1, 3, 13, 13), **options)
    assert "graph node" in str(info.value)


def test_a_standardized_model_survives_save_and_load(tmp_path):
    """The tied gain and weights come back from the .orb file, which rebuilds the structure by converting again."""
    model, x = standardized_model(), torch.randn(2, 3, 13, 13)
    converted, plan = convert(model, "d4", example_input=x[:1])
    path = orbify.save(converted, plan, tmp_path / "nf.orb", reference="test_std_conv:standardized_model")
    loaded = orbify.load(path, trust_source=True)
    with torch.no_grad():
        assert torch.allclose(loaded.module(x), converted(x), rtol=0, atol=1e-6)


def normalizer_free_blocks() -> nn.Module:
    """timm's own normalizer-free blocks (timm.models.nfnet.NormFreeBlock: pre-activation, grouped 3×3 conv,
    squeeze-excitation, a 1×1 shortcut conv, one with skipinit's in-place scalar gain) after a strided stem, every
    gain drawn at random (timm starts the last conv's gain at zero, which would hide the residual branch)."""
    from timm.models.nfnet import NormFreeBlock

    torch.manual_seed(0)
    block = partial(NormFreeBlock, bottle_ratio=0.5, group_size=8, act_layer=nn.SiLU,
                    attn_layer=partial(timm_layers.get_attn("se"), rd_ratio=0.25, rd_divisor=8))
    model = nn.Sequential(ScaledStdConv2d(3, 16, 3, stride=2, padding=1), block(16, 32, skipinit=True),
                          block(32, 32, reg=False), nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, 3)).eval()
    with torch.no_grad():
        for conv in model.modules():
            if isinstance(conv, ScaledStdConv2d):
                conv.gain.uniform_(0.5, 2.0)
        model[1].skipinit_gain.fill_(0.7)
    return model


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_timms_normalizer_free_blocks_convert_exactly(group):
    model, x = normalizer_free_blocks(), torch.randn(2, 3, 17, 17)
    converted, plan = convert(model, group, example_input=x[:1])
    assert _invariance_error(converted, group, x) <= TOL
    assert sum(layer.op == "ScaledStdConv2d" for layer in plan.layers) == 8   # stem, shortcut, 2 × 3 in the blocks
