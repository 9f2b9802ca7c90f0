"""Whole-model conversion of torchvision architectures and of a small segmentation net."""

import pytest
import torch
import torchvision
from torch import nn

import robust_models
from orbify.conversion.converter import convert
from orbify.errors import TraceError, UnsupportedOpError
from orbify.graph.plan import Rounding
from orbify.graph.sizes import safe_sizes
from orbify.symmetry.groups import parse_group
from orbify.symmetry.layouts import Orbit, Plain
from orbify.transfer.recalibrate import recalibrate_batch_norm

TOL = 1e-5

# Safe sizes near 32 for each architecture (every strided op exact). Checked below with safe_sizes. The VGGs and
# alexnet (slow here for their large fully connected layers) are converted by tests/test_recipes.py (recipes vgg_bn
# and alexnet).
SMALL_SAFE = {
    "resnet18": 33, "resnet50": 33, "mobilenet_v2": 33, "mobilenet_v3_small": 33, "densenet121": 29,
    "efficientnet_b0": 33, "regnet_x_400mf": 33, "squeezenet1_1": 31, "shufflenet_v2_x0_5": 33,
    "shufflenet_v2_x1_0": 33,
}
HEAVY = {"resnet50", "densenet121"}


def calibrated(model: nn.Module, size: int, seed: int = 0) -> nn.Module:
    """Random-weight model with batch-norm statistics estimated on random inputs, so outputs are O(1)."""
    g = torch.Generator().manual_seed(seed)
    recalibrate_batch_norm(model, [torch.randn(8, 3, size, size, generator=g) for _ in range(2)])
    return model.eval()


def invariance_error(model, group, x, float64=True):
    """max_g ‖f(g·x) − f(x)‖/‖f(x)‖, in float64 by default.

    Random-weight backbones amplify float32 rounding: the plain original itself changes its logits
    by ~1e-5 relative when the same image is run in a different batch, so float32 cannot resolve
    1e-5. float64 isolates the structural error of the conversion (measured ~1e-14).
    """
    if float64:
        model, x = model.double(), x.double()
    with torch.no_grad():
        y = model(x)
        return max(float((model(group.act_grid(a, x)) - y).norm() / y.norm()) for a in range(group.order))


@pytest.mark.parametrize("group_name", ["c4", "d4"])
@pytest.mark.parametrize("name", [pytest.param(n, marks=pytest.mark.slow) if n in HEAVY else n for n in SMALL_SAFE])
def test_torchvision_models_become_invariant(name, group_name):
    # Architectures from torchvision's model definitions (random weights, eval mode).
    torch.manual_seed(0)
    size = SMALL_SAFE[name]
    original = torchvision.models.get_model(name, weights=None).eval()
    x = torch.randn(2, 3, size, size)
    converted, plan = convert(original, group_name, budget="channels", head="invariant", example_input=x)
    calibrated(converted, size)
    group = parse_group(group_name)
    assert invariance_error(converted, group, x) <= TOL
    assert invariance_error(converted.float(), group, x, float64=False) <= 1e-4
    # the plain original is not invariant, so the check above can fail
    assert invariance_error(calibrated(original, size), group, x.clone()) > 1e-3
    # converting leaves the original's outputs untouched (original weights unchanged)
    params_before = sum(p.numel() for p in original.parameters())
    params_after = sum(p.numel() for p in converted.parameters())
    # channels budget: parameters ÷ |G| up to the rounding of small widths to whole orbits
    assert params_before / params_after == pytest.approx(group.order, rel=0.03)


def test_original_untouched_by_conversion():
    torch.manual_seed(0)
    model = torchvision.models.resnet18().eval()
    state = {k: v.clone() for k, v in model.state_dict().items()}
    x = torch.randn(1, 3, 33, 33)
    with torch.no_grad():
        before = model(x)
    convert(model, "d4", example_input=x)
    with torch.no_grad():
        torch.testing.assert_close(model(x), before, rtol=0, atol=0)
    for k, v in model.state_dict().items():
        assert torch.equal(v, state[k])
    assert not any(hasattr(m, "parametrizations") for m in model.modules())


def test_safe_sizes_table_used_here_is_safe():
    for name, size in SMALL_SAFE.items():
        if name in HEAVY:
            continue
        model = torchvision.models.get_model(name, weights=None)
        assert size in safe_sizes(model, size, count=1)


@pytest.mark.parametrize("budget,ratio", [("channels", 1 / 4), ("params", 1.0), ("fields", 4.0)])
def test_budget_parameter_counts(budget, ratio):
    # docs/design.md §7 under c4 (|G| = 4) for an orbit→orbit 3×3 conv of C channels:
    # channels: C·C·9/4 (÷|G|); params: (C/2 orbits)·(2C channels)·9 = C·C·9 (≈ same); fields: C·4C·9 (×|G|).
    C = 16
    model = nn.Sequential(nn.Conv2d(C, C, 3, padding=1, bias=False))
    # a lifting layer first, so the conv under test reads an orbit layout
    net = nn.Sequential(nn.Conv2d(3, C, 1, bias=False), model, nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(C, 2))
    converted, plan = convert(net, "c4", budget=budget, example_input=torch.randn(1, 3, 9, 9))
    layer = plan.layer("1.0")
    conv = converted.get_submodule("1.0")
    assert sum(p.numel() for p in conv.parameters()) == int(C * C * 9 * ratio)
    assert isinstance(layer.layout_in, Orbit) and isinstance(layer.layout_out, Orbit)


