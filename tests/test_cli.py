"""The command line a newcomer meets: convert, sizes and demo, their help, input-size choice and error paths;
the README's convert and torchrun command lines run as a user runs them, in fresh processes.

Every error path must exit non-zero with one paragraph and no traceback, write nothing and leave the
input files byte-for-byte unchanged (hashed before and after with orbify.common.safe_io.sha256_file).
"""

import re
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision
from PIL import Image
from torch import nn
from typer.testing import CliRunner

import orbify
from helpers import example_params, stride_rule_holds
from orbify.cli import app
from orbify.common.safe_io import sha256_file
from orbify.example import load_example_model, make_tiles
from orbify.files.sources import usual_input_size
from orbify.graph.sizes import choose_input_size
from orbify.symmetry.layouts import Orbit, Plain

runner = CliRunner()


def run(*args):
    """Exit code and everything printed (stdout and stderr)."""
    result = runner.invoke(app, [str(a) for a in args])
    return result.exit_code, result.output


def fails(*args):
    """Exit code, everything printed, and what went to stderr alone."""
    result = runner.invoke(app, [str(a) for a in args])
    return result.exit_code, result.output, result.stderr


def assert_one_paragraph_error(code, output, errors, *needles):
    assert code not in (0, None), output
    assert "Traceback" not in output, output
    text = errors.strip()
    assert text.startswith("error:"), output
    assert "\n" not in text, output          # one paragraph, printed without wrapping
    flat = " ".join(text.split())
    for needle in needles:
        assert needle in flat, (needle, output)


@pytest.fixture
def example_weights(tmp_path):
    """The shipped example weights as a plain state-dict file, read by the factory source."""
    path = tmp_path / "example.pt"
    torch.save(load_example_model().state_dict(), path)
    return path


# -- convert: the happy path -------------------------------------------------------------------------------------
def test_convert_example_chooses_the_tile_size_and_writes_an_invariant_model(tmp_path):
    out = tmp_path / "example-d4.orb"
    code, output = run("convert", "example", "-o", out)
    assert code == 0, output
    flat = " ".join(output.split())
    assert "input size 33: the bundled example's tile size" in flat
    for row in ("parameters", "MACs per image", "worst weight residual", "output invariance error"):
        assert row in flat
    # d4 (8 elements), channels budget: the counts from the layer shapes and the budget formula (tests/helpers.py)
    assert f"{example_params():,}" in flat and f"{example_params(group_order=8):,}" in flat
    assert "tip: the shipped recipe 'example'" in flat
    loaded = orbify.load(out)
    assert loaded.plan.group == "d4" and tuple(loaded.plan.input_shape[-2:]) == (33, 33)
    # Reference for the group action: numpy.rot90 and numpy.flip on the pixel axes (numpy documentation).
    images, _ = make_tiles(4, split="any", seed=3)
    with torch.no_grad():
        logits = loaded.module(images)
        for turns in range(4):
            for mirror in (False, True):
                moved = images.numpy()[..., ::-1] if mirror else images.numpy()
                moved = torch.from_numpy(np.ascontiguousarray(np.rot90(moved, turns, axes=(-2, -1))))
                error = float((loaded.module(moved) - logits).norm() / logits.norm())
                assert error <= 1e-5, (turns, mirror, error)


def test_convert_with_a_recipe_and_an_override(tmp_path):
    out = tmp_path / "example-c4.orb"
    code, output = run("convert", "example", "--recipe", "example", "--group", "c4", "-o", out)
    assert code == 0, output
    flat = " ".join(output.split())
    assert "input size 33: the size of recipe 'example', safe" in flat
    assert "tip:" not in flat
    loaded = orbify.load(out)
    assert loaded.plan.group == "c4" and loaded.metadata["recipe"] == "example"


def test_convert_warns_about_an_unsafe_requested_size_and_names_safe_ones(tmp_path):
    # 32 px: the first 3x3 stride-2 padding-1 conv sees (32 + 2 - 3) = 31, odd, so its grid is not symmetric.
    code, output = run("convert", "example", "--input-size", "32", "-o", tmp_path / "x.orb")
    assert code == 0, output
    flat = " ".join(output.split())
    assert "input size 32: given with --input-size, NOT safe" in flat
    assert "33" in flat.split("safe sizes nearby:")[1]


