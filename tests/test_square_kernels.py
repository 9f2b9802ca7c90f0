"""Convs whose kernel differs between the axes (orbify.graph.square_kernels): a centred 1×7 / 7×1 / a×b kernel grows
to a square one under quarter turns and converts exactly; the layer's note and MACs say what it costs; kernels that
no square computes are refused. The originals are torch's own convs and torchvision's inception_v3 and googlenet; the
motions are torch.rot90 and torch.flip."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.flop_counter import FlopCounterMode

import orbify
from orbify import convert
from orbify.errors import UnsupportedOpError
from orbify.graph.square_kernels import SquareKernel
from orbify.verification.summary import summarize

TOL = 1e-9   # float64


def _motions(group: str) -> list:
    """The elements of c4 / d4 / c2 / d2 as torch.rot90 (quarter turns) after torch.flip (the mirror)."""
    turns = {"c4": (0, 1, 2, 3), "d4": (0, 1, 2, 3), "c2": (0, 2), "d2": (0, 2)}[group]
    mirrors = (False, True) if group.startswith("d") else (False,)
    return [lambda x, k=k, m=m: torch.rot90(x.flip(-1) if m else x, k, dims=(-2, -1)) for m in mirrors for k in turns]


def _invariance_error(model: nn.Module, group: str, x: torch.Tensor) -> float:
    """max over the group of ‖f(g·x) − f(x)‖ / ‖f(x)‖ in float64."""
    model, x = model.double(), x.double()
    with torch.no_grad():
        y = model(x)
        return max(float((model(move(x)) - y).norm() / y.norm()) for move in _motions(group))


class Bars(nn.Module):
    """The inception pattern: 1×7 then 7×1 convs beside a 1×3 conv, a strided 5×1 conv and a dilated 1×3 conv."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.wide = nn.Conv2d(8, 8, (1, 7), padding=(0, 3))
        self.tall = nn.Conv2d(8, 8, (7, 1), padding=(3, 0))
        self.side = nn.Conv2d(8, 8, (1, 3), padding=(0, 1), bias=False)
        self.strided = nn.Conv2d(8, 8, (5, 1), padding=(2, 0), stride=2)
        self.dilated = nn.Conv2d(8, 8, (3, 1), padding=(2, 0), dilation=2)
        self.head = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 3))

    def forward(self, x):
        x = torch.relu(self.stem(x))
        x = torch.relu(self.tall(torch.relu(self.wide(x))) + self.side(x))
        return self.head(self.dilated(torch.relu(self.strided(x))))


def bars_model() -> nn.Module:
    """The :class:`Bars` model with seeded weights (a factory the saved file names)."""
    torch.manual_seed(0)
    return Bars().eval()


@pytest.mark.parametrize("kernel, padding, stride, dilation", [((1, 7), (0, 3), 1, 1), ((5, 1), (2, 0), 2, 1),
                                                              ((3, 5), (1, 2), 1, 1), ((1, 3), (0, 2), 2, 2)])
def test_a_centred_kernel_computes_what_its_square_embedding_computes(kernel, padding, stride, dilation):
    """torch's conv2d with the original kernel and padding against torch's conv2d with the square kernel."""
    torch.manual_seed(0)
    weight, x = torch.randn(4, 2, *kernel, dtype=torch.float64), torch.randn(1, 2, 11, 11, dtype=torch.float64)
    side = max(kernel)
    square = SquareKernel(kernel, side, (dilation * (side - 1) // 2,) * 2)
    original = F.conv2d(x, weight, padding=padding, stride=stride, dilation=dilation)
    grown = F.conv2d(x, square.embed(weight), padding=square.padding, stride=stride, dilation=dilation)
    assert grown.shape == original.shape
    assert torch.allclose(grown, original, rtol=0, atol=1e-12)


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_bar_kernels_convert_exactly_under_quarter_turns(group):
    """The old refusal ("differs between the axes, which a quarter turn swaps", tests/test_convert.py) is lifted."""
    model, x = bars_model(), torch.randn(2, 3, 13, 13)
    converted, plan = convert(model, group, example_input=x[:1])
    assert _invariance_error(converted, group, x) <= TOL
    grown = {layer.target: layer.notes for layer in plan.layers if any("grown" in n for n in layer.notes)}
    assert set(grown) == {"wide", "tall", "side", "strided", "dilated"}
    assert "kernel grown from 1×7 to 7×7" in grown["wide"][0] and "MACs and weights ×7" in grown["wide"][0]
    assert "kernel grown from 5×1 to 5×5" in grown["strided"][0] and "MACs and weights ×5" in grown["strided"][0]
    assert converted.get_submodule("wide").kernel_size == (7, 7)
    assert model.wide.kernel_size == (1, 7) and model.wide.padding == (0, 3)   # the original is untouched


@pytest.mark.parametrize("group", ["c2", "d2"])
def test_groups_without_quarter_turns_keep_the_kernel(group):
    """A half turn and the mirror keep each axis: the 1×7 kernel stays as it is and is tied as it is."""
    model, x = bars_model(), torch.randn(2, 3, 13, 13)
    converted, plan = convert(model, group, example_input=x[:1])
    assert _invariance_error(converted, group, x) <= TOL
    assert converted.get_submodule("wide").kernel_size == (1, 7)
    assert not any("grown" in note for layer in plan.layers for note in layer.notes)


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_the_embedding_init_reproduces_the_group_averaged_original(group):
    """With the lossless embedding the converted model equals the original averaged over the group (computed with
    torch.rot90 / torch.flip on the original itself): the weights carried into the square kernels are the
    original's taps in the right places."""
    model, x = bars_model().double(), torch.randn(2, 3, 13, 13, dtype=torch.float64)
    converted, _ = convert(model, group, budget="fields", init="embed", example_input=x[:1])
    with torch.no_grad():
        averaged = torch.stack([model(move(x)) for move in _motions(group)]).mean(0)
        assert torch.allclose(converted(x), averaged, rtol=0, atol=1e-12)


def _conv_macs(module: nn.Module, x: torch.Tensor) -> int:
    with FlopCounterMode(display=False) as counter, torch.no_grad():
        module(x)
    return counter.get_total_flops() // 2


def test_the_summary_counts_the_grown_kernel():
    """The converted 1×7 conv costs 7 times the original's multiply-accumulates: counted by torch.utils.flop_counter
    (in orbify's summary) and by the formula H·W·C_out·C_in·k² of a dense conv."""
    model, x = bars_model(), torch.randn(1, 3, 13, 13)
    converted, plan = convert(model, "c4", example_input=x)
    before = {row.target: row for row in summarize(model, x).rows}
    after = {row.target: row for row in summarize(converted, x, plan).rows}
    assert before["wide"].macs == 13 * 13 * 8 * 8 * 7 == _conv_macs(model.wide, torch.randn(1, 8, 13, 13))
    assert after["wide"].macs == 13 * 13 * 8 * 8 * 49 == 7 * before["wide"].macs
    assert (before["wide"].kernel, after["wide"].kernel) == ("1×7", "7×7")


@pytest.mark.parametrize("conv, words", [
    (nn.Conv2d(8, 8, (1, 7)), r"not centred on each axis"),
    (nn.Conv2d(8, 8, (1, 7), padding=(0, 2)), r"padding \(0, 2\) is not centred"),
    (nn.Conv2d(8, 8, 3, padding=1, stride=(1, 2)), r"stride \(1, 2\) differs between the axes"),
    (nn.Conv2d(8, 8, (1, 3), padding=(0, 1), padding_mode="reflect"), r"padding mode 'reflect'"),
])
@pytest.mark.parametrize("group", ["c4", "d4"])
def test_kernels_no_square_reproduces_are_refused_under_quarter_turns(conv, words, group):
    model = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), conv, nn.AdaptiveAvgPool2d(1), nn.Flatten()).eval()
    with pytest.raises(UnsupportedOpError, match=words) as info:
        convert(model, group, example_input=torch.randn(1, 3, 13, 13))
    assert "graph node '_1'" in str(info.value)


