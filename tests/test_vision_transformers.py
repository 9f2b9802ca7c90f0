"""Vision transformers: the patch grid's token permutation, tied attention and whole ViTs converted exactly.

References outside the project: ``numpy.rot90`` / ``numpy.flip`` on the token grid, ``torch.rot90`` /
``torch.flip`` on images, ``torch.nn.MultiheadAttention`` itself, and torchvision's ViT definitions.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
import torchvision
from torch import nn

import orbify
from orbify.errors import UnsupportedOpError, WidthError
from orbify.symmetry.groups import parse_group
from orbify.symmetry.layouts import Orbit, Plain, Tokens, act
from small_vit import Block, TinyViT


def numpy_move(grid: np.ndarray, turns: int, mirror: bool) -> np.ndarray:
    """Element (turns, mirror) on the last two axes: mirror (left-right) first, then quarter turns (numpy)."""
    if mirror:
        grid = np.flip(grid, axis=-1)
    return np.rot90(grid, turns, axes=(-2, -1))


def moved_images(group, g: int, x: torch.Tensor) -> torch.Tensor:
    """Element g on images with torch.flip / torch.rot90 (the reference, not the project's act)."""
    k, m = group.elements[g]
    if m:
        x = torch.flip(x, dims=(-1,))
    return torch.rot90(x, k * 4 // group.rotations, dims=(-2, -1))


def moved_tokens(group, g: int, tokens: torch.Tensor, prefix: int, side: int, channel_order: torch.Tensor):
    """Element g on a (B, N, C) sequence with numpy: the grid tokens reshaped to (side, side) and turned by
    numpy.rot90/flip, the prefix kept, the channels taken in ``channel_order``."""
    k, m = group.elements[g]
    array = tokens.numpy()
    grid = array[:, prefix:].reshape(array.shape[0], side, side, -1).transpose(0, 3, 1, 2)
    grid = numpy_move(grid, k * 4 // group.rotations, bool(m)).transpose(0, 2, 3, 1).reshape(array.shape[0], -1,
                                                                                              array.shape[2])
    moved = np.concatenate([array[:, :prefix], grid], axis=1)[:, :, channel_order.numpy()]
    return torch.from_numpy(np.ascontiguousarray(moved))


# -- the token permutation -------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["c4", "d4"])
def test_token_permutation_is_numpy_rot90_of_the_grid(name):
    group = parse_group(name)
    side, prefix = 5, 2
    layout = Tokens(Plain(3), (0, 2, 1), side, side, prefix)
    tokens = torch.randn(2, layout.tokens, 3, dtype=torch.float64)
    identity = torch.arange(3)
    for g in range(group.order):
        expected = moved_tokens(group, g, tokens, prefix, side, identity)   # numpy.rot90 on the token grid
        assert torch.equal(act(group, layout, g, tokens), expected)
        grid = np.arange(side * side).reshape(side, side)
        k, m = group.elements[g]
        reference = numpy_move(grid, k * 4 // group.rotations, bool(m)).flatten() + prefix
        assert layout.token_permutation(group)[g].tolist() == list(range(prefix)) + reference.tolist()


def test_channels_first_tokens_move_like_the_sequence():
    group = parse_group("d4")
    sequence = Tokens(Orbit(2), (0, 2, 1), 4, 4, 1)
    channels_first = Tokens(Orbit(2), (0, 1, 2), 4, 4, 1)
    x = torch.randn(2, sequence.tokens, 16)
    for g in range(group.order):
        assert torch.equal(act(group, channels_first, g, x.transpose(1, 2)), act(group, sequence, g, x).transpose(1, 2))


# -- a small ViT (tests/small_vit.py) ------------------------------------------------------------------------------
def tiny_vit() -> nn.Module:
    """The factory a saved file names (rebuilt on loading)."""
    torch.manual_seed(0)
    model = TinyViT().eval()
    with torch.no_grad():
        for parameter in model.parameters():   # norms and biases away from their trivial values
            parameter.add_(0.1 * torch.randn_like(parameter))
    return model


@pytest.fixture(scope="module", params=["c4", "d4"])
def converted_tiny(request):
    model = tiny_vit().double()
    converted, plan = orbify.convert(model, request.param, example_input=torch.zeros(1, 3, 16, 16, dtype=torch.float64))
    return request.param, model, converted, plan


def test_tiny_vit_converts_exactly(converted_tiny):
    name, model, converted, plan = converted_tiny
    group = parse_group(name)
    x = torch.randn(3, 3, 16, 16, dtype=torch.float64)
    with torch.no_grad():
        logits = converted(x)
        for g in range(1, group.order):   # torch.rot90 / torch.flip as the reference motion
            moved = converted(moved_images(group, g, x))
            assert float((moved - logits).norm() / logits.norm()) < 1e-12
    report = orbify.check_model(converted, model, plan, x)
    assert report.invariance_error < 1e-12
    assert max(layer.equivariance_error for layer in report.layers) < 1e-12   # every layer, tokens moved by act
    assert any(str(layer.layout_out).startswith("tokens(orbit(") for layer in report.layers)
    n = group.order
    before, after = report.params_before, report.params_after
    # every tied tensor holds 1/|G| of its numbers (the position embedding's orbits are |G| entries each); only
    # the plain head's bias (5 classes) keeps all of them
    assert after == pytest.approx(before / n + 5 * (1 - 1 / n), abs=1e-9)
    assert any("class_token" in note and "positions" in note for note in plan.notes)


def test_tied_attention_is_multihead_attention_on_moved_tokens(converted_tiny):
    name, _, converted, plan = converted_tiny
    group = parse_group(name)
    tied = converted.get_submodule("blocks.0.attention")
    width = tied.embed_dim
    plain = nn.MultiheadAttention(width, tied.num_heads, batch_first=True).double().eval()
    with torch.no_grad():   # torch's own module with the tied weights, expanded
        plain.in_proj_weight.copy_(tied.in_proj_weight)
        plain.in_proj_bias.copy_(tied.in_proj_bias)
        plain.out_proj.weight.copy_(tied.out_proj.weight)
        plain.out_proj.bias.copy_(tied.out_proj.bias)
    side, prefix = 4, 1
    tokens = torch.randn(2, prefix + side * side, width, dtype=torch.float64)
    channels = Orbit(width // group.order).permutation(group)
    with torch.no_grad():
        out = plain(tokens, tokens, tokens, need_weights=False)[0]
        assert torch.allclose(tied(tokens, tokens, tokens, need_weights=False)[0], out, atol=1e-13)
        for g in range(1, group.order):
            moved = moved_tokens(group, g, tokens, prefix, side, channels[g])
            expected = moved_tokens(group, g, out, prefix, side, channels[g])
            assert torch.allclose(plain(moved, moved, moved, need_weights=False)[0], expected, atol=1e-12)
    # the tying is real: q, k and v rows of a slot are the base rows moved, not free
    assert tied.parametrizations.in_proj_weight.original.numel() == 3 * width * width // group.order


def test_tiny_vit_round_trips_through_a_file(converted_tiny, tmp_path):
    name, _, converted, plan = converted_tiny
    float32 = copy.deepcopy(converted).float()
    path = orbify.save(float32, plan, tmp_path / f"tiny-vit-{name}.orb", reference="test_vision_transformers:tiny_vit")
    loaded = orbify.load(path, original="test_vision_transformers:tiny_vit")
    x = torch.randn(2, 3, 16, 16)
    with torch.no_grad():
        assert torch.equal(loaded.module(x), float32(x))
    assert loaded.plan.values == plan.values   # token layouts read back from their text


def test_heads_that_split_orbits_are_refused_with_widths_that_work():
    model = TinyViT(width=24, heads=4).eval()   # head width 6, not a multiple of 4
    with pytest.raises(WidthError) as error:
        orbify.convert(model, "c4", example_input=torch.zeros(1, 3, 16, 16))
    text = str(error.value)
    assert "blocks.0.attention" in text or "blocks_0_attention" in text
    assert "heads of width 6" in text and "multiple of 4" in text
    assert "multiple of 4·4 = 16" in text and "[1, 2, 3, 6]" in text   # 24 = h·4·k for h in 1, 2, 3, 6


# -- torchvision's ViT -------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def vit_b_32_c4():
    """torchvision's vit_b_32 at 224 with 3 of its 12 encoder layers (every op of the deep model is in the shallow one;
    the whole model converts the same way, measured 4.5e-15, 88,224,232 → 22,056,808 parameters, in 20 s)."""
    torch.manual_seed(0)
    model = torchvision.models.VisionTransformer(224, 32, num_layers=3, num_heads=12, hidden_dim=768,
                                                 mlp_dim=3072).eval()
    with torch.no_grad():
        model.heads.head.weight.normal_(0, 0.02)   # torchvision starts the head at zero
    model = model.double()
    converted, plan = orbify.convert(model, "c4", example_input=torch.zeros(1, 3, 224, 224, dtype=torch.float64))
    return model, converted, plan


def test_torchvision_vit_converts_exactly_at_224(vit_b_32_c4):
    model, converted, plan = vit_b_32_c4
    group = parse_group("c4")
    x = torch.randn(1, 3, 224, 224, dtype=torch.float64)
    with torch.no_grad():
        logits = converted(x)
        for g in range(1, group.order):
            assert float((converted(moved_images(group, g, x)) - logits).norm() / logits.norm()) < 1e-12
    before = sum(p.numel() for p in model.parameters())
    after = sum(p.numel() for p in converted.parameters())
    # ÷4 but for the plain head's 1,000 biases, kept whole
    assert after == pytest.approx(before / 4 + 1000 * (1 - 1 / 4), abs=1e-9)
    attention = [layer for layer in plan.layers if layer.op == "MultiheadAttention"]
    assert len(attention) == 3 and all(str(layer.layout_out) == "tokens(orbit(192), 1+7×7, 0,2,1)"
                                        for layer in attention)


# -- baking and export ---------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def tiny_d4():
    model = tiny_vit()
    converted, _ = orbify.convert(model, "d4", example_input=torch.zeros(1, 3, 16, 16))
    return converted


def test_tied_attention_bakes_to_plain_multihead_attention(tiny_d4):
    baked = orbify.bake_model(tiny_d4)
    attention = baked.get_submodule("blocks.0.attention")
    assert type(attention) is nn.MultiheadAttention   # torch's own class, no parametrization left
    assert not any(torch.nn.utils.parametrize.is_parametrized(m) for m in baked.modules())
    tied = tiny_d4.get_submodule("blocks.0.attention")
    assert torch.equal(attention.in_proj_weight, tied.in_proj_weight)   # the expanded tied rows, kept
    x = torch.randn(2, 3, 16, 16)
    with torch.no_grad():
        assert torch.equal(baked(x), tiny_d4(x))


@pytest.mark.parametrize("format", ["pt2", "torchscript", "onnx"])
def test_exported_tiny_vit_matches_and_stays_invariant(tiny_d4, tmp_path, format):
    from orbify.files.export import output_difference, run_exported

    path = orbify.export_model(tiny_d4, torch.zeros(1, 3, 16, 16), tmp_path / f"vit.{format}", format)
    group = parse_group("d4")
    x = torch.randn(3, 3, 16, 16)   # exported at batch 1, run at batch 3
    with torch.no_grad():
        expected = tiny_d4(x)
    # each file in its own runtime: torch.export.load, torch.jit.load, onnxruntime
    exported = run_exported(path, format, x)
    assert output_difference(exported, expected) < 1e-5
    for g in range(1, group.order):   # torch.rot90 / torch.flip as the reference motion
        assert output_difference(run_exported(path, format, moved_images(group, g, x)), exported) < 1e-5


def test_cli_exports_a_saved_vit(tiny_d4, tmp_path, capsys):
    from orbify.cli import main
    from orbify.files.export import output_difference, run_exported

    plan = orbify.convert(tiny_vit(), "d4", example_input=torch.zeros(1, 3, 16, 16))[1]
    saved = orbify.save(tiny_d4, plan, tmp_path / "vit.orb", reference="test_vision_transformers:tiny_vit")
    output = tmp_path / "vit.pt"
    with pytest.raises(SystemExit) as exit_info:
        main(["export", str(saved), "--format", "torchscript", "-o", str(output), "--trust-source"])
    assert exit_info.value.code == 0
    assert "3×16×16" in capsys.readouterr().out   # the recorded input size
    x = torch.randn(2, 3, 16, 16)
    with torch.no_grad():
        assert output_difference(run_exported(output, "torchscript", x), tiny_d4(x)) < 1e-5


# -- safe sizes ----------------------------------------------------------------------------------------------
class MeanTokenViT(nn.Module):
    """Patch 4, one block, no position embeddings: runs at any size whose side is a multiple of 4, mean over tokens."""

    def __init__(self, width: int = 16):
        super().__init__()
        self.patches = nn.Conv2d(3, width, 4, stride=4)
        self.block = Block(width, 2)
        self.head = nn.Linear(width, 3)

    def forward(self, x):
        return self.head(self.block(self.patches(x).flatten(2).transpose(1, 2)).mean(1))


def test_safe_sizes_of_a_patch_grid_are_multiples_of_the_patch():
    from orbify.graph.sizes import SizeChecker

    checker = SizeChecker(MeanTokenViT().eval())
    # the stride rule (H − kernel) divisible by the stride, for kernel = stride = 4: H a multiple of 4 (arithmetic)
    expected = sorted((s for s in range(15, 46) if (s - 4) % 4 == 0), key=lambda s: (abs(s - 30), s))[:4]
    assert checker.safe_sizes(30, 4) == expected == [28, 32, 24, 36]
    assert not checker.is_safe(30)


def test_a_vit_fixed_to_one_size_is_offered_that_size_only(capsys):
    from orbify.cli import main
    from orbify.errors import InputShapeError
    from orbify.graph.sizes import SizeChecker

    checker = SizeChecker(tiny_vit())   # learned position embeddings for a 4×4 grid
    assert checker.safe_sizes(20, 5) == [16]
    with pytest.raises(InputShapeError) as error:
        checker.violations(20)
    assert "'positions' (shape (1, 17, 32))" in str(error.value) and "one input size only" in str(error.value)
    # torchvision's ViT asserts its image size: 224 = 14 patches of 16 only
    with pytest.raises(SystemExit) as exit_info:
        main(["sizes", "torchvision:vit_b_16", "--near", "240", "--count", "3"])
    assert exit_info.value.code == 0
    printed = " ".join(capsys.readouterr().out.split())
    assert "240 is not safe" in printed and "checks its input size itself" in printed
    assert "│ 224 │ -16 │" in printed and "│ 256" not in printed and "│ 208" not in printed


# -- windowed attention ----------------------------------------------------------------------------------------
@pytest.mark.parametrize("name,stops_at,inside", [("swin_t", "_get_relative_position_bias", "ShiftedWindowAttention"),
                                                  ("maxvit_t", "reshape_1", "PartitionAttentionLayer")])
def test_windowed_attention_is_refused_saying_why(name, stops_at, inside):
    from orbify.graph.tokens import windowed_attention_refusal
    from orbify.graph.tracing import trace

    graph = trace(getattr(torchvision.models, name)().eval()).graph
    node = next(node for node in graph.nodes if node.name == stops_at)   # where conversion stops without the rule
    text = str(windowed_attention_refusal(node))
    assert f"({inside})" in text and f"graph node '{stops_at}'" in text
    assert "does not just permute the tokens" in text and "--stop-at" in text
    plain = trace(tiny_vit()).graph   # global attention over the grid is not windowed
    assert all(windowed_attention_refusal(node) is None for node in plain.nodes)


@pytest.mark.parametrize("name", ["swin_t", "maxvit_t"])
def test_converting_windowed_attention_is_refused_saying_why(name):
    model = torchvision.models.get_model(name).eval()          # torchvision's definitions, random weights
    with pytest.raises(UnsupportedOpError, match="Windowed attention") as refused:
        orbify.convert(model, "c4", example_input=torch.zeros(1, 3, 224, 224))
    assert "graph node" in str(refused.value) and "window" in str(refused.value)