def test_convert_reads_weights_for_a_factory_source_and_leaves_them_unchanged(tmp_path, example_weights):
    before = sha256_file(example_weights)
    out = tmp_path / "net.orb"
    code, output = run("convert", "orbify.example.model:build_example_cnn", "--weights", example_weights,
                       "--budget", "params", "--input-size", "33", "-o", out)
    assert code == 0, output
    assert sha256_file(example_weights) == before
    assert orbify.load(out).plan.budget == "params"


def test_convert_stops_at_a_node_and_pools_its_orbits_there(tmp_path):
    out = tmp_path / "partial.orb"
    code, output = run("convert", "example", "--group", "c4", "--stop-at", "features.2", "-o", out)
    assert code == 0, output
    loaded = orbify.load(out)
    assert loaded.plan.stop_at == "features.2"
    layouts = {layer.target: (layer.layout_in, layer.layout_out) for layer in loaded.plan.layers}
    assert layouts["features.2.0"] == (Orbit(8), Orbit(16))      # c4: 32 and 64 channels in orbits of 4
    for target in ("features.3.0", "features.3.1", "classifier"):    # after the stop: plain channels
        assert all(isinstance(layout, Plain) for layout in layouts[target]), (target, layouts[target])


# -- input sizes -------------------------------------------------------------------------------------------------
def test_size_choice_for_a_torchvision_backbone_is_the_nearest_safe_size_to_224():
    model = torchvision.models.resnet18(weights=None).eval()
    choice = choose_input_size(model, usual_input_size("torchvision:resnet18"))
    assert not stride_rule_holds(model, 224)
    assert stride_rule_holds(model, choice.size)
    assert all(not stride_rule_holds(model, s) for s in range(224 - abs(choice.size - 224) + 1, choice.size))
    assert choice.size == 225
    assert "224" in choice.reason and "conv1" in choice.reason


def test_size_choice_for_a_model_of_unknown_origin_starts_from_224():
    # The example CNN named by its factory: its first stride-2 3x3 conv (padding 1) sees 224 + 2 - 3 = 223, odd;
    # at 225 the three stride-2 convs see 225, 113 and 57, and 224, 112 and 56 are even.
    model = load_example_model()
    choice = choose_input_size(model, usual_input_size("orbify.example.model:build_example_cnn"))
    assert choice.size == 225 and stride_rule_holds(model, 225) and not stride_rule_holds(model, 224)
    assert "the safe size nearest 224" in choice.reason and "unknown origin" in choice.reason


def test_sizes_command_lists_safe_sizes():
    code, output = run("sizes", "torchvision:resnet18", "--near", "224", "--count", "2")
    assert code == 0, output
    assert "224 is not safe" in output and "225" in output


# -- help --------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("command", ["convert", "demo"])
def test_help_has_examples(command):
    code, output = run(command, "--help")
    assert code == 0, output
    assert "Examples" in output and f"orbify {command}" in output


JOB_ORDER = ["convert", "check", "tune", "export", "sizes", "recipes", "summary", "diff", "demo"]


@pytest.mark.parametrize("launcher", ["console script", "python -m"])
def test_help_lists_the_commands_in_the_order_of_the_job(launcher):
    # run as a user does: the installed console script, or the module, in a fresh process
    script = Path(sys.executable).with_name("orbify")
    command = [str(script), "--help"] if launcher == "console script" else [sys.executable, "-m", "orbify.cli",
                                                                             "--help"]
    if launcher == "console script":
        assert script.is_file(), f"the console script {script} is not installed"
    done = subprocess.run(command, capture_output=True, text=True, timeout=120, env={"COLUMNS": "120", "PATH": ""})
    assert done.returncode == 0, done.stderr
    listed = [match.group(1) for match in re.finditer(r"^│ (\w+)\s{2,}", done.stdout, re.MULTILINE)]
    assert listed == JOB_ORDER, done.stdout


def test_convert_help_lists_every_option():
    output = " ".join(run("convert", "--help")[1].split())
    for option in ("--group", "--budget", "--head", "--init", "--input-size", "--recipe", "--weights", "--stop-at",
                   "--trust-pickle", "--out", "--force"):
        assert option in output, option


# -- as a user runs it: the installed console script and torchrun, in fresh processes ------------------------------
def console_script() -> Path:
    """The installed ``orbify`` command beside this interpreter."""
    script = Path(sys.executable).with_name("orbify")
    assert script.is_file(), f"the console script {script} is not installed"
    return script


