"""Carrying pretrained weights over: orbit averaging, channel matching, lossless embedding.

The rules are in docs/design.md §4, §7 and §8.
"""

import copy

import numpy as np
import pytest
import torch
import torchvision
from torch import nn
from torch.nn.utils import parametrize

from orbify.conversion.converter import convert
from orbify.errors import OptionError
from orbify.experiments.digits import build_digits_cnn, load_digit_splits, train_digits_cnn
from orbify.graph.tracing import trace
from orbify.layers.bake import bake_model
from orbify.layers.tied import OrbitBatchNorm
from orbify.symmetry.groups import parse_group
from orbify.symmetry.layouts import Orbit, Plain
from orbify.symmetry.tying import TiedWeight
from orbify.transfer.channels import ChannelMap, feed
from orbify.transfer.loading import tied_residual
from orbify.transfer.matching import ChannelClasses, MatchTerm, match_channels, residual_totals
from orbify.transfer.recalibrate import recalibrate_batch_norm


def calibrated(model: nn.Module, size: int, seed: int = 0) -> nn.Module:
    """Random-weight model with batch-norm statistics estimated on random inputs, so outputs are O(1)."""
    g = torch.Generator().manual_seed(seed)
    recalibrate_batch_norm(model, [torch.randn(8, 3, size, size, generator=g) for _ in range(2)])
    return model.eval()


def relative(a: torch.Tensor, b: torch.Tensor) -> float:
    return float((a - b).norm() / b.norm())


def test_time_average(model: nn.Module, group, x: torch.Tensor) -> torch.Tensor:
    """Mean of the model's outputs over every group element applied to the input (test-time averaging)."""
    with torch.no_grad():
        return sum(model(group.act_grid(a, x)) for a in range(group.order)) / group.order


test_time_average.__test__ = False   # a helper, not a test


# -- embed ---------------------------------------------------------------------------------------

# resnet18 and mobilenet_v2: torchvision's model definitions, random weights; 33 is a safe size for both
# (checked in test_convert.py). d4 under `fields` makes a model eight times wider: resnet18 then takes 15 s, so d4
# is checked on mobilenet_v2 only.
EMBED_CASES = [("resnet18", "c4"), ("mobilenet_v2", "c4"), pytest.param("mobilenet_v2", "d4", marks=pytest.mark.slow)]


@pytest.mark.parametrize("name,group_name", EMBED_CASES)
def test_embed_equals_test_time_averaging(name, group_name, record_property):
    # The whole pipeline against the original torchvision model: with `fields` + `embed` the converted
    # model equals the original's logits averaged over the group. Measured in float64 (the model is
    # converted in float64), where the error is ~1e-15; float32 rounding in random-weight backbones is
    # amplified to ~1e-6 (tests/test_convert.py explains), so float32 is checked at the stated 1e-4.
    torch.manual_seed(0)
    group = parse_group(group_name)
    original = calibrated(torchvision.models.get_model(name, weights=None), 33).double()
    x = torch.randn(2, 3, 33, 33, dtype=torch.float64)
    converted, plan = convert(original, group, budget="fields", init="embed", example_input=x)
    converted.eval()
    with torch.no_grad():
        error64 = relative(converted(x), test_time_average(original, group, x))
    assert error64 <= 1e-9
    original, converted, x = original.float(), converted.float(), x.float()
    with torch.no_grad():
        error32 = relative(converted(x), test_time_average(original, group, x))
    assert error32 <= 1e-4
    record_property("embed_error_float64", error64)
    record_property("embed_error_float32", error32)
    # the original is not invariant, so the test-time average differs from its plain output
    with torch.no_grad():
        assert relative(original(x), test_time_average(original, group, x)) > 1e-3
    assert all(layer.weight_residual is None for layer in plan.layers)


def test_embed_on_trained_digits_cnn_equals_test_time_averaging(digits):
    # A trained model (scikit-learn's bundled digits, sklearn.datasets.load_digits) under d4.
    model, splits = digits
    group = parse_group("d4")
    x = splits.test_images[:64].double()
    original = copy.deepcopy(model).double()
    converted, _ = convert(original, group, budget="fields", init="embed", example_input=x[:2])
    with torch.no_grad():
        assert relative(converted.eval()(x), test_time_average(original, group, x)) <= 1e-9


