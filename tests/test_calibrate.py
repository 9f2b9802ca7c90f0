"""Calibrated conversion (orbify.calibration.calibrate): agreement with the group-averaged original on scikit-learn's
digits, the refit against a brute-force ridge regression from scikit-learn, every layer kind refitted and
invariant, the fallback, bounded memory, bad input, and two torchvision backbones."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from sklearn.linear_model import Ridge
from torch import nn

from orbify import convert, parse_group, recalibrate_batch_norm
from orbify.calibration.calibrate import calibrate_conversion
from orbify.errors import DataError, OptionError
from orbify.experiments.digits import load_digit_splits, train_digits_cnn


def max_invariance_error(model: nn.Module, group, images: torch.Tensor) -> float:
    """max over g of ‖f(g·x) − f(x)‖ / ‖f(x)‖, in float64."""
    model = model.double()
    images = images.double()
    with torch.no_grad():
        upright = model(images)
        return max(float((model(group.act_grid(g, images)) - upright).norm() / upright.norm())
                   for g in range(group.order))


def group_average(model: nn.Module, group, images: torch.Tensor) -> torch.Tensor:
    with torch.no_grad():
        return torch.stack([model(group.act_grid(g, images)) for g in range(group.order)]).mean(0)


# -- the job: digits ------------------------------------------------------------------------------
@pytest.mark.parametrize("group_name", ["c4", "d4"])
def test_calibrated_digits_model_agrees_with_the_group_averaged_original(group_name):
    # Data: scikit-learn's bundled digits (sklearn.datasets.load_digits, the UCI optical recognition of
    # handwritten digits set), loaded by orbify.experiments.digits; nothing is downloaded.
    group = parse_group(group_name)
    splits = load_digit_splits(seed=0)
    original = train_digits_cnn(splits, epochs=8, seed=0, augment_group=group)
    test = splits.test_images
    target = group_average(original, group, test).argmax(1)

    averaged, _ = convert(original, group, example_input=test[:1])
    calibrated, plan = convert(original, group, example_input=test[:1])
    report = calibrate_conversion(calibrated, plan, original, splits.train_images[:256], progress=False)
    with torch.no_grad():
        before = float((averaged(test).argmax(1) == target).float().mean())
        after = float((calibrated(test).argmax(1) == target).float().mean())

    assert after >= 0.5, f"calibrated agreement {after:.3f} on held-out digits"
    assert before < 0.3, f"orbit averaging agreed {before:.3f}: the comparison lost its point"
    assert report.agreement >= 0.5 and not report.fallbacks
    assert max_invariance_error(calibrated, group, test[:16]) < 1e-9
    assert any("calibrated on 256 images" in note for note in plan.notes)
    assert all(any(n.startswith("calibrated: least squares") for n in plan.layer(layer.name).notes)
               for layer in report.layers)


# -- the refit against a brute-force ridge regression ----------------------------------------------
def _small_net() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(1, 8, 3, padding=1), nn.ReLU(), nn.Conv2d(8, 8, 3, padding=1), nn.ReLU(),
                         nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 3)).eval()


@pytest.mark.parametrize("group_name", ["c4", "d4"])
def test_refit_equals_ridge_regression_on_every_transformed_copy(group_name):
    """The symmetrised normal equations equal an explicit ridge fit (scikit-learn) on all copies of the images."""
    group = parse_group(group_name)
    original = _small_net().double()   # float64 throughout, so the two solutions agree to the solver's precision
    images = torch.rand(48, 1, 9, 9, generator=torch.Generator().manual_seed(2), dtype=torch.float64)
    converted, plan = convert(original, group, example_input=images[:1])
    report = calibrate_conversion(converted, plan, original, images, batch_size=16, ridge=1e-3, progress=False)
    copies = [group.act_grid(h, images) for h in range(group.order)]
    layer = converted.get_submodule

    # the hidden conv: slot 0 of every orbit fitted to the kept original channel on every copy
    hidden = next(layer for layer in report.layers if layer.target == "2")
    with torch.no_grad():
        features = torch.cat([F.unfold(F.relu(layer("0")(x)), 3, padding=1).transpose(1, 2).reshape(-1, 72)
                              for x in copies]).numpy()
        targets = torch.cat([original[:3](x)[:, hidden.channels].permute(0, 2, 3, 1).reshape(-1, len(hidden.channels))
                             for x in copies]).double().numpy()
    alpha = 1e-3 * (features**2).sum(0).mean()
    reference = Ridge(alpha=alpha, fit_intercept=True, solver="cholesky").fit(features, targets)
    conv = layer("2")
    base = conv.parametrizations.weight.original.detach().reshape(len(hidden.channels), 72).numpy()
    bias = conv.parametrizations.bias.original.detach().numpy()
    assert abs(base - reference.coef_).max() < 1e-8 * abs(reference.coef_).max()
    assert abs(bias - reference.intercept_).max() < 1e-8 * abs(reference.coef_).max()

    # the classifier: the orbit sums of the pooled features fitted to the original's logits on every copy
    with torch.no_grad():
        pooled = torch.cat([F.relu(layer("2")(F.relu(layer("0")(x)))).mean((2, 3)) for x in copies])
        sums = pooled.reshape(pooled.shape[0], -1, group.order).sum(2).numpy()
        logits = torch.cat([original(x) for x in copies]).numpy()
    alpha = 1e-3 * (sums**2).sum(0).mean()
    reference = Ridge(alpha=alpha, fit_intercept=True, solver="cholesky").fit(sums, logits)
    head = layer("6")
    base = head.parametrizations.weight.original.detach().numpy()
    assert abs(base - reference.coef_).max() < 1e-8 * abs(reference.coef_).max()
    assert abs(head.bias.detach().numpy() - reference.intercept_).max() < 1e-8 * abs(reference.coef_).max()


# -- every layer kind ------------------------------------------------------------------------------
class Mixed(nn.Module):
    """Depthwise conv with a residual add, a grouped strided conv, squeeze-excitation, a linear head."""

    def __init__(self):
        super().__init__()
        torch.manual_seed(3)
        self.stem = nn.Conv2d(3, 16, 3, padding=1, bias=False)
        self.stem_norm = nn.BatchNorm2d(16)
        self.depthwise = nn.Conv2d(16, 16, 3, padding=1, groups=16, bias=False)
        self.depthwise_norm = nn.BatchNorm2d(16)
        self.grouped = nn.Conv2d(16, 16, 3, stride=2, padding=1, groups=2, bias=False)
        self.grouped_norm = nn.BatchNorm2d(16)
        self.squeeze = nn.Conv2d(16, 8, 1)
        self.excite = nn.Conv2d(8, 16, 1)
        self.head = nn.Linear(16, 5)

    def forward(self, x):
        x = F.relu(self.stem_norm(self.stem(x)))
        x = self.depthwise_norm(self.depthwise(x)) + x
        x = F.relu(self.grouped_norm(self.grouped(x)))
        scale = torch.sigmoid(self.excite(F.relu(self.squeeze(F.adaptive_avg_pool2d(x, 1)))))
        x = x * scale
        return self.head(torch.flatten(F.adaptive_avg_pool2d(x, 1), 1))


def _mixed() -> tuple[nn.Module, torch.Tensor]:
    model = Mixed()
    images = torch.rand(48, 3, 17, 17, generator=torch.Generator().manual_seed(4))
    recalibrate_batch_norm(model, [images])
    return model.eval(), images


@pytest.mark.parametrize("selection", ["reconstruction", "importance"])
def test_depthwise_grouped_excitation_and_heads_are_refitted_and_stay_invariant(selection):
    group = parse_group("c4")
    original, images = _mixed()
    converted, plan = convert(original, group, example_input=images[:1])
    report = calibrate_conversion(converted, plan, original, images, batch_size=16, selection=selection,
                                  progress=False)
    assert {layer.target for layer in report.layers} == {"stem", "depthwise", "grouped", "squeeze", "excite", "head"}
    assert not report.fallbacks
    assert all(0 <= layer.error < 1 for layer in report.layers), report.layers
    # a residual add joins the stem and the depthwise conv: both keep the same channels
    kept = {layer.target: layer.channels for layer in report.layers}
    assert kept["stem"] == kept["depthwise"]
    assert kept["excite"] == kept["grouped"]   # the excitation scales the grouped conv's channels
    # the grouped conv reads 2 blocks of 8 channels: 2 kept in each block
    assert sorted(c // 8 for c in kept["stem"]) == [0, 0, 1, 1]
    assert max_invariance_error(converted, group, images[:8]) < 1e-9
    assert report.agreement is not None


def test_a_small_memory_budget_recomputes_and_gives_the_same_model():
    group = parse_group("c4")
    original, images = _mixed()
    results = []
    for budget in (0, 2**30):
        converted, plan = convert(original, group, example_input=images[:1])
        report = calibrate_conversion(converted, plan, original, images, batch_size=16, cache_bytes=budget,
                                      progress=False)
        results.append((converted.state_dict(), report))
    (bounded, bounded_report), (cached, cached_report) = results
    assert bounded_report.recomputed > 0 and cached_report.recomputed == 0
    for name, value in cached.items():
        torch.testing.assert_close(bounded[name], value, rtol=1e-5, atol=1e-6)


def test_a_layer_that_cannot_be_refitted_falls_back_to_orbit_averaging_with_a_note():
    torch.manual_seed(5)
    original = nn.Sequential(nn.Conv2d(1, 8, 3, stride=2, padding=1), nn.ReLU(),
                             nn.ConvTranspose2d(8, 4, 3, stride=2, padding=1)).eval()
    images = torch.rand(32, 1, 17, 17, generator=torch.Generator().manual_seed(6))
    group = parse_group("c4")
    converted, plan = convert(original, group, head="map", example_input=images[:1])
    report = calibrate_conversion(converted, plan, original, images, progress=False)
    (fallback,) = report.fallbacks
    assert fallback.target == "2" and "transposed" in fallback.note
    assert any("orbit average" in note for note in plan.layer("2").notes)
    with torch.no_grad():
        x = images[:4].double()
        model = converted.double()
        y = model(x)
        assert max(float((model(group.act_grid(g, x)) - group.act_grid(g, y)).norm() / y.norm())
                   for g in range(group.order)) < 1e-9


def test_bad_calibration_input_is_refused():
    original = _small_net()
    converted, plan = convert(original, "c4", example_input=torch.zeros(1, 1, 9, 9))
    for images in ([], torch.zeros(4, 9, 9), torch.zeros(4, 1, 9, 9, dtype=torch.long)):
        with pytest.raises(DataError, match="float tensors of shape"):
            calibrate_conversion(converted, plan, original, images, progress=False)
    with pytest.raises(OptionError, match="selection"):
        calibrate_conversion(converted, plan, original, torch.zeros(4, 1, 9, 9), selection="largest", progress=False)


# -- large backbones ---------------------------------------------------------------------------
@pytest.mark.slow
@pytest.mark.parametrize("name", ["resnet18"])
def test_torchvision_backbones_calibrate_every_layer_and_stay_invariant(name):
    """Small images and few of them (benchmarks/calibrated_digits.py --backbones times resnet18 and mobilenet_v2 on
    256 images of 65 px): every layer of the torchvision definition is refitted, its 3×3 convs of 512 inputs
    (4,608 features) included, none falls back, and the result is invariant. Depthwise, grouped and
    squeeze-excitation layers: test_depthwise_grouped_excitation_and_heads_are_refitted_and_stay_invariant."""
    torchvision = pytest.importorskip("torchvision")
    torch.manual_seed(0)
    original = getattr(torchvision.models, name)(weights=None, num_classes=10)   # random weights
    generator = torch.Generator().manual_seed(7)
    recalibrate_batch_norm(original, [torch.randn(32, 3, 33, 33, generator=generator) for _ in range(2)])
    original.eval()
    images = torch.randn(32, 3, 33, 33, generator=generator)
    group = parse_group("d4")
    converted, plan = convert(original, group, example_input=images[:1], match=False)
    report = calibrate_conversion(converted, plan, original, images, progress=False)
    assert not report.fallbacks
    assert report.agreement is not None
    # float64: random-weight backbones amplify float32 rounding to ~1e-5 (see docs/design.md §12)
    assert max_invariance_error(converted, group, images[:2]) <= 1e-5