def run_as_a_user(command: list, cwd: Path, timeout: int = 300) -> subprocess.CompletedProcess:
    """Run ``command`` in a fresh process in ``cwd``, with no environment but a terminal width and one thread
    per process (the suite shares two cores), and return what it printed."""
    environment = {"COLUMNS": "120", "PATH": "", "OMP_NUM_THREADS": "1"}
    done = subprocess.run([str(part) for part in command], cwd=cwd, capture_output=True, text=True,
                          timeout=timeout, env=environment)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    return done


def channels_budget_params(model: nn.Module, order: int) -> int:
    """Stored parameters of ``model`` converted under the channels budget to a group of ``order`` elements, from
    its layer shapes alone (docs/design.md §7): every conv weight stores 1/order of its numbers (one per orbit
    of index tuples, the group moving the output's orbit slots freely), every batch norm one weight and bias
    per orbit, and the invariant linear head one weight per input orbit and class, plus its biases."""
    total = 0
    for module in model.modules():
        if isinstance(module, nn.Conv2d):
            total += module.weight.numel() // order + (0 if module.bias is None else module.out_channels // order)
        elif isinstance(module, nn.BatchNorm2d):
            total += 2 * module.num_features // order
        elif isinstance(module, nn.Linear):
            total += module.in_features // order * module.out_features + module.out_features
    return total


def test_the_readme_convert_example_runs_through_the_console_script(tmp_path):
    # README, "Converting your own model": orbify convert torchvision:resnet18 --weights resnet18.pt -o resnet18-d4.orb
    # (at a small safe size, 33 = 32 + 1, to keep it quick; the size choice is tested above)
    torch.manual_seed(0)
    original = torchvision.models.resnet18(weights=None)
    torch.save(original.state_dict(), tmp_path / "resnet18.pt")
    before = sha256_file(tmp_path / "resnet18.pt")
    done = run_as_a_user([console_script(), "convert", "torchvision:resnet18", "--weights", "resnet18.pt",
                          "--input-size", "33", "-o", "resnet18-d4.orb"], cwd=tmp_path)
    flat = " ".join(done.stdout.split())
    assert "tip: the shipped recipe 'resnet'" in flat and "input size 33: given with --input-size, safe" in flat
    # Published: torchvision's weights metadata num_params (ResNet18_Weights.DEFAULT, read without a download)
    published = torchvision.models.get_model_weights("resnet18").DEFAULT.meta["num_params"]
    expected = channels_budget_params(original, order=8)
    assert f"{published:,}" in flat and f"{expected:,}" in flat, flat
    assert sha256_file(tmp_path / "resnet18.pt") == before
    loaded = orbify.load(tmp_path / "resnet18-d4.orb")
    assert loaded.plan.group == "d4" and sum(p.numel() for p in loaded.module.parameters()) == expected
    # the weights file was read: the head keeps its biases, and averaging its weight over the orbits of input
    # channels keeps every row's sum
    assert torch.equal(loaded.module.fc.bias, original.fc.bias)
    torch.testing.assert_close(loaded.module.fc.weight.sum(1), original.fc.weight.sum(1), atol=1e-5, rtol=0)
    images = torch.randn(2, 3, 33, 33)
    with torch.no_grad():
        logits = loaded.module.eval()(images)
        turned = loaded.module(torch.from_numpy(np.ascontiguousarray(np.rot90(images.numpy(), 1, axes=(-2, -1)))))
    assert float((turned - logits).norm() / logits.norm()) <= 1e-5


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def write_png_tiles(folder: Path, count: int) -> Path:
    """``count`` example tiles (33 px) as 8-bit PNG files, through Pillow."""
    folder.mkdir()
    images, _ = make_tiles(count, split="any", seed=5)
    scaled = (images - images.min()) / (images.max() - images.min()) * 255
    for index, image in enumerate(scaled.round().to(torch.uint8).permute(0, 2, 3, 1).numpy()):
        Image.fromarray(image).save(folder / f"tile{index:02d}.png")
    return folder


