"""timm's vision transformers: attention written out with head reshapes and scaled_dot_product_attention.

References outside the project: ``numpy.rot90`` / ``numpy.flip`` on the token grid, ``torch.rot90`` / ``torch.flip``
on images, ``torch.nn.functional.scaled_dot_product_attention`` and ``torch.nn.functional.interpolate`` themselves,
and timm's own model definitions (``timm.create_model(..., pretrained=False)``, ``VisionTransformer``, ``Attention``).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import orbify
from orbify.errors import UnsupportedOpError, WidthError
from orbify.symmetry.groups import parse_group
from orbify.symmetry.layouts import HeadValues, Orbit, act

timm = pytest.importorskip("timm")
from timm.layers import Attention  # noqa: E402
from timm.models.vision_transformer import VisionTransformer  # noqa: E402


def moved_images(group, g: int, x: torch.Tensor) -> torch.Tensor:
    """Element g on images with torch.flip / torch.rot90 (the reference, not the project's act)."""
    k, m = group.elements[g]
    if m:
        x = torch.flip(x, dims=(-1,))
    return torch.rot90(x, k * 4 // group.rotations, dims=(-2, -1))


def numpy_tokens(group, g: int, values: np.ndarray, axis: int, prefix: int, side: int) -> np.ndarray:
    """Element g on the token axis ``axis`` with numpy: the grid tokens reshaped to (side, side), mirrored
    (numpy.flip) then turned (numpy.rot90), the prefix kept."""
    k, m = group.elements[g]
    values = np.moveaxis(values, axis, -1)
    grid = values[..., prefix:].reshape(*values.shape[:-1], side, side)
    if m:
        grid = np.flip(grid, axis=-1)
    grid = np.rot90(grid, k * 4 // group.rotations, axes=(-2, -1)).reshape(*values.shape[:-1], side * side)
    return np.moveaxis(np.concatenate([values[..., :prefix], grid], axis=-1), -1, axis)


def small_vit(**options) -> VisionTransformer:
    """timm's VisionTransformer at width 64, 2 blocks of 2 heads (32 channels each), patch 4, 32 px, 5 classes, its
    norms and biases moved off their trivial values."""
    torch.manual_seed(0)
    settings = dict(img_size=32, patch_size=4, embed_dim=64, depth=2, num_heads=2, num_classes=5)
    model = VisionTransformer(**{**settings, **options}).eval()
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.add_(0.1 * torch.randn_like(parameter))
    return model


def registers_vit() -> VisionTransformer:
    """A class token and 4 register tokens, layer scales, q/k norms, fc_norm over the mean of the patch tokens, and
    the unfused attention (q @ kᵀ, softmax, @ v) (the factory a saved file names)."""
    model = small_vit(reg_tokens=4, init_values=0.1, qk_norm=True, global_pool="avg", fc_norm=True)
    for block in model.blocks:
        block.attn.fused_attn = False
    return model


VARIANTS = {
    "class token, fused": lambda: small_vit(),
    "registers, layer scales, q/k norms, mean, unfused": registers_vit,
    "no class token, embedding added before the register": lambda: small_vit(
        class_token=False, reg_tokens=1, no_embed_class=True, global_pool="avg", init_values=0.1),
}


@pytest.fixture(scope="module", params=[(variant, name) for variant in VARIANTS for name in ("c4", "d4")],
                ids=lambda param: f"{param[0]}-{param[1]}")
def converted_small(request):
    variant, name = request.param
    model = VARIANTS[variant]().double()
    converted, plan = orbify.convert(model, name, example_input=torch.zeros(1, 3, 32, 32, dtype=torch.float64))
    return name, model, converted, plan


# -- the layout of per-head values -------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["c4", "d4"])
def test_per_head_token_moves_are_numpy_rot90_of_the_grid(name):
    group = parse_group(name)
    side, prefix, heads, head_dim = 3, 2, 2, 2 * group.order
    tokens = prefix + side * side
    values = HeadValues(Orbit(2), side, side, prefix, 4, (2,), 3)          # (B, heads, N, head_dim)
    scores = HeadValues(Orbit(2), side, side, prefix, 4, (2, 3), None)     # (B, heads, N, N)
    x = torch.randn(2, heads, tokens, head_dim, dtype=torch.float64)
    s = torch.randn(2, heads, tokens, tokens, dtype=torch.float64)
    slots = Orbit(2).permutation(group)   # a head's slots, alike in every head
    for g in range(group.order):
        expected = numpy_tokens(group, g, x.numpy(), 2, prefix, side)[..., slots[g].numpy()]
        assert np.array_equal(act(group, values, g, x).numpy(), expected)
        both = numpy_tokens(group, g, numpy_tokens(group, g, s.numpy(), 2, prefix, side), 3, prefix, side)
        assert np.array_equal(act(group, scores, g, s).numpy(), both)


def test_head_layouts_read_back_from_their_text():
    from orbify.graph.plan import _layout_from_text

    for layout in (HeadValues(Orbit(4), 14, 14, 1, 5, (1,), 4), HeadValues(Orbit(4), 8, 8, 3, 4, (2, 3), None)):
        assert _layout_from_text(str(layout)) == layout


# -- small timm ViTs built here -----------------------------------------------------------------------------
def test_small_timm_vits_convert_exactly(converted_small):
    name, model, converted, plan = converted_small
    group = parse_group(name)
    x = torch.randn(3, 3, 32, 32, dtype=torch.float64)
    with torch.no_grad():
        logits = converted(x)
        for g in range(1, group.order):   # torch.rot90 / torch.flip as the reference motion
            assert float((converted(moved_images(group, g, x)) - logits).norm() / logits.norm()) < 1e-12
    report = orbify.check_model(converted, model, plan, x)
    assert report.invariance_error < 1e-12
    assert max(layer.equivariance_error for layer in report.layers) < 1e-12   # every layer, q/k norms included
    # every tied tensor holds 1/|G| of its numbers; only the plain head's bias (5 classes) keeps all of them
    before = sum(p.numel() for p in model.parameters())
    assert report.params_after == pytest.approx(before / group.order + 5 * (1 - 1 / group.order), abs=1e-9)
    qkv = converted.get_submodule("blocks.0.attn.qkv")   # tied orbit → orbit at its full width, 3·64 outputs
    assert qkv.out_features == 3 * 64 and qkv.parametrizations.weight.original.numel() == 3 * 64 * 64 // group.order


def test_registers_layer_scales_and_q_k_norms_are_tied():
    model = registers_vit().double()
    converted, plan = orbify.convert(model, "d4", example_input=torch.zeros(1, 3, 32, 32, dtype=torch.float64))
    notes = " ".join(plan.notes)
    assert "cls_token" in notes and "reg_token" in notes and "pos_embed" in notes
    assert "per-channel tensors tied per orbit" in notes and "blocks.0.ls1.gamma" in notes
    norm = next(layer for layer in plan.layers if layer.name == "blocks_0_attn_q_norm_norm")
    assert str(norm.layout_out) == "heads(orbit(4), 5+8×8, rank 4, tokens 2, channels 3)"   # 32 channels = 4 orbits
    q_norm = converted.get_submodule("blocks.0.attn.q_norm.norm")
    assert q_norm.parametrizations.weight.original.numel() == 32 // 8   # one value per orbit of a head


def test_tied_attention_is_torch_sdpa_on_moved_tokens(converted_small):
    """timm's own Attention (fused: torch's scaled_dot_product_attention; unfused: q @ kᵀ, softmax, @ v) with the
    converted model's tied q/k/v and output projections: moving its input tokens (numpy.rot90 of the grid, the
    orbit permutation of the channels) moves its output alike."""
    name, _, converted, _ = converted_small
    group = parse_group(name)
    prefix, side, width = 2, 8, 64   # tokens drawn here: any number of fixed tokens
    channels = Orbit(width // group.order).permutation(group)
    for fused in (True, False):
        attention = Attention(width, num_heads=2, qkv_bias=True).double().eval()
        attention.fused_attn = fused
        with torch.no_grad():
            for part in ("qkv", "proj"):
                tied = converted.get_submodule(f"blocks.0.attn.{part}")
                getattr(attention, part).weight.copy_(tied.weight)
                getattr(attention, part).bias.copy_(tied.bias)
        tokens = torch.randn(2, prefix + side * side, width, dtype=torch.float64)
        with torch.no_grad():
            out = attention(tokens).numpy()
            for g in range(1, group.order):
                moved = numpy_tokens(group, g, tokens.numpy(), 1, prefix, side)[..., channels[g].numpy()]
                expected = numpy_tokens(group, g, out, 1, prefix, side)[..., channels[g].numpy()]
                assert np.allclose(attention(torch.from_numpy(moved.copy())).numpy(), expected, atol=1e-12)



@pytest.mark.parametrize("name", ["c4", "d4"])
def test_sdpa_moves_per_head_values_as_their_layout_says(name):
    """The rule's claim: torch's scaled_dot_product_attention of moved per-head q, k, v is the moved output, with
    the move of their layout (itself numpy.rot90 of the grid, as tested above)."""
    group = parse_group(name)
    layout = HeadValues(Orbit(32 // group.order), 6, 6, 1, 4, (2,), 3)
    q, k, v = torch.randn(3, 2, 2, layout.prefix + 36, 32, dtype=torch.float64)
    out = F.scaled_dot_product_attention(q, k, v)
    for g in range(1, group.order):
        moved = [act(group, layout, g, t) for t in (q, k, v)]
        assert torch.allclose(F.scaled_dot_product_attention(*moved), act(group, layout, g, out), atol=1e-13)


# -- timm's own models at 224 ----------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["vit_tiny_patch16_224", "deit_tiny_patch16_224", "vit_wee_patch16_reg1_gap_256"])
@pytest.mark.parametrize("group_name", ["c4", "d4"])
def test_timm_vit_deit_and_a_register_vit_convert_exactly(name, group_name):
    """timm's definitions with 2 of their blocks (every op of the deep model is in the shallow one). The whole
    models convert the same way, measured in float64: vit_tiny and deit_tiny 1.3e-15 (c4) and 1.2e-15 (d4),
    5,717,416 → 1,430,104 (c4) / 715,552 (d4) parameters, in 7-10 s each; vit_wee_patch16_reg1_gap_256 (the smallest
    of timm.list_models('*reg*'): 1 register token, no class token, layer scales, mean pooling) 7.7e-16 / 5.8e-16,
    13,422,568 → 3,356,392 / 1,678,696, in 12-13 s."""
    group = parse_group(group_name)
    torch.manual_seed(0)
    model = timm.create_model(name, pretrained=False, depth=2).eval().double()   # random weights, never downloaded
    size = model.patch_embed.img_size[0]
    converted, _ = orbify.convert(model, group, example_input=torch.zeros(1, 3, size, size, dtype=torch.float64))
    x = torch.randn(1, 3, size, size, dtype=torch.float64)
    with torch.no_grad():
        logits = converted(x)
        errors = [float((converted(moved_images(group, g, x)) - logits).norm() / logits.norm())
                  for g in range(1, group.order)]
    assert max(errors) < 1e-12   # exact up to float64 rounding (the issue asks ≤ 1e-5)
    before = sum(p.numel() for p in model.parameters())
    after = sum(p.numel() for p in converted.parameters())
    assert after == pytest.approx(before / group.order + 1000 * (1 - 1 / group.order), abs=1e-9)   # head bias kept


# -- refusals --------------------------------------------------------------------------------------------------
def test_heads_that_split_orbits_are_refused_with_widths_that_work():
    model = small_vit(embed_dim=48, num_heads=4)   # head width 12, not a multiple of 8
    with pytest.raises(WidthError) as error:
        orbify.convert(model, "d4", example_input=torch.zeros(1, 3, 32, 32))
    text = str(error.value)
    assert "In 'blocks.0.attn'" in text and "graph node 'reshape'" in text   # the module, the node
    assert "qkv = self.qkv(x).reshape(B, N, 3, self.num_heads, self.head_dim)" in text   # and timm's source line
    assert "heads of width 12" in text and "multiple of 8" in text
    assert "multiple of 4·8 = 32" in text and "[1, 2, 3, 6]" in text   # 48 = h·8·k for h in 1, 2, 3, 6


class WrittenOutAttention(nn.Module):
    """Patch 4, one attention written out by hand with a mask or a learned bias on the scores (both move with
    the tokens, so both are refused)."""

    def __init__(self, kind: str):
        super().__init__()
        self.kind = kind
        self.patches = nn.Conv2d(3, 16, 4, stride=4)
        self.qkv, self.proj, self.head = nn.Linear(16, 48), nn.Linear(16, 16), nn.Linear(16, 3)
        self.bias = nn.Parameter(torch.randn(1, 2, 16, 16))
        self.register_buffer("mask", torch.rand(16, 16) > 0.5)

    def forward(self, x):
        x = self.patches(x).flatten(2).transpose(1, 2)
        q, k, v = self.qkv(x).reshape(x.shape[0], 16, 3, 2, 8).permute(2, 0, 3, 1, 4).unbind(0)
        if self.kind == "mask":
            x = F.scaled_dot_product_attention(q, k, v, attn_mask=self.mask)
        else:
            x = (q @ k.transpose(-2, -1) + self.bias).softmax(dim=-1) @ v
        return self.head(self.proj(x.transpose(1, 2).reshape(x.shape[0], 16, 16)).mean(1))


@pytest.mark.parametrize("kind,refusal", [("mask", "Attention with a mask"), ("bias", "varies along the tokens")])
def test_masks_and_position_biases_on_the_scores_are_refused(kind, refusal):
    model = WrittenOutAttention(kind).eval()
    with torch.no_grad():
        model(torch.zeros(1, 3, 16, 16))   # the model runs as written
    with pytest.raises(UnsupportedOpError, match=refusal) as error:
        orbify.convert(model, "c4", example_input=torch.zeros(1, 3, 16, 16))
    assert "graph node" in str(error.value)


# -- resampled position embeddings ---------------------------------------------------------------------------
def test_interpolation_of_an_invariant_grid_commutes_with_quarter_turns_but_nearest_does_not():
    """Why a resampled embedding is exact up to rounding: torch's bicubic and bilinear interpolation of a square
    grid that numpy.rot90 and numpy.flip leave unchanged give such a grid again (float64); 'nearest' does not."""
    grid = np.random.default_rng(0).normal(size=(1, 4, 14, 14))
    grid = sum(np.rot90(g, k, axes=(-2, -1)) for g in (grid, np.flip(grid, -1)) for k in range(4))
    for mode, exact in (("bicubic", True), ("bilinear", True), ("nearest", False)):
        out = F.interpolate(torch.from_numpy(grid.copy()), size=(18, 18), mode=mode).numpy()
        error = max(np.abs(np.rot90(o, k, axes=(-2, -1)) - out).max() for o in (out, np.flip(out, -1))
                    for k in range(4)) / np.abs(out).max()
        assert (error < 1e-13) == exact, (mode, error)


def test_a_dynamic_size_vit_is_exact_at_its_size_and_reported_approximate_elsewhere():
    group = parse_group("d4")
    model = small_vit(dynamic_img_size=True).double()   # resamples pos_embed to the input's grid in its forward
    converted, plan = orbify.convert(model, group, example_input=torch.zeros(1, 3, 32, 32, dtype=torch.float64))
    note = next(note for note in plan.notes if "resampled to the input's patch grid" in note)
    assert "resample_abs_pos_embed, bicubic" in note and "exact at the converted 8×8 grid" in note
    measured = float(note.split("invariant only to within ")[1].split(" ")[0])
    assert 1e-9 < measured < 1e-5   # float32 rounding: timm interpolates in float32
    for size, bound in ((32, 1e-12), (24, 1e-5), (48, 1e-5)):
        x = torch.randn(2, 3, size, size, dtype=torch.float64)
        with torch.no_grad():
            logits = converted(x)   # runs at any size whose side is a multiple of the patch
            error = max(float((converted(moved_images(group, g, x)) - logits).norm() / logits.norm())
                        for g in range(1, group.order))
        assert error < bound, (size, error)
    assert error > 1e-15   # not exact away from the converted size: the approximation is real


# -- files ---------------------------------------------------------------------------------------------------
def test_a_converted_timm_vit_round_trips_through_a_file(tmp_path):
    model = registers_vit()
    converted, plan = orbify.convert(model, "d4", example_input=torch.zeros(1, 3, 32, 32))
    path = orbify.save(converted, plan, tmp_path / "vit.orb", reference="test_timm_vit:registers_vit")
    loaded = orbify.load(path, original="test_timm_vit:registers_vit")
    x = torch.randn(2, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(loaded.module(x), converted(x))
    assert loaded.plan.values == plan.values   # head layouts read back from their text
    assert any(isinstance(layout, HeadValues) for layout in plan.values.values())


@pytest.mark.parametrize("format", ["torchscript"])   # pt2 measured the same (0.0 difference), in 10 s
def test_exported_timm_vit_stays_invariant(tmp_path, format):
    from orbify.files.export import output_difference, run_exported

    converted, _ = orbify.convert(small_vit(), "d4", example_input=torch.zeros(1, 3, 32, 32))
    path = orbify.export_model(converted, torch.zeros(1, 3, 32, 32), tmp_path / f"vit.{format}", format)
    group = parse_group("d4")
    x = torch.randn(2, 3, 32, 32)
    exported = run_exported(path, format, x)   # in its own runtime: torch.export.load, torch.jit.load
    with torch.no_grad():
        assert output_difference(exported, converted(x)) < 1e-5
    for g in range(1, group.order):
        assert output_difference(run_exported(path, format, moved_images(group, g, x)), exported) < 1e-5
