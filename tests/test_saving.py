"""Converted-model files: save → load round trips, size on disk, and refusing bad files without writing."""

import json

import pytest
import torch
import torchvision
from torch import nn

from orbify import convert, load, save
from orbify.calibration.report import CalibrationReport, LayerCalibration
from orbify.cli import main
from orbify.common.safe_io import sha256_file
from orbify.errors import CheckpointError, OptionError, OutputError, SourceError
from orbify.example import load_example_model
from orbify.files.saving import DESCRIPTION_KEY, FORMAT_NAME, STATE_KEY, is_converted_file
from orbify.files.sources import load_source
from orbify.graph.plan import ConversionPlan, LayerPlan, Rounding
from orbify.symmetry.layouts import Flat, Orbit, Plain
from orbify.transfer.recalibrate import recalibrate_batch_norm

EXAMPLE = "orbify.example:load_example_model"
SIZE = 33   # safe for the example CNN, resnet18 and mobilenet_v2 (see tests/test_convert.py SMALL_SAFE)


def run_cli(argv: list[str]) -> int:
    """Run the ``orbify`` command line in this process and return its exit code."""
    with pytest.raises(SystemExit) as exit_info:
        main(argv)
    return exit_info.value.code


def outputs(module: nn.Module, x: torch.Tensor) -> torch.Tensor:
    with torch.no_grad():
        return module.eval()(x)


@pytest.fixture(scope="module")
def example_file(tmp_path_factory):
    """The bundled example CNN converted under d4 (ReLU given as a leaf type) and saved; (model, plan, path)."""
    converted, plan = convert(load_example_model(), "d4", example_input=torch.randn(2, 3, SIZE, SIZE),
                              leaf_types=(nn.ReLU,))
    path = tmp_path_factory.mktemp("saved") / "example-d4.orb"
    save(converted, plan, path, reference=EXAMPLE, recipe="none", check={"invariance_error": 1.5e-7},
         leaf_types=(nn.ReLU,))
    return converted.eval(), plan, path


@pytest.fixture(scope="module")
def images():
    return torch.randn(3, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(2))


def rewrite(source, target, describe=None, state=None):
    """Copy a converted file to ``target`` with its description (a dict) or state dict edited."""
    content = torch.load(source, weights_only=True)
    metadata = json.loads(content[DESCRIPTION_KEY])
    if describe:
        describe(metadata)
    if state:
        state(content[STATE_KEY])
    content[DESCRIPTION_KEY] = json.dumps(metadata)
    torch.save(content, target)
    return target


def test_example_round_trip_is_bitwise(example_file, images):
    model, plan, path = example_file
    loaded = load(path)
    assert torch.equal(outputs(loaded.module, images), outputs(model, images))
    assert loaded.plan.to_dict() == plan.to_dict()
    metadata = loaded.metadata
    assert metadata["format"] == FORMAT_NAME and metadata["format_version"] == "1.0"
    assert metadata["source"] == EXAMPLE and metadata["recipe"] == "none"
    assert metadata["check"] == {"invariance_error": 1.5e-7}
    assert metadata["conversion"]["leaf_types"] == ["torch.nn.modules.activation:ReLU"]
    assert metadata["conversion"]["input_shape"] == [2, 3, SIZE, SIZE]
    assert not loaded.module.training
    assert loaded.plan == plan


def test_plan_json_writes_layouts_as_text_and_reads_them_back():
    rounded = LayerPlan("conv", "conv", "Conv2d", Plain(3), Orbit(3), (3, 10), (3, 12), (3, 3), (1, 1),
                        notes=["rounded 10 channels to 3 whole orbits (12 channels)"], weight_residual=0.5,
                        rounding=Rounding(10, 3, 12))
    flat = LayerPlan("fc", "fc", "Linear", Flat(Orbit(3), 2, 2), Plain(5), (40, 5), (48, 5))
    report = CalibrationReport(8, 1, "variance", 1e-3, True, False,
                               [LayerCalibration("fc", "fc", "least squares", 5, 48, 1, [0, 1, 2, 3, 4], 0.25)])
    plan = ConversionPlan("c4", "channels", "invariant", "calibrated", (1, 3, 4, 4), layers=[rounded, flat],
                          values={"x": Plain(3), "conv": Orbit(3), "flatten": Flat(Orbit(3), 2, 2), "size": None},
                          calibration=report)
    data = json.loads(json.dumps(plan.to_dict()))
    assert [(layer["layout_in"], layer["layout_out"]) for layer in data["layers"]] == \
        [("plain(3)", "orbit(3)"), ("flat(orbit(3)×2×2)", "plain(5)")]
    assert "rounding" not in data["layers"][0]
    assert data["values"] == {"x": "plain(3)", "conv": "orbit(3)", "flatten": "flat(orbit(3)×2×2)", "size": "-"}
    assert data["calibration"] == report.to_dict()
    read = ConversionPlan.from_dict(data, CalibrationReport.from_dict)
    assert read == plan and read.roundings == ["rounded 10 channels to 3 whole orbits (12 channels)"]


