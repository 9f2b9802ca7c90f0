"""Baking tied models into plain torch modules and exporting them (pt2, TorchScript, ONNX).

The exported files are run by the runtimes they are written for (torch.export, torch.jit,
onnxruntime), and the baked and exported models are loaded in a Python process where importing
orbify is impossible, to show that inference needs no orbify.
"""

import pickle
import subprocess
import sys
import textwrap

import pytest
import torch
from torch import fx, nn
from torch.nn.utils import parametrize

from helpers import relative_error
from orbify import bake_model, convert, export_model
from orbify.cli import main
from orbify.common.safe_io import sha256_file
from orbify.errors import OptionError, OutputError, UnsupportedOpError
from orbify.example import load_example_model
from orbify.files.export import FORMATS, run_exported
from orbify.files.saving import save
from orbify.layers.tied import OrbitBatchNorm, OrbitPool
from orbify.symmetry.groups import parse_group

SIZE = 33   # safe for the example CNN: 33 -> 17 -> 9 -> 5 (see orbify.example.model)
TOL = 1e-5
D4 = parse_group("d4")


@pytest.fixture(scope="module")
def tied():
    """The bundled example CNN (trained weights) converted under d4, with an orbit pool in the middle."""
    example = torch.randn(1, 3, SIZE, SIZE)
    converted, plan = convert(load_example_model(), "d4", example_input=example, stop_at="features.2")
    return converted.eval(), plan


@pytest.fixture(scope="module")
def images():
    return torch.randn(4, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(1))


def run_cli(argv: list[str]) -> int:
    """Run the ``orbify`` command line in this process and return its exit code."""
    with pytest.raises(SystemExit) as exit_info:
        main(argv)
    return exit_info.value.code


def invariance_error(run, x) -> float:
    """max_g ‖f(g·x) − f(x)‖ / ‖f(x)‖ over the 8 elements of d4."""
    y = run(x)
    return max(relative_error(run(D4.act_grid(g, x)), y) for g in range(D4.order))


def test_baked_model_is_plain_torch_and_matches(tied, images):
    model, _ = tied
    assert any(isinstance(m, OrbitPool) for m in model.modules())   # the pool path is exercised
    baked = bake_model(model)
    assert isinstance(baked, fx.GraphModule)
    for module in baked.modules():
        assert not parametrize.is_parametrized(module)
        assert not isinstance(module, (OrbitPool, OrbitBatchNorm))
        assert type(module).__module__.startswith("torch."), type(module)
    assert {type(m) for m in baked.modules()} >= {nn.Conv2d, nn.BatchNorm2d, nn.Linear}
    with torch.no_grad():
        assert relative_error(baked(images), model(images)) <= TOL
        assert invariance_error(baked, images) <= TOL
        assert invariance_error(model, images) <= TOL
    # the plain original is not invariant, so the checks above can fail
    with torch.no_grad():
        assert invariance_error(load_example_model(), images) > 1e-2
    # the tied model is untouched: still parametrized, still using the orbit pool module
    assert any(parametrize.is_parametrized(m) for m in model.modules())
    assert "orbify" not in baked.code


def test_baked_weights_are_the_expanded_tied_weights(tied):
    model, _ = tied
    baked = bake_model(model)
    first_conv = model.get_submodule("features.0.0")
    torch.testing.assert_close(baked.get_submodule("features.0.0").weight, first_conv.weight, rtol=0, atol=0)
    assert baked.get_submodule("features.0.0").weight.shape == first_conv.weight.shape
    batch_norm = model.get_submodule("features.0.1")
    assert isinstance(batch_norm, OrbitBatchNorm)
    plain_norm = baked.get_submodule("features.0.1")
    assert type(plain_norm) is nn.BatchNorm2d
    assert plain_norm.num_features == batch_norm.num_features * D4.order


def test_single_tied_module_bakes_to_its_plain_class():
    from orbify.layers.tied import tie_conv
    from orbify.symmetry.layouts import Orbit, Plain

    conv = tie_conv(nn.Conv2d(3, 16, 3, padding=1), D4, Plain(3), Orbit(2))
    baked = bake_model(conv)
    assert type(baked) is nn.Conv2d and not parametrize.is_parametrized(baked)
    assert parametrize.is_parametrized(conv)
    x = torch.randn(2, 3, 9, 9)
    with torch.no_grad():
        torch.testing.assert_close(baked(x), conv(x), rtol=0, atol=0)