class GroupedSegmenter(nn.Module):
    """A small dense-output net with a grouped conv, a transposed conv and a skip concatenation."""

    def __init__(self):
        super().__init__()
        self.enc = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU())
        self.down = nn.Sequential(nn.Conv2d(8, 8, 4, stride=2, padding=1, groups=2), nn.BatchNorm2d(8), nn.ReLU())
        self.up = nn.ConvTranspose2d(8, 8, 4, stride=2, padding=1)
        self.mix = nn.Conv2d(16, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 2, 1)

    def forward(self, x):
        e = self.enc(x)
        return self.head(torch.relu(self.mix(torch.cat([self.up(self.down(e)), e], 1))))


@pytest.mark.parametrize("group_name", ["c4", "d4"])
def test_embed_of_a_dense_output_equals_the_moved_back_average(group_name):
    # For a map head the test-time average moves every output back: mean over g of g·f(g⁻¹·x).
    torch.manual_seed(0)
    group = parse_group(group_name)
    net = GroupedSegmenter()
    recalibrate_batch_norm(net, [torch.randn(8, 3, 12, 12)])
    net = net.eval().double()
    x = torch.randn(2, 3, 12, 12, dtype=torch.float64)
    converted, _ = convert(net, group, budget="fields", head="map", init="embed", example_input=x)
    with torch.no_grad():
        expected = sum(group.act_grid(a, net(group.act_grid(group.inverse(a), x))) for a in range(group.order))
        assert relative(converted.eval()(x), expected / group.order) <= 1e-9


# -- orbit averaging -------------------------------------------------------------------------------

def test_orbit_average_of_bias_norm_affine_and_statistics():
    # Without matching, orbit o holds channels o·n … o·n+n−1; every per-channel vector is averaged per
    # orbit, and the running variance is that of the pooled slots (mean of var + mean², minus mean²).
    # Reference computed here with numpy in float64.
    torch.manual_seed(0)
    group = parse_group("c4")
    n = group.order
    net = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
                        nn.Conv2d(8, 8, 3, padding=1), nn.GroupNorm(2, 8), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                        nn.Linear(8, 3))
    with torch.no_grad():
        bn = net[1]
        bn.running_mean.uniform_(-1, 1)
        bn.running_var.uniform_(0.5, 2)
        for p in (bn.weight, bn.bias, net[4].weight, net[4].bias, net[0].bias, net[3].bias):
            p.uniform_(-1, 1)
    converted, _ = convert(net.eval(), group, example_input=torch.randn(1, 3, 9, 9), match=False)

    def orbit_mean(t):
        return t.detach().double().numpy().reshape(-1, n).mean(1)

    new_bn = converted.get_submodule("1")
    assert isinstance(new_bn, OrbitBatchNorm)
    mean, var = bn.running_mean.double().numpy(), bn.running_var.double().numpy()
    np.testing.assert_allclose(new_bn.running_mean.numpy(), orbit_mean(bn.running_mean), rtol=1e-6)
    pooled = (var + mean**2).reshape(-1, n).mean(1) - mean.reshape(-1, n).mean(1) ** 2
    np.testing.assert_allclose(new_bn.running_var.numpy(), pooled, rtol=1e-5)
    np.testing.assert_allclose(new_bn.weight.detach().numpy(), orbit_mean(bn.weight), rtol=1e-6)
    np.testing.assert_allclose(new_bn.bias.detach().numpy(), orbit_mean(bn.bias), rtol=1e-6)
    for conv in ("0", "3"):
        bias = converted.get_submodule(conv).bias.detach().numpy()
        np.testing.assert_allclose(bias, np.repeat(orbit_mean(net.get_submodule(conv).bias), n), rtol=1e-6)
    gn = converted.get_submodule("4")
    np.testing.assert_allclose(gn.weight.detach().numpy(), np.repeat(orbit_mean(net[4].weight), n), rtol=1e-6)


def test_projection_twice_is_projection_once_on_every_layer_of_a_model():
    # Whole-model counterpart of the single-module test in test_tied_modules.py: every tied layer of a
    # converted torchvision resnet18 holds a weight that Π leaves unchanged, and Π∘Π = Π on a random weight.
    torch.manual_seed(0)
    converted, _ = convert(torchvision.models.resnet18().eval(), "d4", example_input=torch.randn(1, 3, 33, 33))
    checked = 0
    for module in converted.modules():
        if not parametrize.is_parametrized(module, "weight"):
            continue
        tying = module.parametrizations.weight[0]
        with torch.no_grad():
            weight = module.weight
            transposed = isinstance(module, nn.ConvTranspose2d)
            assert tied_residual(module, weight, transposed) <= 1e-6
            once = tying(tying.right_inverse(torch.randn_like(weight)))
            torch.testing.assert_close(tying(tying.right_inverse(once)), once, rtol=1e-6, atol=1e-6)
        checked += 1
    assert checked == 21   # torchvision's resnet18: 20 convs and one linear layer


