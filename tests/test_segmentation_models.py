"""torchvision's segmentation models convert with a map head exactly, and everything after conversion takes their
dict outputs.

The models are torchvision's own definitions (fcn_resnet50, deeplabv3_resnet50 and deeplabv3_mobilenet_v3_large with
their auxiliary heads, lraspp_mobilenet_v3_large, which has none), random weights, never downloaded. Equivariance is
measured here independently of orbify's check: the image is moved with torch.rot90 / torch.flip and every output map
('out' and 'aux') is compared with the output of the upright image moved the same way, in float64.

Random weights need one preparation: with torchvision's initial batch-norm statistics (mean 0, variance 1) the
signal of the MobileNet models dies on the way, and their class maps are the head's bias alone, a constant map
that every rotation keeps (measured: deeplabv3_mobilenet_v3_large's 'out' varies over the pixels by 1e-9, against
values near 0.04). The statistics are therefore estimated on random images first, and each test also asserts that the maps
vary over the pixels and that the plain original is not equivariant, so that the comparison can fail.

Sizes: 33 is safe for all four (orbify.safe_sizes, and the stride rule of tests/helpers.py written without
orbify): the ResNet backbones have three stride-2 ops (33 → 17 → 9 → 5; their last two stages are dilated),
the MobileNetV3 backbones four (33 → 17 → 9 → 5 → 3). All four are checked under c4, the MobileNet ones under d4
too (see CASES for why not the ResNet-50 ones); the whole file takes about 35 s of one core, ONNX export 7 s of it.
"""

from __future__ import annotations

import copy
import functools

import pytest
import torch
import torch.nn.functional as F
import torchvision
from torch import nn
from torch.nn.utils import parametrize

import orbify
from helpers import stride_rule_holds
from orbify.errors import ExportError
from orbify.files.export import output_difference, run_exported
from orbify.graph.sizes import ResamplingViolation, SizeChecker, StrideViolation
from orbify.verification.summary import diff_summaries, summarize

SIZE = 33
TOL = 1e-5
CLASSES = 3
# torchvision builder arguments: small class count, the auxiliary head where the family has one
MODELS = {
    "fcn_resnet50": {"aux_loss": True},
    "deeplabv3_resnet50": {"aux_loss": True},
    "deeplabv3_mobilenet_v3_large": {"aux_loss": True},
    "lraspp_mobilenet_v3_large": {},
}
# The group's moves as torch ops (torch.rot90 is the reference for quarter turns, torch.flip for mirrors),
# the identity first. Each is applied alike to an image and to a class map.
MOVES = {
    "c4": [functools.partial(torch.rot90, k=k, dims=(-2, -1)) for k in range(4)],
    "d4": [functools.partial(torch.rot90, k=k, dims=(-2, -1)) for k in range(4)]
          + [lambda t, k=k: torch.rot90(torch.flip(t, dims=(-1,)), k, dims=(-2, -1)) for k in range(4)],
}


def relative(a: torch.Tensor, b: torch.Tensor, centre: bool = False) -> float:
    """‖a − b‖ / ‖b‖; with ``centre``, / ‖b − its mean over the pixels‖ (see equivariance_errors)."""
    scale = b - b.mean(dim=(-2, -1), keepdim=True) if centre else b
    return float((a - b).norm() / scale.norm())


@functools.cache
def original(name: str) -> nn.Module:
    """torchvision's model with batch-norm statistics estimated on random images (see the module docstring)."""
    torch.manual_seed(0)
    model = torchvision.models.get_model(name, weights=None, weights_backbone=None, num_classes=CLASSES,
                                         **MODELS[name])
    generator = torch.Generator().manual_seed(1)
    orbify.recalibrate_batch_norm(model, [torch.randn(4, 3, SIZE, SIZE, generator=generator) for _ in range(2)])
    return model.eval()


@functools.cache
def converted(name: str, group: str, size: int = SIZE):
    return orbify.convert(original(name), group, head="map", example_input=torch.zeros(1, 3, size, size))


def equivariance_errors(model: nn.Module, x: torch.Tensor, group: str, dtype=torch.float64) -> dict[str, float]:
    """Per output: max over the moves g of ‖f(g·x) − g·f(x)‖ / ‖g·f(x) − its spatial mean‖, every view in one batch,
    in float64 by default (on a copy of ``model``). Measured against the part of the map that varies over the
    pixels, the only part a rotation can get wrong; the tied weights are expanded once (parametrize.cached)."""
    moves = MOVES[group]
    model, x = copy.deepcopy(model).to(dtype), x.to(dtype)
    with torch.no_grad(), parametrize.cached():
        outputs = model(torch.cat([move(x) for move in moves]))
    errors = {}
    for key, maps in outputs.items():
        maps = maps.unflatten(0, (len(moves), len(x)))
        errors[key] = max(relative(maps[i], move(maps[0]), centre=True) for i, move in enumerate(moves) if i)
    return errors