def test_float64_model_round_trips_in_float64(example_file, tmp_path, images):
    model, plan, _ = example_file
    double = convert(load_example_model(), "d4", example_input=torch.randn(1, 3, SIZE, SIZE))[0].double()
    path = save(double, plan, tmp_path / "double.orb", reference=EXAMPLE)
    loaded = load(path)
    assert loaded.metadata["conversion"]["dtype"] == "float64"
    assert torch.equal(outputs(loaded.module, images.double()), outputs(double, images.double()))


@pytest.mark.slow
@pytest.mark.parametrize("name", ["resnet18", "mobilenet_v2"])
def test_torchvision_round_trip_is_bitwise(name, tmp_path):
    # Architectures from torchvision's model definitions (random weights), converted under d4.
    torch.manual_seed(0)
    x = torch.randn(2, 3, SIZE, SIZE)
    converted, plan = convert(torchvision.models.get_model(name, weights=None).eval(), "d4", example_input=x)
    recalibrate_batch_norm(converted, [torch.randn(8, 3, SIZE, SIZE)])   # new statistics: not the rebuild's
    path = save(converted, plan, tmp_path / f"{name}-d4.orb", reference=f"torchvision:{name}")
    loaded = load(path)
    expected = outputs(converted, x)
    assert expected.abs().max() > 1e-3
    assert torch.equal(outputs(loaded.module, x), expected)
    assert loaded.plan.to_dict() == plan.to_dict()


@pytest.mark.slow
def test_resnet18_c4_file_is_a_quarter_of_the_original(tmp_path):
    original = torchvision.models.resnet18(weights=None).eval()
    converted, plan = convert(original, "c4", "channels", example_input=torch.randn(1, 3, SIZE, SIZE))
    converted_file = save(converted, plan, tmp_path / "resnet18-c4.orb", reference="torchvision:resnet18")
    torch.save(original.state_dict(), tmp_path / "resnet18.pt")
    ratio = converted_file.stat().st_size / (tmp_path / "resnet18.pt").stat().st_size
    # Expected from torchvision's resnet18 definition: under c4 `channels` every conv/linear weight and
    # every batch-norm vector is stored once per orbit of 4; only the classifier bias (the plain
    # output) and the batch counters stay whole.
    state = original.state_dict()
    whole = state["fc.bias"].numel() + sum(v.numel() for k, v in state.items() if k.endswith("num_batches_tracked"))
    total = sum(v.numel() for v in state.values())
    expected = ((total - whole) / 4 + whole) / total
    print(f"resnet18 c4 converted file / original state dict = {ratio:.4f} (numbers: {expected:.4f})")
    assert ratio == pytest.approx(expected, abs=0.005)
    assert 0.24 < ratio < 0.27   # "about a quarter"


def test_any_source_accepts_a_converted_file(example_file, images, tmp_path):
    model, _, path = example_file
    loaded = load_source(str(path))
    assert loaded.reference is None   # only the file rebuilds it
    assert torch.equal(outputs(loaded.module, images), outputs(model, images))
    # recognised by its content too, not only by the suffix
    renamed = tmp_path / "renamed.bin"
    renamed.write_bytes(path.read_bytes())
    assert is_converted_file(renamed)
    torch.save(load_example_model().state_dict(), tmp_path / "plain.pt")
    assert not is_converted_file(tmp_path / "plain.pt")