class SegmentationNet(nn.Module):
    """Small encoder-decoder: strided convs down, transposed conv and upsampling up, skip concatenations."""

    def __init__(self, classes: int = 3):
        super().__init__()
        self.enc1 = nn.Sequential(nn.Conv2d(3, 16, 3, padding=1), nn.BatchNorm2d(16), nn.ReLU())
        self.enc2 = nn.Sequential(nn.Conv2d(16, 32, 4, stride=2, padding=1), nn.BatchNorm2d(32), nn.ReLU())
        self.enc3 = nn.Sequential(nn.Conv2d(32, 32, 4, stride=2, padding=1), nn.BatchNorm2d(32), nn.ReLU())
        self.up3 = nn.ConvTranspose2d(32, 32, 4, stride=2, padding=1)
        self.dec2 = nn.Sequential(nn.Conv2d(64, 32, 3, padding=1), nn.ReLU())
        self.up2 = nn.Upsample(scale_factor=2, mode="bilinear", align_corners=False)
        self.dec1 = nn.Sequential(nn.Conv2d(48, 16, 3, padding=1), nn.ReLU())
        self.head = nn.Conv2d(16, classes, 1)

    def forward(self, x):
        e1 = self.enc1(x)
        e2 = self.enc2(e1)
        e3 = self.enc3(e2)
        d2 = self.dec2(torch.cat([self.up3(e3), e2], 1))
        up = self.up2(d2)
        d1 = self.dec1(torch.cat([up, e1], 1))
        return self.head(d1)


@pytest.mark.parametrize("group_name", ["c4", "d4"])
def test_segmentation_map_head_is_equivariant(group_name):
    torch.manual_seed(0)
    net = SegmentationNet().eval()
    size = safe_sizes(net, 36, count=1)[0]
    assert size % 4 == 0   # two 4×4 stride-2 convs with padding 1 are exact on multiples of 4
    x = torch.randn(2, 3, size, size)
    converted, plan = convert(net, group_name, head="map", example_input=x)
    calibrated(converted, size)
    group = parse_group(group_name)
    converted, x = converted.double(), x.double()
    with torch.no_grad():
        y = converted(x)
        for a in range(group.order):
            moved = converted(group.act_grid(a, x))
            assert float((moved - group.act_grid(a, y)).norm() / y.norm()) <= TOL
    assert isinstance(plan.layer("head").layout_out, Plain)


def test_unsupported_op_names_the_node():
    with pytest.raises(UnsupportedOpError) as info:
        convert(robust_models.Shuffle(), "c4", example_input=torch.randn(1, 3, 9, 9))
    message = str(info.value)
    assert "channel shuffle in 4 groups of a value of 3 orbits" in message
    assert "graph node 'shuffle_blocks'" in message and "robust_models.py" in message and "orbit(" in message
    assert "--stop-at" in message


def test_untraceable_model_names_the_code():
    with pytest.raises(TraceError) as info:
        convert(robust_models.Branchy(), "c4", example_input=torch.randn(1, 3, 9, 9))
    assert "robust_models.py" in str(info.value) and "if y.mean() > 0" in str(info.value)
    assert "leaf" in str(info.value)


def test_non_divisible_grouped_conv_is_merged_or_refused():
    # 24 channels in 6 groups of 4 under d4 (|G| = 8): groups cannot hold whole orbits of 8, so they merge into 3.
    net = nn.Sequential(nn.Conv2d(3, 24, 1), nn.Conv2d(24, 24, 3, padding=1, groups=6), nn.AdaptiveAvgPool2d(1),
                        nn.Flatten(), nn.Linear(24, 2))
    converted, plan = convert(net, "d4", example_input=torch.randn(1, 3, 9, 9))
    layer = plan.layer("1")
    assert layer.groups == (6, 3) and any("merged" in n for n in layer.notes)
    group = parse_group("d4")
    assert invariance_error(converted.eval(), group, torch.randn(2, 3, 9, 9)) <= TOL


def test_width_rounding_recorded():
    net = nn.Sequential(nn.Conv2d(3, 10, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(10, 2))
    converted, plan = convert(net, "c4", example_input=torch.randn(1, 3, 9, 9))
    # 10 / |G| = 2.5 orbits rounds half up to 3 orbits = 12 channels
    assert plan.layer("0").channels_after == (3, 12)
    assert plan.layer("0").rounding == Rounding(channels=10, orbits=3, rounded=12)
    assert plan.roundings == ["rounded 10 channels to 3 whole orbits (12 channels)"]
    assert plan.roundings[0] in plan.layer("0").notes


def test_partial_conversion_stops_and_pools():
    torch.manual_seed(0)
    model = torchvision.models.resnet18().eval()
    x = torch.randn(2, 3, 33, 33)
    converted, plan = convert(model, "c4", example_input=x, stop_at="layer3")
    calibrated(converted, 33)
    assert isinstance(plan.layer("layer4.0.conv1").layout_in, Plain)
    assert invariance_error(converted, parse_group("c4"), x) <= TOL


def test_bad_options_list_choices():
    net = nn.Sequential(nn.Conv2d(3, 8, 3), nn.Flatten())
    for kwargs, text in [({"budget": "widths"}, "channels, params, fields"), ({"head": "pool"}, "invariant, map"),
                         ({"group": "q4"}, "cN"), ({"init": "embed"}, "fields")]:
        with pytest.raises(Exception) as info:
            convert(net, example_input=torch.randn(1, 3, 9, 9), **{"group": "c4", **kwargs})
        assert text in str(info.value)
