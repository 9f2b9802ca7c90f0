"""The bundled segmentation example: generated scenes and masks, the plain encoder–decoder, its shipped weights,
the ``example-segment`` source, ``orbify demo --task segment`` and benchmarks/segmentation.py's quick mode."""

from __future__ import annotations

import json
import os
from importlib import resources

import numpy as np
import pytest
import scipy.ndimage
import sklearn.metrics
import torch
import torch.fx
from torch.utils.flop_counter import FlopCounterMode
from typer.testing import CliRunner

import orbify
from orbify.cli import app
from orbify.errors import OptionError
from orbify.example import (
    CLASS_NAMES,
    SEGMENT_CLASSES,
    build_example_segmenter,
    load_example_segmenter,
    make_scenes,
)
from orbify.example.data import CHANNEL_MEAN, CHANNEL_STD
from orbify.example.scenes import SCENE_SIZE
from orbify.example.segment_demo import AVERAGED_COLUMN, FILES, PLOTS, DemoScale, run_segment_demo
from orbify.example.train_segment import segmentation_scores, train_example_segmenter
from orbify.files.consent import names_only_registered_code
from orbify.files.sources import EXAMPLE_SEGMENT_SIZE, EXAMPLE_SEGMENT_SOURCE, load_source, rebuild, usual_input_size

ROD = 1 + CLASS_NAMES.index("rod")
TOLERANCE = 1e-5


def pixels(images: torch.Tensor) -> np.ndarray:
    """Normalised scenes back in [0, 1], (n, 3, H, W) as numpy."""
    return (images * torch.tensor(CHANNEL_STD)[:, None, None] + torch.tensor(CHANNEL_MEAN)[:, None, None]).numpy()


def d4_moves(x: torch.Tensor) -> list[torch.Tensor]:
    """The eight moves of d4 written with torch.rot90 and torch.flip alone: 0–3 quarter turns, mirrored or not."""
    return [torch.rot90(x.flip(-1) if mirrored else x, turns, dims=(-2, -1))
            for mirrored in (False, True) for turns in range(4)]


# --- scenes ------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("split", ["upright", "any"])
def test_same_seed_gives_identical_scenes_and_other_seeds_differ(split):
    first, second = make_scenes(12, split=split, seed=3), make_scenes(12, split=split, seed=3)
    assert torch.equal(first[0], second[0]) and torch.equal(first[1], second[1])
    assert not torch.equal(first[1], make_scenes(12, split=split, seed=4)[1])


def test_shapes_dtypes_and_mask_values():
    images, masks = make_scenes(70, split="any", seed=1)     # more than one chunk of 64
    assert images.shape == (70, 3, SCENE_SIZE, SCENE_SIZE) and images.dtype == torch.float32
    assert masks.shape == (70, SCENE_SIZE, SCENE_SIZE) and masks.dtype == torch.int64
    assert int(masks.min()) == 0 and int(masks.max()) < len(SEGMENT_CLASSES) == 7
    assert all(int(mask.max()) > 0 for mask in masks)       # every scene holds a particle
    assert set(masks.unique().tolist()) == set(range(7))
    assert make_scenes(0)[0].shape == (0, 3, SCENE_SIZE, SCENE_SIZE)


def test_masks_cover_exactly_the_bright_particles():
    """The particles are bright on a dark background: a red channel above 0.5 (about midway between the tints of
    orbify.example.data: background 0.25, particles 0.64–0.85 before texture and noise) marks them. The mask and
    the bright pixels must agree (IoU by scikit-learn's jaccard_score; soft edges and noise keep it below 1); a mask
    turned a quarter, or mirrored, must not."""
    images, masks = make_scenes(40, split="any", seed=2)
    bright = (pixels(images)[:, 0] > 0.5).ravel()
    labelled = (masks.numpy() > 0).ravel()
    assert sklearn.metrics.jaccard_score(labelled, bright) > 0.75
    assert sklearn.metrics.jaccard_score((masks.numpy() == 0).ravel(), ~bright) > 0.97
    for moved in (np.rot90(masks.numpy(), 1, axes=(1, 2)), masks.numpy()[..., ::-1]):
        assert sklearn.metrics.jaccard_score((moved > 0).ravel(), bright) < 0.25