def test_save_refuses_existing_output_and_unrebuildable_models(example_file, tmp_path):
    model, plan, path = example_file
    digest = sha256_file(path)
    with pytest.raises(OutputError, match="already exists"):
        save(model, plan, path, reference=EXAMPLE)
    assert sha256_file(path) == digest
    with pytest.raises(SourceError, match="source reference"):
        save(model, plan, tmp_path / "no-source.orb", reference=None)
    with pytest.raises(OptionError, match="JSON"):
        save(model, plan, tmp_path / "bad-check.orb", reference=EXAMPLE, check={"figure": object()})
    with pytest.raises(OptionError, match="GraphModule"):
        save(load_example_model(), plan, tmp_path / "plain.orb", reference=EXAMPLE)
    assert list(tmp_path.iterdir()) == []


def test_truncated_file_is_refused_and_nothing_is_written(example_file, tmp_path, capsys):
    _, _, path = example_file
    truncated = tmp_path / "truncated.orb"
    truncated.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    digest = sha256_file(truncated)
    with pytest.raises(CheckpointError, match="truncated"):
        load(truncated)
    output = tmp_path / "out.pt2"
    assert run_cli(["export", str(truncated), "-o", str(output)]) == 2
    assert "truncated" in capsys.readouterr().err
    assert not output.exists() and sha256_file(truncated) == digest
    assert sorted(p.name for p in tmp_path.iterdir()) == ["truncated.orb"]


def test_wrong_key_is_named_and_nothing_is_written(example_file, tmp_path, capsys):
    _, _, path = example_file

    def rename(state):
        state["features.0.0.weight"] = state.pop("features.0.0.parametrizations.weight.original")

    wrong = rewrite(path, tmp_path / "wrong-key.orb", state=rename)
    digest = sha256_file(wrong)
    with pytest.raises(CheckpointError, match="features.0.0.parametrizations.weight.original") as error:
        load(wrong)
    assert "features.0.0.weight" in str(error.value)
    output = tmp_path / "out.onnx"
    assert run_cli(["export", str(wrong), "--format", "onnx", "-o", str(output)]) == 2
    assert "features.0.0.weight" in capsys.readouterr().err
    assert not output.exists() and sha256_file(wrong) == digest


def test_pickled_model_without_trust_flag_is_refused_and_nothing_is_written(tmp_path, capsys):
    pickled = tmp_path / "model.pt"
    torch.save(load_example_model(), pickled)
    digest = sha256_file(pickled)
    output = tmp_path / "out.pt2"
    assert run_cli(["export", str(pickled), "-o", str(output), "--input-size", str(SIZE)]) == 2
    assert "--trust-pickle" in capsys.readouterr().err
    assert not output.exists() and sha256_file(pickled) == digest


def _set(key, value):
    def edit(metadata):
        metadata[key] = value
    return edit


@pytest.mark.parametrize("edit, message", [
    (_set("format", "some-other-format"), "not 'orbify-converted-model'"),
    (_set("format_version", "2.0"), "format version 2.0"),
    (_set("format_version", "one"), "not 'major.minor'"),
    (_set("source", "not a reference"), "cannot be rebuilt here"),
    (_set("source", "torchvision:resnet18"), "do not fit the rebuilt model"),
])
def test_bad_descriptions_give_clear_errors(example_file, tmp_path, edit, message):
    _, _, path = example_file
    bad = rewrite(path, tmp_path / "bad.orb", describe=edit)
    with pytest.raises(CheckpointError, match=message):
        load(bad)


def test_newer_minor_version_is_read(example_file, tmp_path, images):
    model, _, path = example_file
    newer = rewrite(path, tmp_path / "newer.orb", describe=_set("format_version", "1.7"))
    assert torch.equal(outputs(load(newer).module, images), outputs(model, images))


def test_files_that_are_not_converted_files(tmp_path):
    empty = tmp_path / "empty.orb"
    empty.write_bytes(b"")
    with pytest.raises(CheckpointError, match="empty"):
        load(empty)
    weights = tmp_path / "weights.orb"
    torch.save(load_example_model().state_dict(), weights)
    with pytest.raises(CheckpointError, match="not a readable orbify converted-model file"):
        load(weights)
    with pytest.raises(CheckpointError, match="does not exist"):
        load(tmp_path / "missing.orb")
