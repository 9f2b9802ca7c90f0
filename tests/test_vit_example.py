"""The bundled vision transformer: its shipped weights, its exact conversion under d4, the ``example-vit`` source,
its trainer and benchmarks/vit_tiles.py's quick mode.

References outside the project: ``torch.rot90`` / ``torch.flip`` for the group's moves; arithmetic from the layers'
documented shapes (``torch.nn.MultiheadAttention``, ``Linear``, ``Conv2d``, ``LayerNorm``) for the parameter count
and the multiply-accumulates per tile.
"""

from __future__ import annotations

import os
from importlib import resources

import pytest
import torch
from typer.testing import CliRunner

import orbify
from orbify.errors import OptionError, OutputError
from orbify.example import VIT_TILE_SIZE, VIT_WEIGHTS_FILE, build_example_vit, load_example_vit, make_tiles
from orbify.example.train import accuracy
from orbify.example.train_vit import app as train_app
from orbify.example.train_vit import train_example_vit
from orbify.example.vit_model import VIT_SHAPE
from orbify.files.consent import names_only_registered_code
from orbify.files.sources import EXAMPLE_VIT_SIZE, EXAMPLE_VIT_SOURCE, load_source, rebuild, usual_input_size

TOLERANCE = 1e-5


def d4_moves(x: torch.Tensor) -> list[torch.Tensor]:
    """The eight moves of d4 written with torch.rot90 and torch.flip alone: 0–3 quarter turns, mirrored or not."""
    return [torch.rot90(x.flip(-1) if mirrored else x, turns, dims=(-2, -1))
            for mirrored in (False, True) for turns in range(4)]


@pytest.fixture(scope="module")
def shipped():
    return load_example_vit()


@pytest.fixture(scope="module")
def converted_d4(shipped):
    model = build_example_vit().double().eval()
    model.load_state_dict(shipped.state_dict())
    converted, plan = orbify.convert(model, "d4", example_input=torch.zeros(1, 3, 32, 32, dtype=torch.float64))
    return model, converted, plan