def _rod_axes_degrees(masks: torch.Tensor) -> tuple[np.ndarray, np.ndarray]:
    """Principal-axis angle (degrees, y up) and elongation (ratio of the second moments) of every whole rod in the
    masks: connected components by scipy.ndimage.label, image moments (common practice)."""
    angles, elongations = [], []
    for mask in masks.numpy():
        components, count = scipy.ndimage.label(mask == ROD)
        for index in range(1, count + 1):
            rows, columns = np.nonzero(components == index)
            if len(rows) < 30:           # a sliver hidden under another particle
                continue
            x, y = columns - columns.mean(), -(rows - rows.mean())
            moments = np.cov(np.stack([x, y]))
            angles.append(np.degrees(0.5 * np.arctan2(2 * moments[0, 1], moments[0, 0] - moments[1, 1])))
            low, high = np.linalg.eigvalsh(moments)
            elongations.append(high / low)
    return np.asarray(angles), np.asarray(elongations)


def test_rod_masks_are_long_and_upright_only_in_the_upright_split():
    upright, elongation = _rod_axes_degrees(make_scenes(150, split="upright", seed=5)[1])
    assert len(upright) >= 30 and np.median(elongation) > 4      # a rod's mask is a rod: about 22 × 5 outline units
    assert np.abs(upright).max() < 16                            # drawn within ±10°, a few degrees of pixel grid
    any_angle, _ = _rod_axes_degrees(make_scenes(150, split="any", seed=5)[1])
    assert np.mean(np.abs(any_angle) > 45) > 0.3


@pytest.mark.parametrize("arguments", [{"split": "sideways"}, {"n": -1}, {"size": 5}, {"seed": -2}])
def test_bad_arguments_raise_option_error(arguments):
    with pytest.raises(OptionError):
        make_scenes(arguments.pop("n", 4), **arguments)


# --- the model ---------------------------------------------------------------------------------------------------
def test_segmenter_traces_returns_maps_and_is_safe_at_the_scene_size():
    model = build_example_segmenter().eval()
    images, _ = make_scenes(3, seed=0)
    traced = torch.fx.symbolic_trace(model)
    with torch.no_grad():
        assert torch.equal(traced(images), model(images))
        assert model(images).shape == (3, 7, SCENE_SIZE, SCENE_SIZE)
    assert SCENE_SIZE in orbify.safe_sizes(model, SCENE_SIZE)
    size = SCENE_SIZE
    for conv in (m for m in model.modules() if isinstance(m, torch.nn.Conv2d) and m.stride[0] > 1):
        # docs/design.md §6: a strided conv is exact under quarter turns when (H + 2p − k) is divisible by the stride
        assert (size + 2 * conv.padding[0] - conv.kernel_size[0]) % conv.stride[0] == 0
        size = (size + 2 * conv.padding[0] - conv.kernel_size[0]) // conv.stride[0] + 1
    assert size == 13
    assert all(m.out_channels % 8 == 0 for m in model.modules()
               if isinstance(m, torch.nn.Conv2d) and m is not model.classifier)


def test_shipped_segmenter_converts_exactly_under_d4_with_a_map_head():
    """Each of the eight moves (torch.rot90 and flip as the reference) moves the converted model's maps the same
    way, in float64."""
    original = load_example_segmenter()
    images, _ = make_scenes(4, split="any", seed=6)
    converted, plan = orbify.convert(original, "d4", head="map", example_input=images[:1])
    converted = converted.double().eval()
    with torch.no_grad():
        maps = converted(images.double())
        for moved_images, moved_maps in zip(d4_moves(images.double()), d4_moves(maps)):
            assert (converted(moved_images) - moved_maps).abs().max() <= 1e-10 * maps.abs().max()
        plain_model = original.double()
        plain = plain_model(images.double())
        worst = max(float((plain_model(moved) - moved_maps).abs().max())
                    for moved, moved_maps in zip(d4_moves(images.double()), d4_moves(plain)))
    assert worst > 0.1 * float(plain.abs().max())       # the original is far from equivariant
    assert plan.head == "map"


