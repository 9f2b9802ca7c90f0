"""Tests of the bundled example: generated tiles, the example CNN, its training and its weights."""

from __future__ import annotations

import os
from importlib import resources

import numpy as np
import pytest
import scipy.stats
import torch
import torch.fx
from typer.testing import CliRunner

import orbify.example
from orbify.errors import CheckpointError, OptionError, OutputError
from orbify.example import CLASS_NAMES, build_example_cnn, load_example_model, make_tiles
from orbify.example.data import CHANNEL_MEAN, CHANNEL_STD, DEFAULT_SIZE
from orbify.example.train import accuracy, app, train_example_model

ROD = CLASS_NAMES.index("rod")
DUMBBELL = CLASS_NAMES.index("dumbbell")


def _axis_angles_degrees(images: torch.Tensor) -> np.ndarray:
    """Principal-axis angle of the bright particle in each tile, in [-90, 90), y axis up.

    Common practice (image moments): remove a least-squares plane (the illumination gradient),
    keep the pixels above half the peak, and take 0.5 * atan2(2 mu11, mu20 - mu02) of the
    second central moments of that mask.
    """
    gray = images.mean(dim=1).numpy().astype(np.float64)
    size = gray.shape[-1]
    x = np.arange(size) - (size - 1) / 2
    grid_x, grid_y = np.meshgrid(x, -x)
    design = np.stack([np.ones(size * size), grid_x.ravel(), grid_y.ravel()], axis=1)
    angles = []
    for tile in gray:
        plane, *_ = np.linalg.lstsq(design, tile.ravel(), rcond=None)
        residual = tile - (design @ plane).reshape(size, size)
        mask = residual > 0.5 * residual.max()
        px, py = grid_x[mask], grid_y[mask]
        px, py = px - px.mean(), py - py.mean()
        mu20, mu02, mu11 = (px * px).mean(), (py * py).mean(), (px * py).mean()
        angles.append(np.degrees(0.5 * np.arctan2(2 * mu11, mu20 - mu02)))
    return np.asarray(angles)


def _elongated(split: str, n: int = 480, seed: int = 11) -> torch.Tensor:
    images, labels = make_tiles(n, split=split, seed=seed)
    return images[(labels == ROD) | (labels == DUMBBELL)]


# --- tiles -----------------------------------------------------------------------------------


@pytest.mark.parametrize("split", ["upright", "any"])
def test_same_seed_gives_identical_tiles_and_other_seeds_differ(split):
    first = make_tiles(40, split=split, seed=3)
    second = make_tiles(40, split=split, seed=3)
    assert torch.equal(first[0], second[0]) and torch.equal(first[1], second[1])
    other = make_tiles(40, split=split, seed=4)
    assert not torch.equal(first[0], other[0])


def test_splits_draw_different_tiles_for_the_same_seed():
    assert not torch.equal(make_tiles(12, split="upright", seed=0)[0], make_tiles(12, split="any", seed=0)[0])


@pytest.mark.parametrize("size", [DEFAULT_SIZE, 17, 65])
def test_shapes_dtypes_and_label_range(size):
    images, labels = make_tiles(30, split="any", size=size, seed=1)
    assert images.shape == (30, 3, size, size) and images.dtype == torch.float32
    assert labels.shape == (30,) and labels.dtype == torch.int64
    assert int(labels.min()) >= 0 and int(labels.max()) < len(CLASS_NAMES)
    assert torch.isfinite(images).all()


def test_zero_tiles_gives_empty_tensors():
    images, labels = make_tiles(0, seed=0)
    assert images.shape == (0, 3, DEFAULT_SIZE, DEFAULT_SIZE) and labels.shape == (0,)


def test_classes_are_balanced_to_within_one():
    _, labels = make_tiles(601, split="upright", seed=2)
    counts = np.bincount(labels.numpy(), minlength=len(CLASS_NAMES))
    assert counts.max() - counts.min() <= 1 and counts.sum() == 601


def test_normalised_channels_have_zero_mean_and_unit_spread():
    images, _ = make_tiles(600, split="upright", seed=9)
    assert torch.allclose(images.mean(dim=(0, 2, 3)), torch.zeros(3), atol=0.1)
    assert torch.allclose(images.std(dim=(0, 2, 3)), torch.ones(3), atol=0.15)
    pixels = images * torch.tensor(CHANNEL_STD)[:, None, None] + torch.tensor(CHANNEL_MEAN)[:, None, None]
    assert pixels.min() >= -1e-5 and pixels.max() <= 1 + 1e-5


def test_upright_particles_keep_their_axis_near_horizontal():
    angles = _axis_angles_degrees(_elongated("upright"))
    assert len(angles) >= 150
    # Drawn within ±10°; allow a few degrees of measurement error from noise and pixel grid.
    assert np.abs(angles).max() < 16


def test_field_particles_have_uniformly_distributed_axes():
    angles = _axis_angles_degrees(_elongated("any"))
    # Kolmogorov-Smirnov test against the uniform law on [-90°, 90°) (scipy.stats reference).
    assert scipy.stats.kstest(angles, scipy.stats.uniform(loc=-90, scale=180).cdf).pvalue > 0.01
    assert np.mean(np.abs(angles) > 45) > 0.35