def images(count: int = 2, size: int = SIZE, seed: int = 2) -> torch.Tensor:
    return torch.randn(count, 3, size, size, generator=torch.Generator().manual_seed(seed))


# -- the four models convert exactly ---------------------------------------------------------------------------------
# The ResNet-50 models under c4 only: a float64 pass of their 8 d4 views takes ~2 s each on one core, and d4 adds
# nothing to what the MobileNet models check under d4 (the same rules convert both backbones' convs and norms).
CASES = [(name, "c4") for name in MODELS] + [(name, "d4") for name in MODELS if "mobilenet" in name]


@pytest.mark.parametrize("name,group", CASES)
def test_segmentation_model_converts_exactly(name, group):
    plain = original(name)
    assert SIZE in orbify.safe_sizes(plain, SIZE, count=1) and stride_rule_holds(plain, SIZE)
    model, plan = converted(name, group)
    assert plan.head == "map" and plan.group == group
    x = images(1)
    with torch.no_grad():
        outputs = model(x)
    keys = ["out", "aux"] if MODELS[name] else ["out"]
    assert list(outputs) == keys
    for y in outputs.values():
        assert y.shape == (1, CLASSES, SIZE, SIZE)
        # the maps vary over the pixels (measured: ≥ 0.009 of their norm): a constant map passes any rotation test
        assert relative(y, y.mean(dim=(-2, -1), keepdim=True).expand_as(y)) > 1e-3
    errors = equivariance_errors(model, x, group)
    assert set(errors) == set(keys) and max(errors.values()) <= TOL, errors
    # the plain original is not equivariant, so the measurement above can fail (float32 shows it)
    assert max(equivariance_errors(plain, x, group, torch.float32).values()) > 1e-2


# -- unsafe sizes are named and measured -----------------------------------------------------------------------------
def first_broken_module(model: nn.Module, size: int) -> str:
    """Path of the first strided conv/pool where (H + 2·padding − dilation·(kernel − 1) − 1) is not divisible by the
    stride (the stride rule of tests/helpers.py), read off forward hooks on torchvision's model without orbify."""
    broken: list[str] = []

    def hook(path):
        def record(module, inputs, _):
            side = inputs[0].shape[-1]
            k, s, p, d = (v[0] if isinstance(v, tuple) else v for v in (module.kernel_size, module.stride,
                                                                        module.padding, getattr(module, "dilation", 1)))
            if s > 1 and (side + 2 * p - d * (k - 1) - 1) % s:
                broken.append(path)
        return record

    handles = [m.register_forward_hook(hook(path)) for path, m in model.named_modules()
               if isinstance(m, (nn.Conv2d, nn.MaxPool2d))]
    with torch.no_grad():
        model(torch.zeros(1, 3, size, size))
    for handle in handles:
        handle.remove()
    return broken[0]


# 37 → 19 → 10: the ResNet's layer2 stride-2 convs read an even side. 45 → 23 → 12: MobileNetV3's stride-8 block
# (5×5, padding 2) reads an even side, before the auxiliary head's features. Both lie between safe sizes.
# (Not 41 for the MobileNet: 41 → 21 → 11 → 6 breaks only the stride-16 block, and its error reaches 'out' as
# 2e-5 of the map's spatial variation, 3e-6 of its norm, which the bias dominates; measured on these random weights.)
@pytest.mark.parametrize("name,unsafe", [("fcn_resnet50", 37), ("deeplabv3_mobilenet_v3_large", 45)])
def test_unsafe_size_is_named_and_breaks_equivariance(name, unsafe):
    plain = original(name)
    assert unsafe not in orbify.safe_sizes(plain, unsafe) and not stride_rule_holds(plain, unsafe)
    model, plan = converted(name, "c4", unsafe)
    x = images(1, unsafe)
    report = orbify.check_model(model, plain, plan, x, batch_size=1)
    assert not report.size.safe and report.size.safe_sizes
    assert f"call_module {first_broken_module(plain, unsafe)})" in report.size.first_violation_detail
    assert set(report.size.safe_sizes) <= set(orbify.safe_sizes(plain, unsafe))
    # both the check's error and the independent one show the broken grid (at the safe size both are ≤ 1e-5:
    # test_segmentation_model_converts_exactly and test_check_is_exact_at_a_safe_size)
    assert report.invariance_error > 1e-3
    assert max(equivariance_errors(model, x, "c4").values()) > 1e-3