# --- shipped weights ---------------------------------------------------------------------------------------------
def test_shipped_weights_are_small_and_load_with_strict_keys_without_pickle():
    with resources.as_file(resources.files("orbify.example") / "segment_weights.pt") as path:
        assert os.path.getsize(path) < 1_000_000
        state = torch.load(path, map_location="cpu", weights_only=True)
    build_example_segmenter().load_state_dict(state, strict=True)


def test_shipped_segmenter_beats_the_background_baseline_upright_and_fails_at_any_angle():
    """Mean IoU recomputed by scikit-learn's jaccard_score (macro average over the classes in masks or maps)."""
    model = load_example_segmenter()
    assert not model.training
    images, masks = make_scenes(96, split="upright", seed=2024)
    with torch.no_grad():
        predicted = torch.cat([model(chunk).argmax(1) for chunk in images.split(32)])
    truth, guess = masks.numpy().ravel(), predicted.numpy().ravel()
    classes = np.union1d(truth, guess)
    mean_iou = sklearn.metrics.jaccard_score(truth, guess, labels=classes, average="macro")
    assert segmentation_scores(model, images, masks).mean_iou == pytest.approx(mean_iou, abs=1e-9)
    # the trivial model: background everywhere, IoU = background share for class 0, 0 for the six others
    baseline = sklearn.metrics.jaccard_score(truth, np.zeros_like(truth), labels=np.arange(7), average="macro",
                                             zero_division=0)
    assert baseline < 0.15 and mean_iou > 0.85
    field = segmentation_scores(model, *make_scenes(96, split="any", seed=2024)).mean_iou
    assert field < mean_iou - 0.2            # trained upright only: the point of the example


def test_training_is_reproducible_and_leaves_global_rng_alone():
    torch.manual_seed(123)
    before = torch.get_rng_state()
    first = train_example_segmenter(seed=1, epochs=1, num_scenes=64, evaluation_scenes=4)
    assert torch.equal(torch.get_rng_state(), before)
    second = train_example_segmenter(seed=1, epochs=1, num_scenes=64, evaluation_scenes=4)
    assert all(torch.equal(value, second.model.state_dict()[key]) for key, value in first.model.state_dict().items())
    assert 0.0 <= first.upright_iou <= 1.0
    with pytest.raises(OptionError):
        train_example_segmenter(num_scenes=10)


# --- the source ----------------------------------------------------------------------------------------------------
def test_example_segment_source_loads_the_shipped_model_and_rebuilds_without_consent(tmp_path):
    loaded = load_source(EXAMPLE_SEGMENT_SOURCE)
    assert loaded.reference == "example-segment" and names_only_registered_code("example-segment")
    state = load_example_segmenter().state_dict()
    assert all(torch.equal(value, state[key]) for key, value in loaded.module.state_dict().items())
    assert type(rebuild("example-segment")).__name__ == "ExampleSegmenter"
    assert usual_input_size("example-segment")[0] == EXAMPLE_SEGMENT_SIZE == SCENE_SIZE   # files/ cannot import example/
    out = tmp_path / "segment.orb"
    result = CliRunner().invoke(app, ["convert", "example-segment", "--head", "map", "-o", str(out)],
                                env={"COLUMNS": "160"})
    assert result.exit_code == 0, result.output
    assert "input size 49" in result.output
    converted = orbify.load(out).module     # a file naming example-segment needs no trust_source
    images, _ = make_scenes(2, split="any", seed=7)
    with torch.no_grad():
        maps = converted(images)
        assert maps.shape == (2, 7, SCENE_SIZE, SCENE_SIZE)
        assert torch.allclose(converted(torch.rot90(images, 1, (2, 3))), torch.rot90(maps, 1, (2, 3)), atol=1e-5)