def test_a_grown_kernel_survives_save_and_load(tmp_path):
    """The .orb file rebuilds the structure by converting again: the square kernel comes back with its weights."""
    model, x = bars_model(), torch.randn(2, 3, 13, 13)
    converted, plan = convert(model, "d4", example_input=x[:1])
    path = orbify.save(converted, plan, tmp_path / "bars.orb", reference="test_square_kernels:bars_model")
    loaded = orbify.load(path, trust_source=True)
    assert loaded.module.get_submodule("wide").kernel_size == (7, 7)
    with torch.no_grad():
        assert torch.allclose(loaded.module(x), converted(x), rtol=0, atol=1e-6)


@pytest.mark.parametrize("name, size, group", [("inception_v3", 75, "d4"), ("googlenet", 45, "c4"),
                                               ("googlenet", 45, "d4")])
def test_torchvision_inception_models_convert_exactly(name, size, group):
    """torchvision's inception_v3 (1×7, 7×1, 1×3 and 3×1 convs) and googlenet, random weights, at a small safe size
    (inception_v3 under d4 only: it takes about 10 s a group; the bar kernels are tested under c4 above).

    inception_v3 was refused here before (tests/test_convert.py expected the refusal of its 1×7 kernel)."""
    torchvision = pytest.importorskip("torchvision")
    torch.manual_seed(0)
    builder = getattr(torchvision.models, name)
    model = builder(weights=None, aux_logits=False, init_weights=False).eval()
    x = torch.randn(1, 3, size, size)
    converted, plan = convert(model, group, example_input=x)
    assert _invariance_error(converted, group, torch.randn(2, 3, size, size)) <= 1e-9
    grown = [layer.target for layer in plan.layers if any("grown" in note for note in layer.notes)]
    assert (len(grown) > 0) == (name == "inception_v3")


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_calibration_past_its_feature_limit_carries_the_grown_kernels(group, monkeypatch):
    """A layer with more features than the calibration refits gets the orbit average of its original weight, a 1×k
    kernel set in the middle of its square kernel: with the limit below every layer's features, the calibrated model
    is invariant and the grown kernel's taps lie on its middle row and column only (the 1×7 row and its turns)."""
    monkeypatch.setattr("orbify.calibration.equations.MAX_FEATURES", 2)
    model, x = bars_model(), torch.randn(8, 3, 13, 13)
    calibrated, _ = convert(model, group, example_input=x[:1], init="calibrated", calibration=x)
    assert _invariance_error(calibrated, group, x) <= TOL
    taps = calibrated.get_submodule("wide").weight.detach().abs().sum((0, 1))
    cross = torch.zeros(7, 7, dtype=torch.bool)
    cross[3, :], cross[:, 3] = True, True
    assert taps[~cross].max() == 0 and taps[cross].min() > 0


def test_the_check_lists_each_grown_kernel():
    """`orbify check` (check_model) names every layer whose kernel grew, with the note the plan keeps on it."""
    model, x = bars_model(), torch.randn(2, 3, 13, 13)
    converted, plan = convert(model, "c4", example_input=x[:1])
    report = orbify.check_model(converted, model, plan, x)
    grown = [note for note in report.notes if "kernel grown" in note]
    assert len(grown) == 5 and any(note.startswith("'wide': kernel grown from 1×7 to 7×7") for note in grown)