# --- the model and its shipped weights ---------------------------------------------------------------------------
def test_heads_hold_whole_d4_orbits_and_the_parameters_are_those_of_its_layers():
    width, heads, mlp, patch = VIT_SHAPE["width"], VIT_SHAPE["heads"], VIT_SHAPE["mlp"], VIT_SHAPE["patch"]
    assert (width // heads) % 8 == 0 and VIT_TILE_SIZE % patch == 0
    tokens = 1 + (VIT_TILE_SIZE // patch) ** 2
    # arithmetic from the layers' documented shapes: MultiheadAttention holds in_proj (3w × w + 3w) and
    # out_proj (w × w + w); a LayerNorm 2w; the MLP w·m + m + m·w + w
    block = 3 * width * width + 3 * width + width * width + width + 2 * 2 * width + 2 * width * mlp + mlp + width
    expected = (3 * patch * patch * width + width + width + tokens * width + VIT_SHAPE["layers"] * block
                + 2 * width + width * 6 + 6)
    assert sum(p.numel() for p in build_example_vit().parameters()) == expected


def test_shipped_weights_are_small_and_load_with_strict_keys_without_pickle():
    with resources.as_file(resources.files("orbify.example") / VIT_WEIGHTS_FILE) as path:
        assert os.path.getsize(path) < 500_000
        state = torch.load(path, map_location="cpu", weights_only=True)
    build_example_vit().load_state_dict(state, strict=True)


def test_shipped_vit_classifies_upright_held_out_tiles_and_fails_in_the_field(shipped):
    """Measured on these 300 fresh tiles (seed 2024, never used in training): 98.7 % upright, 47.7 % in the field."""
    assert not shipped.training
    upright = accuracy(shipped, *make_tiles(300, split="upright", size=VIT_TILE_SIZE, seed=2024))
    field = accuracy(shipped, *make_tiles(300, split="any", size=VIT_TILE_SIZE, seed=2024))
    assert upright >= 0.97
    assert field < upright - 0.3        # trained upright only: the point of the example


# --- conversion ----------------------------------------------------------------------------------------------------
def test_converted_vit_is_invariant_under_d4_in_float64(converted_d4):
    _, converted, plan = converted_d4
    tiles = make_tiles(4, split="any", size=VIT_TILE_SIZE, seed=7)[0].double()
    with torch.no_grad():
        logits = converted(tiles)
        for moved in d4_moves(tiles)[1:]:       # torch.rot90 / torch.flip as the reference motion; measured 4.2e-16
            assert float((converted(moved) - logits).norm() / logits.norm()) <= TOLERANCE
    attention = [layer for layer in plan.layers if layer.op == "MultiheadAttention"]
    assert len(attention) == VIT_SHAPE["layers"]
    assert all(str(layer.layout_out) == "tokens(orbit(8), 1+8×8, 0,2,1)" for layer in attention)


# --- the source and the trainer ------------------------------------------------------------------------------------
def test_example_vit_source_loads_the_shipped_model_and_rebuilds_without_consent(shipped):
    loaded = load_source(EXAMPLE_VIT_SOURCE)
    assert loaded.reference == "example-vit" and names_only_registered_code("example-vit")
    state = shipped.state_dict()
    assert all(torch.equal(value, state[key]) for key, value in loaded.module.state_dict().items())
    assert type(rebuild("example-vit")).__name__ == "ExampleViT"
    assert usual_input_size("example-vit")[0] == EXAMPLE_VIT_SIZE == VIT_TILE_SIZE   # files/ cannot import example/


def test_training_is_reproducible_leaves_global_rng_alone_and_refuses_bad_settings():
    torch.manual_seed(123)
    before = torch.get_rng_state()
    first = train_example_vit(seed=1, epochs=1, num_tiles=64, evaluation_tiles=4)
    assert torch.equal(torch.get_rng_state(), before)
    second = train_example_vit(seed=1, epochs=1, num_tiles=64, evaluation_tiles=4)
    assert all(torch.equal(value, second.model.state_dict()[key]) for key, value in first.model.state_dict().items())
    with pytest.raises(OptionError):
        train_example_vit(num_tiles=10)


def test_trainer_refuses_an_existing_output_before_training(tmp_path):
    out = tmp_path / "vit.pt"
    out.write_bytes(b"keep me")
    result = CliRunner().invoke(train_app, ["--out", str(out), "--tiles", "64", "--epochs", "1"])
    assert result.exit_code == OutputError.exit_code and "already exists" in result.output
    assert out.read_bytes() == b"keep me"


def example_vit_macs() -> int:
    """Multiply-accumulates of one tile through the example ViT, by arithmetic from its layers."""
    width, mlp, patch = VIT_SHAPE["width"], VIT_SHAPE["mlp"], VIT_SHAPE["patch"]
    grid = (VIT_TILE_SIZE // patch) ** 2
    tokens = 1 + grid
    embedding = grid * 3 * patch * patch * width                           # the patch conv, kernel = stride
    linears = tokens * (width * 3 * width + width * width + width * mlp + mlp * width)   # q, k, v; out; the MLP
    products = 2 * tokens * tokens * width                                 # q·k and attention·v, over all heads
    return embedding + VIT_SHAPE["layers"] * (linears + products) + width * 6   # the classifier on the class token


# --- the benchmark -------------------------------------------------------------------------------------------------
def test_vit_benchmark_quick(run_quick):
    """benchmarks/vit_tiles.py --quick, run in this process as its command line would, on one thread."""
    output = run_quick("vit_tiles.py")
    rows: dict[str, list[str]] = {}           # the first table's row of each model
    elements: dict[str, list[str]] = {}       # the per-element table's
    for line in output.split("### Upright tiles")[1].splitlines():     # the tables after the settings
        if line.lstrip().startswith("|"):
            cells = [cell.strip() for cell in line.strip().strip("|").split("|")]
            (elements if cells[0] in rows else rows)[cells[0]] = cells
    averages = [f"original averaged over d4 ({views})" for views in ("probability", "logit", "most-confident")]
    singles = ["original", "converted, orbit averaging", "converted, tuned", "converted, tuned, exported (pt2)"]
    for name in averages + singles:
        assert name in rows, name
        assert all(0.0 <= float(cell) <= 100.0 for cell in rows[name][2:6]), rows[name]
    macs = {name: int(rows[name][6].replace(",", "")) for name in averages + singles}
    assert macs["original"] == example_vit_macs()
    assert all(macs[name] == macs["original"] for name in singles)               # the same widths
    assert all(macs[name] == 8 * macs["original"] for name in averages)          # |G| forward passes
    for name in averages + singles[1:]:       # an invariant model scores alike at every element
        assert len(set(elements[name][1:])) == 1 and elements[name][1] == rows[name][2], elements[name]
    assert elements["original"][1] == rows["original"][4]       # the identity is the upright column
    assert "claim" in output and "vit_b_16 at 224" in output
    ratio = float(output.split("original = ")[1].split()[0])
    assert ratio == pytest.approx(1.0, abs=0.01)