@pytest.mark.slow
def test_the_readme_torchrun_command_tunes_on_two_cpu_processes(tmp_path):
    # README, "Many processes, many machines":
    # torchrun --nproc_per_node=4 -m orbify.cli tune model-c4.orb --weights original.pt --data images/ -o tuned.orb
    # with two CPU processes (gloo), 16 tiles, one epoch
    torch.save(load_example_model().state_dict(), tmp_path / "original.pt")
    code, output = run("convert", "orbify.example.model:build_example_cnn", "--weights", tmp_path / "original.pt",
                       "--group", "c4", "-o", tmp_path / "model-c4.orb")
    assert code == 0, output
    write_png_tiles(tmp_path / "images", 16)
    done = run_as_a_user([sys.executable, "-m", "torch.distributed.run", "--nproc_per_node=2", "--nnodes=1",
                          "--master_addr=127.0.0.1", f"--master_port={free_port()}",
                          "-m", "orbify.cli", "tune", "model-c4.orb", "--weights", "original.pt", "--data", "images/",
                          "--epochs", "1", "--batch-size", "4", "--workers", "0", "-o", "tuned.orb"], cwd=tmp_path)
    flat = " ".join(done.stdout.split())
    assert "tuning on 2 processes: 14 training, 2 held-out images" in flat, flat
    start, tuned = orbify.load(tmp_path / "model-c4.orb"), orbify.load(tmp_path / "tuned.orb")
    moved = [key for key, value in start.module.state_dict().items()
             if not torch.equal(value, tuned.module.state_dict()[key])]
    assert any(key.endswith("parametrizations.weight.original") for key in moved), moved
    images, _ = make_tiles(4, split="any", seed=6)
    with torch.no_grad():
        logits = tuned.module.eval()(images)
        turned = tuned.module(torch.from_numpy(np.ascontiguousarray(np.rot90(images.numpy(), 1, axes=(-2, -1)))))
    assert float((turned - logits).norm() / logits.norm()) <= 1e-5


# -- error paths -------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("args, needles", [
    (["example", "--group", "q7"], ["Unknown group 'q7'", "dN"]),
    (["example", "--budget", "wide"], ["Unknown budget 'wide'", "channels, params, fields"]),
    (["torchvision:resnet_nine"], ["torchvision has no model named 'resnet_nine'"]),
    (["no_such_package.models:build"], ["Cannot import the module 'no_such_package.models'"]),
    (["missing-model.pt"], ["'missing-model.pt' does not exist"]),
    (["example", "--recipe", "no-such-recipe"], ["No recipe named 'no-such-recipe'"]),
    (["example", "--init", "embed"], ["needs the 'fields' budget"]),
    (["example", "--head", "map"], ["has no spatial axes", "head='invariant'"]),
])
def test_bad_input_is_one_paragraph_and_writes_nothing(tmp_path, args, needles):
    out = tmp_path / "x.orb"
    assert_one_paragraph_error(*fails("convert", *args, "-o", out), *needles)
    assert not out.exists()


def test_missing_weights_file(tmp_path):
    refused = fails("convert", "orbify.example.model:build_example_cnn", "--weights", tmp_path / "nope.pt",
                    "-o", tmp_path / "x.orb")
    assert_one_paragraph_error(*refused, "nope.pt", "does not exist")


def test_existing_output_needs_force_and_inputs_are_never_overwritten(tmp_path, example_weights):
    out = tmp_path / "x.orb"
    out.write_bytes(b"an earlier result")
    kept, weights_before = sha256_file(out), sha256_file(example_weights)
    assert_one_paragraph_error(*fails("convert", "example", "-o", out), "already exists", "--force")
    assert sha256_file(out) == kept
    # even with --force, the weights file given as input is not replaced by the output
    refused = fails("convert", "orbify.example.model:build_example_cnn", "--weights", example_weights,
                    "-o", example_weights, "--force")
    assert_one_paragraph_error(*refused, "is an input of this command")
    assert sha256_file(example_weights) == weights_before


def test_a_converted_file_is_not_converted_again(tmp_path):
    first = tmp_path / "first.orb"
    assert run("convert", "example", "-o", first)[0] == 0
    before = sha256_file(first)
    assert_one_paragraph_error(*fails("convert", first, "-o", tmp_path / "second.orb"), "already a converted model")
    assert sha256_file(first) == before and not (tmp_path / "second.orb").exists()


def test_debug_shows_the_traceback(tmp_path):
    code, output = run("--debug", "convert", "example", "--group", "q7", "-o", tmp_path / "x.orb")
    assert code not in (0, None)
    assert "Traceback" in output and "Unknown group 'q7'" in output


def test_demo_refuses_to_overwrite_its_files_without_force(tmp_path):
    (tmp_path / "results.md").write_text("earlier")
    before = sha256_file(tmp_path / "results.md")
    assert_one_paragraph_error(*fails("demo", "--out", tmp_path), "already holds demo files", "--force")
    assert sha256_file(tmp_path / "results.md") == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results.md"]


def test_demo_refuses_a_file_as_its_folder(tmp_path):
    target = tmp_path / "a-file"
    target.write_text("x")
    assert_one_paragraph_error(*fails("demo", "--out", target), "is a file")