# --- the demo ------------------------------------------------------------------------------------------------------
QUICK = DemoScale(train_scenes=96, evaluation_scenes=16, epochs=1)
"""A small demo for the test (the full one takes minutes): every step runs, the figures that do not depend on
the amount of tuning are checked."""


@pytest.mark.slow
def test_segment_demo_runs_end_to_end_through_the_command(tmp_path, monkeypatch):
    import orbify.cli.demo as demo_command

    monkeypatch.setattr(demo_command, "run_segment_demo",
                        lambda out, **options: run_segment_demo(out, scale=QUICK, **options))
    result = CliRunner().invoke(app, ["demo", "--task", "segment", "--out", str(tmp_path), "--quiet"],
                                env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    figures = json.loads((tmp_path / FILES["results_json"]).read_text())
    table = (tmp_path / FILES["results_md"]).read_text()
    for row in ("mean IoU, upright scenes", "mean IoU, field scenes (any angle)", "mean IoU, upright moved by d4",
                "equivariance error", "MACs per scene", "ms per scene", AVERAGED_COLUMN):
        assert row in table, row
    columns = {column["name"]: column for column in figures["columns"]}
    assert list(columns) == ["original", AVERAGED_COLUMN, "converted", "tuned", "exported"]
    original, averaged = columns["original"], columns[AVERAGED_COLUMN]
    for name in ("converted", "tuned", "exported"):
        assert columns[name]["equivariance_error"] <= TOLERANCE, name
        assert columns[name]["worst_moved_iou"] == pytest.approx(columns[name]["moved_iou"], abs=1e-6), name
    # the most confident view per pixel: exact in exact arithmetic, but background pixels are near-ties between
    # views, which float32 rounding may resolve differently for a moved scene (the values then differ by rounding)
    assert averaged["equivariance_error"] <= 1e-2
    assert averaged["worst_moved_iou"] == pytest.approx(averaged["moved_iou"], abs=0.005)
    assert original["equivariance_error"] > 0.1
    assert columns["exported"]["upright_iou"] == pytest.approx(columns["tuned"]["upright_iou"], abs=0.01)
    # MACs counted here with torch.utils.flop_counter (FLOPs / 2) on the plain segmenter and one scene; |d4| = 8
    scene, _ = make_scenes(1)
    with torch.no_grad(), FlopCounterMode(display=False) as counter:
        load_example_segmenter()(scene)
    assert original["macs"] == counter.get_total_flops() // 2 and averaged["macs"] == 8 * original["macs"]
    assert columns["tuned"]["macs"] == original["macs"] and columns["tuned"]["params"] < original["params"] / 7
    for name in (*FILES.values(), *PLOTS.values()):
        assert (tmp_path / name).is_file(), name
    refused = CliRunner().invoke(app, ["demo", "--task", "segment", "--out", str(tmp_path)])
    assert refused.exit_code != 0 and "--force" in refused.output


def test_demo_refuses_an_unknown_task(tmp_path):
    result = CliRunner().invoke(app, ["demo", "--task", "count", "--out", str(tmp_path)])
    assert result.exit_code == OptionError.exit_code and "segment" in result.output
    assert not any(tmp_path.iterdir())


# --- the benchmark's quick mode --------------------------------------------------------------------------------------
@pytest.mark.slow
def test_segmentation_benchmark_quick(run_quick):
    """benchmarks/segmentation.py --quick, run in this process as its command line would, on one thread."""
    output = run_quick("segmentation.py")
    rows = {cells[0]: cells for cells in (
        [cell.strip() for cell in line.strip().strip("|").split("|")] for line in output.splitlines()
        if line.lstrip().startswith("|"))}
    for name in ("original", "original averaged over d4 (probability)", "original averaged over d4 (logit)",
                 "original averaged over d4 (most-confident)", "converted, before tuning", "converted, tuned"):
        assert name in rows, name
        assert all(0.0 <= float(cell) <= 100.0 for cell in rows[name][2:5]), rows[name]
    assert rows["original averaged over d4 (logit)"][1] == "8" and rows["converted, tuned"][1] == "1"
    assert "claim" in output and ("met" in output)