def test_reconverting_a_baked_model_is_lossless():
    # A converted model, baked to plain modules, is already tied under the identity assignment: every
    # layer's residual is ≤ 1e-6 and converting it again changes nothing.
    torch.manual_seed(0)
    x = torch.randn(2, 3, 33, 33)
    first, _ = convert(calibrated(torchvision.models.resnet18(), 33), "c4", example_input=x)
    baked = bake_model(first).eval()
    again, plan = convert(baked, "c4", example_input=x)
    residuals = [layer.weight_residual for layer in plan.layers if layer.weight_residual is not None]
    assert len(residuals) == 21 and max(residuals) <= 1e-6
    with torch.no_grad():
        assert relative(again.eval()(x), baked(x)) <= 1e-5


# -- matching ------------------------------------------------------------------------------------

@pytest.mark.parametrize("group_name", ["c4", "d4"])
@pytest.mark.parametrize("fibre,kernel", [(Plain(3), 3), (Orbit(2), 3), (Orbit(4), 1)])
def test_matching_recovers_a_hidden_tied_assignment(group_name, fibre, kernel):
    # A tied weight whose output channels were shuffled: the identity assignment leaves a large residual,
    # matching finds an assignment under which it is tied again.
    torch.manual_seed(0)
    group = parse_group(group_name)
    tying = TiedWeight(group, Orbit(4), fibre, (kernel, kernel))
    tied = tying(torch.randn(tying.base_shape))
    shuffled = tied[torch.randperm(tied.shape[0])]
    result = match_channels([MatchTerm(shuffled, tying)], torch.arange(tied.shape[0]))
    assert result.identity_residuals[0] > 0.5
    assert result.residuals[0] <= 1e-6
    assert sorted(result.source.tolist()) == list(range(tied.shape[0]))   # a permutation of the channels


def test_matching_with_noise_never_worse_than_identity_and_keeps_channel_counts():
    torch.manual_seed(1)
    group = parse_group("d4")
    tying = TiedWeight(group, Orbit(3), Orbit(2), (3, 3))
    for _ in range(5):
        weight = torch.randn(tying.full_shape)
        result = match_channels([MatchTerm(weight, tying)], torch.arange(24))
        assert result.residuals[0] <= result.identity_residuals[0] + 1e-9
        assert sorted(result.source.tolist()) == list(range(24))
    # wider than the original (params budget): each channel keeps the number of copies it had
    usage = torch.arange(24) % 20
    weight = torch.randn(20, *tying.full_shape[1:])
    result = match_channels([MatchTerm(weight, tying)], usage)
    assert torch.equal(torch.bincount(result.source, minlength=20), torch.bincount(usage, minlength=20))


def test_matching_keeps_grouped_blocks():
    torch.manual_seed(2)
    group = parse_group("c4")
    tying = TiedWeight(group, Orbit(4), Orbit(1), (3, 3))
    weight = torch.randn(16, *tying.full_shape[1:])
    result = match_channels([MatchTerm(weight, tying)], torch.arange(16), blocks=2)
    assert (result.source[:8] < 8).all() and (result.source[8:] >= 8).all()


class SmallResidualNet(nn.Module):
    """stem → [a → b → squeeze-excitation gate] + stem → pool → fc.

    The stem, b and the gate's second conv write the same channels (added or multiplied together).
    """

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 16, 3, padding=1)
        self.stem_bn = nn.BatchNorm2d(16)
        self.a = nn.Conv2d(16, 16, 3, padding=1)
        self.a_bn = nn.BatchNorm2d(16)
        self.b = nn.Conv2d(16, 16, 3, padding=1)
        self.b_bn = nn.BatchNorm2d(16)
        self.squeeze = nn.Conv2d(16, 8, 1)
        self.excite = nn.Conv2d(8, 16, 1)
        self.fc = nn.Linear(16, 5)

    def forward(self, x):
        s = torch.relu(self.stem_bn(self.stem(x)))
        y = self.b_bn(self.b(torch.relu(self.a_bn(self.a(s)))))
        y = y * torch.sigmoid(self.excite(torch.relu(self.squeeze(y.mean((2, 3), keepdim=True)))))
        return self.fc(torch.relu(y + s).mean((2, 3)))