@pytest.mark.parametrize(
    "arguments",
    [
        {"n": 4, "split": "sideways"},
        {"n": -1},
        {"n": 4, "size": 5},
        {"n": 4, "seed": -2},
    ],
)
def test_bad_arguments_raise_option_error(arguments):
    n = arguments.pop("n")
    with pytest.raises(OptionError):
        make_tiles(n, **arguments)


# --- model -----------------------------------------------------------------------------------


def test_example_cnn_traces_with_torch_fx_and_matches_eager_output():
    model = build_example_cnn().eval()
    traced = torch.fx.symbolic_trace(model)
    images, _ = make_tiles(8, seed=5)
    with torch.no_grad():
        assert torch.equal(traced(images), model(images))
    convs = [
        node
        for node in traced.graph.nodes
        if node.op == "call_module" and isinstance(traced.get_submodule(node.target), torch.nn.Conv2d)
    ]
    assert len(convs) == 4


def test_widths_split_into_whole_d4_orbits_and_strides_are_symmetric_at_33_pixels():
    model = build_example_cnn()
    size = DEFAULT_SIZE
    for conv in (m for m in model.modules() if isinstance(m, torch.nn.Conv2d)):
        assert conv.out_channels % 8 == 0
        # Sampling-grid symmetry rule of docs/design.md §6: (H + 2p - k) divisible by stride.
        span = size + 2 * conv.padding[0] - conv.kernel_size[0]
        assert span % conv.stride[0] == 0
        size = span // conv.stride[0] + 1
    assert size == 5


def test_build_example_cnn_rejects_zero_classes():
    with pytest.raises(OptionError):
        build_example_cnn(num_classes=0)


# --- shipped weights -------------------------------------------------------------------------


def test_shipped_weights_are_small_and_load_with_strict_keys():
    source = resources.files("orbify.example") / "weights.pt"
    with resources.as_file(source) as path:
        assert os.path.getsize(path) < 1_000_000
        state = torch.load(path, map_location="cpu", weights_only=True)
    model = build_example_cnn()
    assert set(state) == set(model.state_dict())
    model.load_state_dict(state, strict=True)


def test_shipped_model_is_good_upright_and_clearly_worse_at_any_angle():
    model = load_example_model()
    assert not model.training
    upright = accuracy(model, *make_tiles(360, split="upright", seed=2024))
    any_angle = accuracy(model, *make_tiles(360, split="any", seed=2024))
    assert upright > 0.9
    # The point of the example: trained upright only, the plain model fails on turned particles.
    assert any_angle < upright - 0.2


# --- training and saving ---------------------------------------------------------------------


def test_training_is_reproducible_and_leaves_global_rng_alone():
    torch.manual_seed(123)
    before = torch.get_rng_state()
    first = train_example_model(seed=1, epochs=1, num_tiles=64, evaluation_tiles=12)
    assert torch.equal(torch.get_rng_state(), before)
    second = train_example_model(seed=1, epochs=1, num_tiles=64, evaluation_tiles=12)
    for key, value in first.model.state_dict().items():
        assert torch.equal(value, second.model.state_dict()[key]), key
    assert 0.0 <= first.upright_accuracy <= 1.0 and 0.0 <= first.any_accuracy <= 1.0


def test_training_rejects_too_few_tiles():
    with pytest.raises(OptionError):
        train_example_model(num_tiles=10)


def test_command_refuses_to_overwrite_without_force_then_writes_loadable_weights(tmp_path):
    target = tmp_path / "weights.pt"
    target.write_bytes(b"keep me")
    tiny = ["--out", str(target), "--seed", "2", "--epochs", "1", "--tiles", "64", "--eval-tiles", "12"]
    refused = CliRunner().invoke(app, tiny)
    assert refused.exit_code == OutputError.exit_code and "--force" in refused.output
    assert target.read_bytes() == b"keep me"
    written = CliRunner().invoke(app, [*tiny, "--force"])
    assert written.exit_code == 0, written.output
    assert "accuracy upright" in written.output and "accuracy any angle" in written.output
    state = torch.load(target, weights_only=True)
    build_example_cnn().load_state_dict(state, strict=True)
    expected = train_example_model(seed=2, epochs=1, num_tiles=64, evaluation_tiles=12).model.state_dict()
    assert all(torch.equal(state[key], value) for key, value in expected.items())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["weights.pt"]  # no temporary file left


def test_command_reports_bad_settings_without_traceback(tmp_path):
    result = CliRunner().invoke(app, ["--out", str(tmp_path / "w.pt"), "--tiles", "10"])
    assert result.exit_code == OptionError.exit_code and "num_tiles" in result.output
    assert not (tmp_path / "w.pt").exists()


def test_missing_shipped_weights_raise_checkpoint_error(monkeypatch):
    monkeypatch.setattr(orbify.example, "WEIGHTS_FILE", "no-such-weights.pt")
    with pytest.raises(CheckpointError):
        load_example_model()
