"""Bad models, bad options and bad files: every failure is one clear paragraph, exits non-zero without a
traceback, writes nothing and never modifies an input (inputs are hashed before and after)."""


import pytest
import torch
from typer.testing import CliRunner

import robust_models
from orbify.cli import app
from orbify.common.safe_io import sha256_file

runner = CliRunner()


def run(*args):
    result = runner.invoke(app, [str(a) for a in args])
    return result.exit_code, result.output


def assert_refused(code, output, *needles):
    assert code not in (0, None), output
    assert "Traceback" not in output, output
    text = " ".join(output.split())
    for needle in needles:
        assert needle in text, (needle, output)


@pytest.fixture
def small_weights(tmp_path):
    path = tmp_path / "small.pt"
    torch.manual_seed(0)
    torch.save(robust_models.small().state_dict(), path)
    return path


def test_untraceable_model(tmp_path):
    code, out = run("convert", "robust_models:branchy", "--input-size", "9", "-o", tmp_path / "x.orb")
    assert_refused(code, out, "cannot be traced", "robust_models.py", "if y.mean() > 0", "leaf")
    assert not (tmp_path / "x.orb").exists()


@pytest.mark.parametrize("factory,node", [("shuffle", "graph node 'shuffle_blocks'"), ("channel_split", "graph node 'getitem'")])
def test_unsupported_channel_reshapes(tmp_path, factory, node):
    code, out = run("convert", f"robust_models:{factory}", "--input-size", "9", "-g", "c4", "-o", tmp_path / "x.orb")
    assert_refused(code, out, node, "robust_models.py", "stop")
    assert not (tmp_path / "x.orb").exists()


def test_wrong_input_channels(tmp_path):
    code, out = run("convert", "robust_models:small", "--input-size", "9", "--channels", "1", "-o", tmp_path / "x.orb")
    assert_refused(code, out, "does not run through the model", "graph node", "--channels")


@pytest.mark.parametrize("args,needle", [
    (["-g", "q4"], "cN"), (["--budget", "widths"], "channels, params, fields"),
    (["--head", "pool"], "invariant, map"), (["--init", "magic"], "orbit-average"),
])
def test_unknown_options_list_the_choices(tmp_path, args, needle):
    code, out = run("convert", "robust_models:small", "--input-size", "9", *args, "-o", tmp_path / "x.orb")
    assert_refused(code, out, needle)


def test_factory_that_returns_no_module(tmp_path):
    code, out = run("convert", "robust_models:not_a_module", "-o", tmp_path / "x.orb")
    assert_refused(code, out, "robust_models:not_a_module")


def test_weights_that_do_not_fit(tmp_path, small_weights):
    wrong = tmp_path / "wrong.pt"
    state = torch.load(small_weights, weights_only=True)
    state["0.weight"] = torch.zeros(8, 3, 3, 3)
    state["extra.weight"] = torch.zeros(1)
    torch.save(state, wrong)
    before = sha256_file(wrong)
    code, out = run("convert", "robust_models:small", "--weights", wrong, "--input-size", "9", "-o", tmp_path / "x.orb")
    assert_refused(code, out, "0.weight", "extra.weight")
    assert sha256_file(wrong) == before and not (tmp_path / "x.orb").exists()