def test_orbit_pool_outside_a_graph_is_refused():
    with pytest.raises(UnsupportedOpError, match="torch.fx graph"):
        bake_model(nn.Sequential(nn.Conv2d(3, 8, 1), OrbitPool(8)))


@pytest.fixture(scope="module")
def exported(tied, tmp_path_factory):
    """The tied example model exported in every format (the ONNX export takes ~10 s)."""
    model, _ = tied
    folder = tmp_path_factory.mktemp("exported")
    paths = {}
    for format in FORMATS:
        paths[format] = export_model(model, torch.randn(1, 3, SIZE, SIZE), folder / f"model.{format}", format)
    return paths


@pytest.mark.parametrize("format", FORMATS)
def test_exported_files_match_and_stay_invariant(tied, exported, images, format):
    model, _ = tied
    path = exported[format]
    # each file runs in its own runtime: torch.export.load, torch.jit.load, onnxruntime
    y = run_exported(path, format, images)
    with torch.no_grad():
        assert relative_error(y, model(images)) <= TOL
    assert invariance_error(lambda x: run_exported(path, format, x), images) <= TOL
    # exported at batch 1, the file takes other batch sizes
    assert run_exported(path, format, images[:3]).shape == (3, y.shape[1])


def test_baked_and_exported_models_run_without_orbify(tied, exported, images, tmp_path):
    model, _ = tied
    baked = bake_model(model)
    pickled = pickle.dumps(baked)
    assert b"orbify" not in pickled
    torch.save(baked, tmp_path / "baked.pt")
    torch.save(images, tmp_path / "images.pt")
    script = textwrap.dedent(f"""
        import sys
        sys.modules["orbify"] = None   # any import of orbify now fails
        import torch
        folder = {str(tmp_path)!r}
        images = torch.load(folder + "/images.pt")
        with torch.no_grad():
            outputs = {{
                "baked": torch.load(folder + "/baked.pt", weights_only=False)(images),
                "pt2": torch.export.load({str(exported["pt2"])!r}).module()(images),
                "torchscript": torch.jit.load({str(exported["torchscript"])!r})(images),
            }}
        torch.save(outputs, folder + "/outputs.pt")
    """)
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr[-2000:]
    outputs = torch.load(tmp_path / "outputs.pt")
    with torch.no_grad():
        expected = model(images)
    for name, output in outputs.items():
        assert relative_error(output, expected) <= TOL, name


def test_export_refuses_existing_output_and_unknown_format(tied, tmp_path):
    model, _ = tied
    target = tmp_path / "model.pt2"
    target.write_bytes(b"keep me")
    digest = sha256_file(target)
    with pytest.raises(OutputError, match="already exists"):
        export_model(model, torch.randn(1, 3, SIZE, SIZE), target, "pt2")
    assert sha256_file(target) == digest
    with pytest.raises(OptionError, match="format"):
        export_model(model, torch.randn(1, 3, SIZE, SIZE), tmp_path / "model.x", "keras")
    assert not (tmp_path / "model.x").exists()
    export_model(model, torch.randn(1, 3, SIZE, SIZE), target, "torchscript", force=True)
    assert sha256_file(target) != digest


def test_cli_exports_a_converted_file(tied, tmp_path, capsys, images):
    model, plan = tied
    converted_file = save(model, plan, tmp_path / "example-d4.orb", reference="orbify.example:load_example_model")
    digest = sha256_file(converted_file)
    output = tmp_path / "example-d4.pt"
    assert run_cli(["export", str(converted_file), "--format", "torchscript", "-o", str(output)]) == 0
    printed = capsys.readouterr().out
    assert "torchscript" in printed and f"3×{SIZE}×{SIZE}" in printed   # the recorded input size is used
    assert sha256_file(converted_file) == digest
    with torch.no_grad():
        assert relative_error(run_exported(output, "torchscript", images), model(images)) <= TOL
    # a second run refuses to replace the file
    assert run_cli(["export", str(converted_file), "--format", "torchscript", "-o", str(output)]) == 2
    assert "already exists" in capsys.readouterr().err


def test_cli_exports_any_source(tmp_path, capsys):
    output = tmp_path / "example.pt2"
    assert run_cli(["export", "example", "-o", str(output), "--input-size", str(SIZE)]) == 0
    assert output.is_file()
    assert "pt2" in capsys.readouterr().out
