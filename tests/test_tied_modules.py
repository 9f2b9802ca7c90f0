"""Every tied module commutes with every exact group, before and after baking."""

import copy

import numpy as np
import pytest
import torch
from torch import nn
from torch.nn.utils import parametrize

from helpers import max_equivariance_error
from orbify.layers.tied import OrbitBatchNorm, OrbitPool, bake, tie_affine, tie_conv, tie_linear
from orbify.symmetry.groups import parse_group
from orbify.symmetry.layouts import Flat, Orbit, Plain
from orbify.symmetry.tying import TiedWeight, fibre_index, project, weight_residual

EXACT = ["c2", "c4", "d1", "d2", "d4"]
TOL = 1e-5


def _check(module, group, x, lin, lout):
    module.eval()
    assert max_equivariance_error(module, group, x, lin, lout) <= TOL
    baked = bake(copy.deepcopy(module))
    assert not parametrize.is_parametrized(baked)
    assert max_equivariance_error(baked, group, x, lin, lout) <= TOL
    with torch.no_grad():
        torch.testing.assert_close(baked(x), module(x), rtol=1e-5, atol=1e-6)


CONV_CASES = [
    # (in kind, out kind, kernel, stride, padding, dilation, groups, size)
    ("plain", "orbit", 3, 1, 1, 1, 1, 9),
    ("orbit", "orbit", 3, 2, 1, 1, 1, 9),   # (9 + 2 - 3) % 2 == 0: a safe size
    ("orbit", "orbit", 5, 1, 4, 2, 1, 8),
    ("orbit", "plain", 3, 1, 0, 1, 1, 7),
    ("orbit", "orbit", 1, 1, 0, 1, 1, 5),
    ("orbit", "orbit", 3, 1, 1, 1, "depthwise", 6),
    ("orbit", "orbit", 3, 1, 1, 1, 2, 6),   # two groups of whole orbits
    ("plain", "plain", 3, 1, 1, 1, 1, 6),   # invariant kernels (after an orbit pool)
    ("orbit", "orbit", 2, 2, 0, 1, 1, 8),   # even kernel, stride 2 on an even size
]


@pytest.mark.parametrize("name", EXACT)
@pytest.mark.parametrize("case", CONV_CASES, ids=lambda c: "-".join(map(str, c)))
def test_conv_equivariant(name, case):
    group = parse_group(name)
    kin, kout, k, stride, padding, dilation, groups, size = case
    lin = Orbit(2 * (1 if groups == 1 else 2)) if kin == "orbit" else Plain(3)
    lout = Orbit(2 * (1 if groups == 1 else 2)) if kout == "orbit" else Plain(4)
    cin, cout = lin.size(group), lout.size(group)
    groups = cin if groups == "depthwise" else groups
    if groups == cin:
        lout = lin
        cout = cin
    conv = nn.Conv2d(cin, cout, k, stride=stride, padding=padding, dilation=dilation, groups=groups, bias=True)
    tie_conv(conv, group, lin, lout)
    x = torch.randn(2, cin, size, size)
    _check(conv, group, x, lin, lout)


@pytest.mark.parametrize("name", EXACT)
def test_transposed_conv_equivariant(name):
    group = parse_group(name)
    lin, lout = Orbit(2), Orbit(1)
    conv = nn.ConvTranspose2d(lin.size(group), lout.size(group), 4, stride=2, padding=1)
    tie_conv(conv, group, lin, lout)
    _check(conv, group, torch.randn(2, lin.size(group), 5, 5), lin, lout)


@pytest.mark.parametrize("name", EXACT)
@pytest.mark.parametrize("kinds", [("orbit", "orbit"), ("orbit", "plain"), ("plain", "orbit"), ("flat", "plain"), ("flat", "orbit")])
def test_linear_equivariant(name, kinds):
    group = parse_group(name)
    layouts = {"orbit": Orbit(3), "plain": Plain(5), "flat": Flat(Orbit(1), 3, 3)}
    lin, lout = layouts[kinds[0]], layouts[kinds[1]]
    linear = nn.Linear(lin.size(group), lout.size(group))
    tie_linear(linear, group, lin, lout)
    _check(linear, group, torch.randn(4, lin.size(group)), lin, lout)