@pytest.mark.parametrize("damage", ["empty", "truncated", "garbage"])
def test_damaged_weights_files(tmp_path, small_weights, damage):
    data = small_weights.read_bytes()
    bad = tmp_path / f"{damage}.pt"
    bad.write_bytes({"empty": b"", "truncated": data[: len(data) // 2], "garbage": b"\x00not a checkpoint" * 50}[damage])
    before = sha256_file(bad)
    code, out = run("convert", "robust_models:small", "--weights", bad, "--input-size", "9", "-o", tmp_path / "x.orb")
    assert_refused(code, out, str(bad.name))
    assert sha256_file(bad) == before and not (tmp_path / "x.orb").exists()


def test_converted_file_damage_and_architecture_mismatch(tmp_path, small_weights):
    good = tmp_path / "good.orb"
    code, out = run("convert", "robust_models:small", "--weights", small_weights, "--input-size", "9", "-g", "c4", "-o", good)
    assert code == 0, out
    # truncated converted file
    truncated = tmp_path / "truncated.orb"
    truncated.write_bytes(good.read_bytes()[:1000])
    # wrong architecture: same file, but its source reference now names another model
    import json

    content = torch.load(good, weights_only=True)
    description = json.loads(content["orbify_conversion"])
    description["source"] = description.get("source", "") and "robust_models:shuffle"
    for key in ("reference", "source_reference"):
        if key in description:
            description[key] = "robust_models:shuffle"
    content["orbify_conversion"] = json.dumps(description)
    mismatched = tmp_path / "mismatched.orb"
    torch.save(content, mismatched)
    for path in (truncated, mismatched):
        before = sha256_file(path)
        code, out = run("export", path, "--format", "torchscript", "-o", tmp_path / "x.pt")
        assert_refused(code, out, path.name)
        assert sha256_file(path) == before and not (tmp_path / "x.pt").exists()


def test_pickled_model_needs_trust(tmp_path):
    pickled = tmp_path / "whole.pt"
    torch.save(robust_models.small(), pickled)
    before = sha256_file(pickled)
    code, out = run("convert", pickled, "--input-size", "9", "-o", tmp_path / "x.orb")
    assert_refused(code, out, "--trust-pickle")
    assert sha256_file(pickled) == before and not (tmp_path / "x.orb").exists()
    code, out = run("convert", pickled, "--trust-pickle", "--input-size", "9", "-g", "c4", "-o", tmp_path / "x.orb")
    # with trust it loads, but a pickled model names no architecture a converted file could rebuild,
    # so the conversion is refused before it starts, saying how to give the model instead
    assert_refused(code, out, "is a pickled whole model", "package.module:factory")
    assert not (tmp_path / "x.orb").exists()
    # tune with a plain SOURCE converts and saves too, so it refuses the same way before reading any data
    code, out = run("tune", pickled, "--trust-pickle", "--data", tmp_path / "missing.npz", "-o", tmp_path / "t.orb")
    assert_refused(code, out, "is a pickled whole model", "package.module:factory")
    assert sha256_file(pickled) == before and not (tmp_path / "t.orb").exists()


def test_existing_output_needs_force(tmp_path, small_weights):
    out_path = tmp_path / "x.orb"
    out_path.write_bytes(b"keep me")
    code, out = run("convert", "robust_models:small", "--weights", small_weights, "--input-size", "9", "-g", "c4",
                    "-o", out_path)
    assert_refused(code, out, "--force")
    assert out_path.read_bytes() == b"keep me"
    code, out = run("convert", "robust_models:small", "--weights", small_weights, "--input-size", "9", "-g", "c4",
                    "-o", out_path, "--force")
    assert code == 0, out
    assert out_path.read_bytes() != b"keep me"


def test_output_directory_missing(tmp_path, small_weights):
    code, out = run("convert", "robust_models:small", "--weights", small_weights, "--input-size", "9", "-g", "c4",
                    "-o", tmp_path / "no" / "such" / "dir" / "x.orb")
    assert_refused(code, out, "does not exist")


def test_interrupted_save_keeps_previous_file(tmp_path, small_weights, monkeypatch):
    from orbify.common import safe_io as fileio

    out_path = tmp_path / "x.orb"
    code, out = run("convert", "robust_models:small", "--weights", small_weights, "--input-size", "9", "-g", "c4",
                    "-o", out_path)
    assert code == 0, out
    before = sha256_file(out_path)

    def interrupted(obj, f, *args, **kwargs):
        f.write(b"partial")
        raise KeyboardInterrupt

    monkeypatch.setattr(fileio.torch, "save", interrupted)
    code, out = run("convert", "robust_models:small", "--weights", small_weights, "--input-size", "9", "-g", "c4",
                    "-o", out_path, "--force")
    assert code != 0
    assert sha256_file(out_path) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(["small.pt", "x.orb"])