def _permute(model: nn.Module, writers: list[str], norms: list[str], readers: list[str], perm: torch.Tensor) -> None:
    """Reorder channels in a way that keeps the function: rows of writers, norms, columns of readers."""
    with torch.no_grad():
        for name in writers:
            m = model.get_submodule(name)
            m.weight.copy_(m.weight[perm])
            m.bias.copy_(m.bias[perm])
        for name in norms:
            m = model.get_submodule(name)
            for t in (m.weight, m.bias, m.running_mean, m.running_var):
                t.copy_(t[perm])
        for name in readers:
            m = model.get_submodule(name)
            m.weight.copy_(m.weight[:, perm])


@pytest.mark.parametrize("group_name", ["c4", "d4"])
def test_matching_recovers_a_shuffled_converted_model(group_name):
    # Convert, bake to plain modules, then shuffle the channels in a function-preserving way (the stem,
    # b and the gate's excite conv share one order because they are added and multiplied). Converting the shuffled plain model again with
    # matching finds tied assignments (every residual ~0) and computes the same function; without
    # matching the residuals are large.
    torch.manual_seed(0)
    group = parse_group(group_name)
    x = torch.randn(4, 3, 9, 9)
    net = SmallResidualNet()
    recalibrate_batch_norm(net, [torch.randn(16, 3, 9, 9)])
    first, _ = convert(net.eval(), group, example_input=x, match=False)
    recalibrate_batch_norm(first, [torch.randn(16, 3, 9, 9)])
    plain = bake_model(first.eval())
    with torch.no_grad():
        expected = plain(x)
    _permute(plain, ["stem", "b", "excite"], ["stem_bn", "b_bn"], ["a", "squeeze", "fc"], torch.randperm(16))
    _permute(plain, ["a"], ["a_bn"], ["b"], torch.randperm(16))
    _permute(plain, ["squeeze"], [], ["excite"], torch.randperm(8))
    with torch.no_grad():
        torch.testing.assert_close(plain(x), expected, rtol=1e-5, atol=1e-5)
    matched, plan = convert(plain, group, example_input=x, match=True)
    assert plan.match
    assert max(layer.weight_residual for layer in plan.layers if layer.weight_residual is not None) <= 1e-5
    assert min(layer.weight_residual_identity for layer in plan.layers if layer.op == "Conv2d") > 0.3
    with torch.no_grad():
        assert relative(matched.eval()(x), expected) <= 1e-5
    _, unmatched = convert(plain, group, example_input=x, match=False)
    assert not unmatched.match
    assert residual_totals(unmatched)["matched"] > 0.3


def test_channel_classes_follow_residual_additions():
    # torchvision's resnet18 definition: BasicBlock adds its input (or the downsample branch) to the
    # output of conv2, so within a stage every block's conv2 writes the channels the stage reads; and
    # the first conv of every block starts a class of its own.
    gm = trace(torchvision.models.resnet18(), torch.randn(1, 3, 33, 33))
    classes = ChannelClasses(gm)
    node = {n.target: n for n in gm.graph.nodes if n.op == "call_module"}
    names = [p.target for p in classes.producers(node["layer2.0.conv2"])]
    assert names == ["layer2.0.conv2", "layer2.0.downsample.0", "layer2.1.conv2"]
    assert [p.target for p in classes.producers(node["layer1.1.conv2"])] == ["conv1", "layer1.0.conv2",
                                                                            "layer1.1.conv2"]
    assert [p.target for p in classes.producers(node["layer3.1.conv1"])] == ["layer3.1.conv1"]
    assert classes.blocks(node["layer4.0.conv1"]) == 1


def test_channel_classes_of_grouped_layers_and_inputs():
    # A grouped conv keeps the channels it reads in its groups; the graph input is never reassigned.
    net = nn.Sequential(nn.Conv2d(3, 16, 1), nn.Conv2d(16, 16, 3, padding=1, groups=4), nn.GroupNorm(2, 16))
    gm = trace(net, torch.randn(1, 3, 9, 9))
    classes = ChannelClasses(gm)
    nodes = {n.name: n for n in gm.graph.nodes}
    assert classes.blocks(nodes["_0"]) == 4 and classes.blocks(nodes["_1"]) == 4
    placeholder = next(n for n in gm.graph.nodes if n.op == "placeholder")
    assert classes.blocks(placeholder) is None


@pytest.fixture(scope="module")
def digits():
    # scikit-learn's bundled handwritten digits (sklearn.datasets.load_digits), 9s dropped, upright only.
    splits = load_digit_splits()
    return train_digits_cnn(splits, epochs=5, seed=0), splits


