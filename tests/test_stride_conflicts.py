"""Models with no exact input size: the conflict is named, and --repair-strides makes a size exact.

Outside references: torch itself (``torch.rot90`` and ``flip`` move the images; ``F.conv2d`` and
``F.avg_pool2d`` compute what a repaired conv must equal) and timm's own model definition
(``timm.create_model("resnet18d", pretrained=False)``, repaired by hand here to measure the drift).
"""

import re

import pytest
import torch
import torch.nn.functional as F
from torch import nn
from typer.testing import CliRunner

import orbify
from orbify.cli import app
from orbify.errors import InputShapeError
from orbify.graph.sizes import SizeChecker
from orbify.graph.stride_repair import DRIFT_IMAGES, DRIFT_SEED, counterpart

TOL = 1e-9


class ParityPair(nn.Module):
    """A 3×3 stride-2 conv with padding 1 (exact on odd sides) beside a 2×2 stride-2 shortcut (exact on even ones)."""

    def __init__(self, shortcut: nn.Module):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.down = nn.Conv2d(8, 8, 3, stride=2, padding=1)
        self.short = shortcut
        self.head = nn.Linear(8, 5)

    def forward(self, x):
        x = F.relu(self.stem(x))
        return self.head(F.relu(self.down(x) + self.short(x)).mean((2, 3)))


def build_parity_pair() -> nn.Module:
    """The factory the command line reads (``test_stride_conflicts:build_parity_pair``)."""
    torch.manual_seed(0)
    return ParityPair(nn.AvgPool2d(2, 2, ceil_mode=True, count_include_pad=False)).eval()


def moves(x):
    """x under the eight quarter turns and mirrors, by torch.rot90 and flip."""
    return [torch.rot90(x.flip(-1) if mirror else x, k, dims=(-2, -1)) for mirror in (0, 1) for k in range(4)]


def invariance_error(model, x) -> float:
    model, x = model.double().eval(), x.double()
    with torch.no_grad():
        y = model(x)
        return max(float((model(moved) - y).norm() / y.norm()) for moved in moves(x))


def commutes(op, side) -> bool:
    """Whether ``op`` commutes with the quarter turn at this input side (checked with torch.rot90)."""
    x = torch.randn(1, 8, side, side, dtype=torch.float64)
    with torch.no_grad():
        return torch.allclose(op(torch.rot90(x, 1, (2, 3))), torch.rot90(op(x), 1, (2, 3)), atol=1e-12)


def test_an_opposite_parity_pair_is_a_conflict_naming_both_ops():
    model = build_parity_pair().double()
    # torch itself: at every side one of the two ops fails to commute with a quarter turn, so no size is exact
    assert not any(commutes(model.down, side) and commutes(model.short, side) for side in range(8, 41))
    (conflict,) = SizeChecker(model).conflicts(32)
    assert {m.node for m in conflict.members} == {"down", "short"} and conflict.giving_way == "short"
    needs = {m.node: m.needs for m in conflict.members}
    assert needs["down"].startswith("an odd input side") and needs["short"].startswith("an even input side")
    with pytest.raises(InputShapeError) as info:
        orbify.safe_sizes(model, 32)
    assert "conflict between 'down' and 'short'" in str(info.value) and "--repair-strides" in str(info.value)


def test_orbify_sizes_exits_with_the_conflict_and_no_traceback():
    result = CliRunner().invoke(app, ["sizes", "test_stride_conflicts:build_parity_pair", "--near", "32"])
    assert result.exit_code == 2 and "Traceback" not in result.output, result.output
    text = " ".join(result.output.split())
    assert "No input size is exact" in text and "conflict between 'down' and 'short'" in text, text
    repaired = CliRunner().invoke(app, ["sizes", "test_stride_conflicts:build_parity_pair", "--near", "32",
                                        "--repair-strides", "--count", "2"])
    assert repaired.exit_code == 0 and "stride repair: 'short'" in " ".join(repaired.output.split()), repaired.output
    assert "│ 31 " in repaired.output and "│ 33 " in repaired.output, repaired.output


@pytest.mark.parametrize("shortcut,side,replaced", [
    (nn.AvgPool2d(2, 2, ceil_mode=True, count_include_pad=False), 33, "short"),   # the pool gives way
    (nn.MaxPool2d(2, 2, ceil_mode=True), 33, "short"),
    (nn.Conv2d(8, 8, 2, stride=2), 32, "down"),   # odd sides do not run: the 3×3 conv becomes a 4×4 one
])
def test_repair_converts_exactly(shortcut, side, replaced):
    torch.manual_seed(0)
    model = ParityPair(shortcut).eval()
    x = torch.randn(2, 3, side, side)
    assert invariance_error(orbify.convert(model, "d4", example_input=x[:1])[0], x) > 1e-5   # unrepaired: inexact
    converted, plan = orbify.convert(model, "d4", example_input=x[:1], repair_strides=True)
    assert invariance_error(converted, x) <= TOL
    assert [n for n in plan.notes if n.startswith("stride repair: '")] == [
        n for n in plan.notes if n.startswith(f"stride repair: '{replaced}'")] != []