def test_check_is_exact_at_a_safe_size():
    name = "deeplabv3_mobilenet_v3_large"
    model, plan = converted(name, "c4")
    report = orbify.check_model(model, original(name), plan, images(1), batch_size=1)
    assert report.size.safe and report.size.safe_sizes == [SIZE] and report.output_property == "equivariance"
    assert report.invariance_error <= TOL and len(report.output_element_errors) == 4


class DilatedStride(nn.Module):
    """A stride-2 conv with dilation 2 (kernel 2): its taps span 3 pixels, so odd sides are safe and even ones not —
    the reverse of the same conv without dilation."""

    def __init__(self):
        super().__init__()
        self.down = nn.Conv2d(3, 8, 2, stride=2, dilation=2)
        self.head = nn.Conv2d(8, 2, 1)

    def forward(self, x):
        return self.head(torch.relu(self.down(x)))


class Resampled(nn.Module):
    """A conv, a resampling with the given ``F.interpolate`` options, a 1×1 class head."""

    def __init__(self, **options):
        super().__init__()
        self.features = nn.Conv2d(3, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 2, 1)
        self.options = options

    def forward(self, x):
        return self.head(F.interpolate(torch.relu(self.features(x)), **self.options))


def map_error(model: nn.Module, size: int) -> float:
    """The converted ``model``'s largest equivariance error under c4 (torch.rot90) on two images, float64."""
    conversion, _ = orbify.convert(model.eval(), "c4", head="map", example_input=torch.zeros(1, 3, size, size))
    conversion, x = conversion.double(), images(2, size).double()
    with torch.no_grad():
        y = conversion(x)
        return max(relative(conversion(torch.rot90(x, k, (-2, -1))), torch.rot90(y, k, (-2, -1))) for k in (1, 2, 3))


# Bilinear to a given size (either align_corners) is what the segmentation models use; it is exact at any size.
# Nearest resampling to a size that is not a whole multiple, and a scale_factor whose output side is not whole
# (33 · 1.5 = 49.5 → 49), shift the sampling grid; 34 · 1.5 = 51 is whole. nn.Upsample is the module form.
@pytest.mark.parametrize("model,size,safe", [
    pytest.param(DilatedStride(), 33, True, id="dilated-stride-33"),
    pytest.param(DilatedStride(), 32, False, id="dilated-stride-32"),
    pytest.param(Resampled(size=40, mode="bilinear"), 33, True, id="bilinear-to-40"),
    pytest.param(Resampled(size=40, mode="bilinear", align_corners=True), 33, True, id="bilinear-corners-to-40"),
    pytest.param(Resampled(size=40, mode="nearest"), 33, False, id="nearest-to-40"),
    pytest.param(Resampled(scale_factor=2, mode="nearest"), 33, True, id="nearest-by-2"),
    pytest.param(Resampled(scale_factor=0.5, mode="nearest"), 34, False, id="nearest-by-half"),
    pytest.param(Resampled(scale_factor=1.5, mode="bilinear"), 33, False, id="bilinear-by-1.5-at-33"),
    pytest.param(Resampled(scale_factor=1.5, mode="bilinear"), 34, True, id="bilinear-by-1.5-at-34"),
    pytest.param(nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.Upsample(size=40), nn.Conv2d(8, 2, 1)), 33, False,
                 id="upsample-module-nearest-to-40"),
])
def test_safe_size_verdict_matches_measurement(model, size, safe):
    violations = SizeChecker(model).violations(size)
    error = map_error(model, size)
    if safe:
        assert not violations and error <= 1e-9
    else:
        assert violations and error > 1e-3
        kind = StrideViolation if isinstance(model, DilatedStride) else ResamplingViolation
        assert isinstance(violations[0], kind)
    if isinstance(model, DilatedStride):   # the stride rule of tests/helpers.py, written without orbify
        assert stride_rule_holds(model, size) == safe
        assert "dilation (2, 2)" in str(violations[0]) if violations else True


# -- the check measures every output -----------------------------------------------------------------------------------
class TwoOutputs(nn.Module):
    """'out' is exact once converted; 'aux' reads a nearest resampling by 1.5 (not exact). ``container`` packs them."""

    def __init__(self, container: str):
        super().__init__()
        self.features = nn.Conv2d(3, 8, 3, padding=1)
        self.out_head = nn.Conv2d(8, 2, 1)
        self.aux_head = nn.Conv2d(8, 2, 1)
        self.container = container

    def forward(self, x):
        features = torch.relu(self.features(x))
        out = self.out_head(features)
        aux = self.aux_head(F.interpolate(features, scale_factor=1.5, mode="nearest"))
        return {"out": out, "aux": aux} if self.container == "dict" else (out, aux)