@pytest.mark.parametrize("name", EXACT)
@pytest.mark.parametrize("training", [False, True])
def test_batch_norm_shares_statistics(name, training):
    group = parse_group(name)
    plain = nn.BatchNorm2d(3 * group.order)
    with torch.no_grad():
        plain.running_mean.normal_()
        plain.running_var.uniform_(0.5, 2)
        plain.weight.normal_()
        plain.bias.normal_()
    bn = OrbitBatchNorm.from_plain(plain, group)
    layout = Orbit(3)
    x = torch.randn(4, layout.size(group), 6, 6)
    if training:
        bn.train()
        assert max_equivariance_error(bn, group, x, layout, layout) <= TOL
    else:
        _check(bn, group, x, layout, layout)


def _orbit_batch_norm_numpy(x: np.ndarray, orbits: int, eps: float) -> np.ndarray:
    """Batch norm with statistics pooled over batch, slots and pixels of each orbit, written with numpy."""
    b, c, h, w = x.shape
    grouped = x.reshape(b, orbits, c // orbits, h, w)
    mean = grouped.mean(axis=(0, 2, 3, 4), keepdims=True)
    var = grouped.var(axis=(0, 2, 3, 4), keepdims=True)   # biased, as batch norm normalises
    return ((grouped - mean) / np.sqrt(var + eps)).reshape(x.shape)


def test_orbit_batch_norm_output_is_no_view_and_an_in_place_activation_keeps_its_gradient():
    # The output must not be an autograd view of the batch-norm result: an in-place activation after a
    # view makes autograd rebuild the whole gradient through CopySlices (benchmarks/README.md, training
    # step: mobilenet_v2's tied step cost 1.21× the original because of it).
    group = parse_group("d4")
    bn = OrbitBatchNorm(3, group.order, dtype=torch.float64).train()
    twin = copy.deepcopy(bn)
    x = torch.randn(4, 3 * group.order, 5, 5, dtype=torch.float64, requires_grad=True)
    out = bn(x)
    assert out._base is None and out.is_contiguous()
    np.testing.assert_allclose(out.detach().numpy(), _orbit_batch_norm_numpy(x.detach().numpy(), 3, bn.eps),
                               rtol=1e-10, atol=1e-10)
    weights = torch.randn_like(x)
    in_place, = torch.autograd.grad((torch.relu_(out) * weights).sum(), x)
    out_of_place, = torch.autograd.grad((torch.relu(twin(x)) * weights).sum(), x)
    torch.testing.assert_close(in_place, out_of_place, rtol=0, atol=0)
    torch.testing.assert_close(bn.running_var, twin.running_var, rtol=0, atol=0)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_orbit_batch_norm_pools_slot_statistics_in_the_source_dtype(dtype):
    # Reference: numpy's variance of samples drawn with exactly each slot's mean and variance and pooled
    # per orbit. Means of 1,000 beside variances of 0.01 defeat E[x²] − E[x]² in float32 (its spacing
    # near 10⁶ is 0.06); the pooled variance must still come out to float32 precision.
    group = parse_group("c4")
    orbits, n = 3, group.order
    rng = np.random.default_rng(0)
    means = 1000 + rng.normal(0, 0.1, orbits * n)
    variances = rng.uniform(0.005, 0.02, orbits * n)
    unit = rng.standard_normal(4096)
    unit = (unit - unit.mean()) / unit.std()
    samples = (means[:, None] + np.sqrt(variances)[:, None] * unit).reshape(orbits, n * unit.size)
    plain = nn.BatchNorm2d(orbits * n, dtype=dtype)
    with torch.no_grad():
        plain.running_mean.copy_(torch.from_numpy(means))
        plain.running_var.copy_(torch.from_numpy(variances))
    bn = OrbitBatchNorm.from_plain(plain, group)
    assert bn.running_var.dtype == bn.weight.dtype == dtype
    rtol = 1e-12 if dtype == torch.float64 else 1e-4
    np.testing.assert_allclose(bn.running_mean.double().numpy(), samples.mean(1), rtol=rtol)
    np.testing.assert_allclose(bn.running_var.double().numpy(), samples.var(1), rtol=rtol)


def test_tying_without_projection_leaves_the_base_to_be_loaded(monkeypatch):
    # project=False skips Π on a weight about to be overwritten; what is loaded next is projected as usual.
    group = parse_group("d4")
    conv, linear = nn.Conv2d(3, 16, 3), nn.Linear(16, 5)
    projected_conv, projected_linear = copy.deepcopy(conv), copy.deepcopy(linear)
    tie_conv(projected_conv, group, Plain(3), Orbit(2))
    tie_linear(projected_linear, group, Orbit(2), Plain(5))

    def refuse(self, weight):
        raise AssertionError("projected a weight that is about to be overwritten")

    with monkeypatch.context() as patch:
        patch.setattr(TiedWeight, "right_inverse", refuse)
        tie_conv(conv, group, Plain(3), Orbit(2), project=False)
        tie_linear(linear, group, Orbit(2), Plain(5), project=False)
    for module, reference in ((conv, projected_conv), (linear, projected_linear)):
        assert module.parametrizations.weight.original.shape == reference.parametrizations.weight.original.shape
        loaded = torch.randn(module.weight.shape)
        module.weight, reference.weight = loaded, loaded
        torch.testing.assert_close(module.weight, reference.weight, rtol=0, atol=0)


@pytest.mark.parametrize("name", EXACT)
def test_layer_and_group_norm_affine(name):
    group = parse_group(name)
    layout = Orbit(4)
    c = layout.size(group)
    for norm in (nn.GroupNorm(2, c), nn.GroupNorm(4, c)):
        with torch.no_grad():
            norm.weight.normal_()
            norm.bias.normal_()
        tie_affine(norm, group, layout)
        _check(norm, group, torch.randn(2, c, 4, 4), layout, layout)


@pytest.mark.parametrize("name", EXACT)
@pytest.mark.parametrize("mode", ["mean", "max"])
def test_orbit_pool_invariant(name, mode):
    group = parse_group(name)
    pool = OrbitPool(group.order, mode)
    x = torch.randn(2, Orbit(3).size(group), 5, 5)
    assert max_equivariance_error(pool, group, x, Orbit(3), Plain(3)) <= TOL


@pytest.mark.parametrize("name", EXACT)
def test_projection_idempotent_and_tied(name):
    group = parse_group(name)
    for lout, lin, kernel in [(Orbit(2), Orbit(3), (3, 3)), (Plain(2), Orbit(3), (3, 3)), (Orbit(2), Plain(3), (5, 5))]:
        w = torch.randn(lout.size(group), lin.size(group), *kernel, dtype=torch.float64)
        once = project(group, w, lout, lin)
        torch.testing.assert_close(project(group, once, lout, lin), once)
        assert weight_residual(group, once, lout, lin) <= 1e-6
        assert weight_residual(group, w, lout, lin) > 0.1


def _orbits_of_kernel(group, k):
    # Number of orbits of k×k kernel offsets under the pixel action (counted by brute force with numpy
    # rot90/flip, independent of the project's index machinery).
    import numpy as np

    seen, orbits = set(), 0
    for y in range(k * k):
        if y in seen:
            continue
        orbits += 1
        grid = np.zeros((k, k), dtype=bool)
        grid.flat[y] = True
        for kk, m in group.elements:
            moved = np.rot90(np.flip(grid, -1) if m else grid, kk * (4 // group.rotations))
            seen.add(int(np.argmax(moved)))
    return orbits


@pytest.mark.parametrize("name", EXACT)
def test_parameter_counts_match_budget_formula(name):
    # docs/design.md §7: an orbit-out layer stores f_out · (fibre size) numbers; an orbit→orbit conv
    # with C = f·|G| channels on both sides stores C_out·C_in·k² / |G| (the `channels` budget's ÷|G|).
    group = parse_group(name)
    n = group.order
    f_in, f_out, k = 3, 2, 3
    cases = [
        (Orbit(f_in), Orbit(f_out), f_out * n * f_in * n * k * k // n),     # C_out·C_in·k²/|G|
        (Plain(3), Orbit(f_out), f_out * 3 * k * k),                        # lifting
        (Orbit(f_in), Plain(5), 5 * f_in * k * k),                          # slots are a free orbit: f_in·k² per output
        (Plain(3), Plain(5), 5 * 3 * _orbits_of_kernel(group, k)),          # invariant kernels
    ]
    for lin, lout, expected in cases:
        conv = nn.Conv2d(lin.size(group), lout.size(group), k, bias=False)
        tie_conv(conv, group, lin, lout)
        stored = sum(p.numel() for p in conv.parameters())
        assert stored == expected, (lin, lout)


def test_index_per_in_fibre_not_per_weight():
    # The gather index covers one in-fibre per group element, never every weight element.
    group = parse_group("d4")
    tying = TiedWeight(group, Orbit(512), Flat(Orbit(64), 7, 7), ())
    assert tying.index.numel() == group.order * 64 * group.order * 49
    assert fibre_index(group, Orbit(64), (3, 3)).shape == (8, 64 * 8 * 9)