def test_the_conv_counterpart_is_the_mean_of_the_original_at_the_four_positions_around_its_centre():
    torch.manual_seed(0)
    conv = nn.Conv2d(4, 6, 3, stride=2, padding=1).double()
    wider = counterpart(conv)
    assert (wider.kernel_size, wider.stride, wider.padding) == ((4, 4), (2, 2), (1, 1))
    x = torch.randn(2, 4, 16, 16, dtype=torch.float64)
    with torch.no_grad():
        dense = F.conv2d(x, conv.weight, conv.bias, padding=1)    # the original at every position, stride 1
        expected = F.avg_pool2d(dense, 2)                          # the mean of the four around each new centre
        assert torch.allclose(wider(x), expected, atol=1e-12)
    assert isinstance(counterpart(nn.AvgPool2d(2, 2)), nn.AvgPool2d) and counterpart(nn.AvgPool2d(2, 2)).padding == 0
    assert counterpart(nn.Conv2d(4, 4, 3, stride=3)) is None and counterpart(nn.Conv2d(4, 4, 3, 2, dilation=2)) is None


def test_timm_resnet18d_has_three_conflicts_and_converts_exactly_with_the_repair():
    timm = pytest.importorskip("timm")
    torch.manual_seed(0)
    model = timm.create_model("resnet18d", pretrained=False).eval()
    conflicts = SizeChecker(model).conflicts(64)
    assert [sorted(m.node for m in c.members) for c in conflicts] == [
        [f"layer{i}_0_conv1", f"layer{i}_0_downsample_0"] for i in (2, 3, 4)]
    x = torch.randn(2, 3, 33, 33)
    converted, plan = orbify.convert(model, "c4", example_input=x[:1], repair_strides=True, match=False)
    with torch.no_grad():
        y = converted.double()(x.double())
        assert max(float((converted(torch.rot90(x.double(), k, (2, 3))) - y).norm() / y.norm())
                   for k in range(4)) <= TOL
    # the drift note against a measurement here: timm's model with its shortcut pools swapped by hand
    (note,) = [n for n in plan.notes if n.startswith("stride repair drift")]
    relative, agreement = map(float, re.search(r"change ([\d.e-]+) and top-1 agreement ([\d.e-]+)", note).groups())
    repaired = timm.create_model("resnet18d", pretrained=False).eval()
    repaired.load_state_dict(model.state_dict())
    for stage in (repaired.layer2, repaired.layer3, repaired.layer4):
        stage[0].downsample[0] = nn.AvgPool2d(3, 2, 1, ceil_mode=True, count_include_pad=False)
    images = torch.randn(DRIFT_IMAGES, 3, 33, 33, generator=torch.Generator().manual_seed(DRIFT_SEED))
    with torch.no_grad():
        before, after = model(images), repaired(images)
    assert relative == pytest.approx(float((after - before).norm() / before.norm()), rel=1e-5)
    assert agreement == pytest.approx(float((after.argmax(1) == before.argmax(1)).float().mean()), abs=1e-3)
    assert relative > 1e-3                 # the repair does change the model: the drift is not zero


def test_orbify_convert_refuses_without_the_repair_and_converts_with_it(tmp_path):
    out = tmp_path / "pair.orb"
    refused = CliRunner().invoke(app, ["convert", "test_stride_conflicts:build_parity_pair", "-o", out])
    assert refused.exit_code == 2 and "Traceback" not in refused.output and not out.exists(), refused.output
    text = " ".join(refused.output.split())
    assert "conflict between 'down' and 'short'" in text and "--repair-strides" in text, text
    result = CliRunner().invoke(app, ["convert", "test_stride_conflicts:build_parity_pair", "-o", out, "-g", "c4",
                                      "--repair-strides"])
    text = " ".join(result.output.split())
    assert result.exit_code == 0 and out.exists(), result.output
    assert "input size 223:" in text and "stride repair: 'short'" in text and "stride repair drift" in text, text


def test_a_repaired_model_saves_and_loads_repaired(tmp_path):
    timm = pytest.importorskip("timm")
    model = timm.create_model("resnet18d", pretrained=False).eval()   # timm's definition, random weights
    converted, plan = orbify.convert(model, "c4", example_input=torch.zeros(1, 3, 33, 33), repair_strides=True)
    path = orbify.save(converted, plan, tmp_path / "r18d.orb", reference="timm:resnet18d")
    loaded = orbify.load(path)
    x = torch.randn(2, 3, 33, 33)
    with torch.no_grad():
        torch.testing.assert_close(loaded.module(x), converted(x), rtol=0, atol=0)
    assert loaded.plan.repair_strides