@pytest.mark.parametrize("container", ["dict", "tuple"])
def test_check_measures_every_output(container):
    model = TwoOutputs(container).eval()
    model_converted, plan = orbify.convert(model, "d4", head="map", example_input=torch.zeros(1, 3, 9, 9))
    x = images(3, 9)
    report = orbify.check_model(model_converted, model, plan, x, batch_size=8)
    # independent: every output's error over the batch, each of the 8 moves
    model64, x64 = copy.deepcopy(model_converted).double(), x.double()
    with torch.no_grad():
        upright = model64(x64)
        pairs = [(model64(move(x64)), move) for move in MOVES["d4"][1:]]
    named = upright.items() if container == "dict" else enumerate(upright)
    errors = {key: max(relative(moved[key], move(y)) for moved, move in pairs) for key, y in named}
    out_key = "out" if container == "dict" else 0
    assert errors[out_key] <= TOL and max(errors.values()) > 1e-2   # only the second output is broken
    assert report.invariance_error == pytest.approx(max(errors.values()), rel=1e-6)


# -- summary, save and load, export of a model with a dict output --------------------------------------------------
# deeplabv3_mobilenet_v3_large: two outputs ('out', 'aux') and, on one core, as quick to export as
# lraspp_mobilenet_v3_large (which has 'out' alone).
EXPORTED = "deeplabv3_mobilenet_v3_large"


def test_summary_and_diff_of_a_segmentation_model():
    plain = original(EXPORTED)
    model, plan = converted(EXPORTED, "d4")
    x = images(1)
    shapes = {}
    hooks = [plain.get_submodule(path).register_forward_hook(lambda m, i, o, path=path: shapes.setdefault(path, o))
             for path in ("classifier.4", "aux_classifier.4")]
    with torch.no_grad():
        plain(x)
    for hook in hooks:
        hook.remove()
    summary = summarize(model, x, plan)
    rows = {row.target: row for row in summary.rows}
    for path, output in shapes.items():   # the class heads: plain maps, the shapes torchvision's model gives
        assert rows[path].layout_out == f"plain({CLASSES})"
        assert rows[path].output_shape == "×".join(map(str, output.shape[1:]))
    diff = diff_summaries(summarize(plain, x), summary)
    head = next(row for row in diff.rows if row.b is rows["classifier.4"])
    assert "params" in head.changed and "output_shape" not in head.changed
    assert diff.b.params == sum(p.numel() for p in model.parameters())


def test_save_and_load_keep_both_outputs(tmp_path):
    model, plan = converted(EXPORTED, "d4")
    reference = f"torchvision:{EXPORTED}?aux_loss=true&num_classes={CLASSES}"
    path = orbify.save(model, plan, tmp_path / "seg.orb", reference=reference)
    loaded = orbify.load(path)
    x = images(2)
    with torch.no_grad():
        expected, again = model.eval()(x), loaded.module(x)
    assert list(again) == ["out", "aux"] and loaded.plan.head == "map"
    for key in expected:
        assert torch.equal(again[key], expected[key])


# ONNX is the slowest case of the file (~7 s of the dynamo exporter on one core); pt2 ~3 s.
@pytest.mark.parametrize("format", ["pt2", "torchscript", pytest.param("onnx", marks=pytest.mark.slow)])
def test_export_keeps_both_outputs(tmp_path, format):
    if format == "onnx":
        pytest.importorskip("onnxscript")
        pytest.importorskip("onnxruntime")
    model, _ = converted(EXPORTED, "d4")
    x = images(3)
    path = orbify.export_model(model, x[:1], tmp_path / f"seg.{format}", format)
    exported = run_exported(path, format, x)
    with torch.no_grad():
        expected = model.eval()(x)
    assert isinstance(exported, dict) and list(exported) == ["out", "aux"]
    for key in expected:
        torch.testing.assert_close(exported[key], expected[key], rtol=1e-4, atol=1e-5)
    assert output_difference(exported, expected) <= 1e-4


def test_onnx_export_keeps_a_tuple_output(tmp_path):
    pytest.importorskip("onnxscript")
    pytest.importorskip("onnxruntime")
    model = TwoOutputs("tuple").eval()
    x = images(2, 9)
    path = orbify.export_model(model, x[:1], tmp_path / "two.onnx", "onnx")
    exported = run_exported(path, "onnx", x)
    with torch.no_grad():
        expected = model(x)
    assert isinstance(exported, tuple) and len(exported) == 2
    for a, b in zip(exported, expected):
        torch.testing.assert_close(a, b, rtol=1e-4, atol=1e-5)


def test_output_difference_refuses_other_structures():
    y = torch.ones(1, 2, 3, 3)
    assert output_difference({"out": y + 1e-3}, {"out": y}) == pytest.approx(1e-3, rel=1e-4)
    with pytest.raises(ExportError, match="keys"):
        output_difference({"out": y}, {"out": y, "aux": y})
    with pytest.raises(ExportError, match="tuple of 1"):
        output_difference((y,), y)