@pytest.mark.parametrize("group_name", ["c4", "d4"])
def test_matching_lowers_the_residual_of_a_trained_digits_cnn(digits, group_name, record_property):
    model, splits = digits
    x = splits.test_images
    with torch.no_grad():
        original = model(x).argmax(1)
    totals, agreement = {}, {}
    for match in (False, True):
        converted, plan = convert(model, group_name, example_input=x[:2], match=match)
        totals[match] = residual_totals(plan)
        with torch.no_grad():
            agreement[match] = float((converted(x).argmax(1) == original).float().mean())
        for layer in plan.layers:
            if layer.weight_residual is not None:
                assert layer.weight_residual <= layer.weight_residual_identity + 1e-6
    assert totals[True]["identity"] == pytest.approx(totals[False]["matched"], rel=1e-6)
    assert totals[True]["matched"] < totals[False]["matched"] - 0.01
    for match in (False, True):
        record_property(f"residual_{'matched' if match else 'identity'}", totals[match]["matched"])
        record_property(f"top1_agreement_{'matched' if match else 'identity'}", agreement[match])
    print(f"digits {group_name}: mean residual identity {totals[False]['matched']:.3f}, matched "
          f"{totals[True]['matched']:.3f}; top-1 agreement with the original on upright test digits: identity "
          f"{agreement[False]:.3f}, matched {agreement[True]:.3f}")


# -- options -------------------------------------------------------------------------------------

def test_structure_only_without_carrying_weights():
    torch.manual_seed(0)
    net = build_digits_cnn(16)
    x = torch.randn(2, 1, 9, 9)
    carried, plan = convert(net, "c4", example_input=x)
    bare, bare_plan = convert(net, "c4", example_input=x, carry_weights=False)
    assert {k: v.shape for k, v in carried.state_dict().items()} == {k: v.shape for k, v in bare.state_dict().items()}
    assert not bare_plan.match and all(layer.weight_residual is None for layer in bare_plan.layers)
    assert not torch.equal(carried.get_submodule("0").weight, bare.get_submodule("0").weight)
    bare.load_state_dict(carried.state_dict())
    with torch.no_grad():
        torch.testing.assert_close(bare.eval()(x), carried.eval()(x))


def test_calibration_option_equals_separate_recalibration():
    torch.manual_seed(0)
    net = build_digits_cnn(16).eval()
    x = torch.randn(2, 1, 9, 9)
    batches = [torch.randn(8, 1, 9, 9) for _ in range(3)]
    calibrated_model, plan = convert(net, "c4", example_input=x, calibration=batches)
    separate, _ = convert(net, "c4", example_input=x)
    assert recalibrate_batch_norm(separate, batches) == 24
    assert any("re-estimated on 24 calibration images" in note for note in plan.notes)
    for name in ("1", "4", "7"):
        torch.testing.assert_close(calibrated_model.get_submodule(name).running_var,
                                   separate.get_submodule(name).running_var)
    assert not calibrated_model.training


def test_recalibration_without_images_is_refused_and_keeps_statistics():
    net = build_digits_cnn(8)
    before = net[1].running_var.clone()
    with pytest.raises(OptionError) as info:
        recalibrate_batch_norm(net, [])
    assert "no images" in str(info.value)
    assert torch.equal(net[1].running_var, before)


def test_embedded_map_feeds_slot_zero_only():
    # 2 original channels, fields budget under an order-3 group: positions (o, s) → channel o.
    source = torch.tensor([0, 0, 0, 1, 1, 1])
    spread = ChannelMap.from_source(source, 2).dense_inflow()
    embedded = ChannelMap.embedded(source, 2, 3).dense_inflow()
    torch.testing.assert_close(spread, torch.tensor([[1 / 3] * 3 + [0.0] * 3, [0.0] * 3 + [1 / 3] * 3]))
    torch.testing.assert_close(embedded, torch.tensor([[1.0, 0, 0, 0, 0, 0], [0, 0, 0, 1.0, 0, 0]]))
    weight = torch.arange(4.0).reshape(2, 2)
    torch.testing.assert_close(feed(weight, ChannelMap.embedded(source, 2, 3)), weight @ embedded)
    torch.testing.assert_close(feed(weight, ChannelMap.from_source(source, 2).pooled(3)), weight)


def test_matching_note_for_fields_budget():
    net = build_digits_cnn(8)
    _, plan = convert(net, "c4", budget="fields", example_input=torch.randn(1, 1, 9, 9), match=True)
    assert not plan.match and any("matching" in note for note in plan.notes)
    with pytest.raises(OptionError):
        convert(net, "c4", budget="channels", init="embed", example_input=torch.randn(1, 1, 9, 9))
