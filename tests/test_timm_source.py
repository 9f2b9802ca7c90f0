"""The SOURCE timm:NAME and weights in .safetensors files.

Outside references: timm's own builder (``timm.create_model(name, pretrained=False)``, called directly) and the
safetensors package's writer (``safetensors.torch.save_file``).
"""

import builtins

import pytest
import timm
import torch
from safetensors.torch import save_file
from typer.testing import CliRunner

import orbify
from orbify.cli import app
from orbify.common.safe_io import sha256_file
from orbify.errors import CheckpointError, SourceError
from orbify.files.sources import load_source, rebuild

SIZE = 33   # a safe size of resnet18-like strides (33 = 32·1 + 1)


def _timm_weights(tmp_path):
    torch.manual_seed(3)
    model = timm.create_model("resnet18", pretrained=False, num_classes=1000).eval()
    path = tmp_path / "resnet18.safetensors"
    save_file({key: value.contiguous() for key, value in model.state_dict().items()}, str(path))
    return model, path


def test_a_timm_source_with_safetensors_weights_round_trips(tmp_path):
    model, weights = _timm_weights(tmp_path)
    loaded = load_source("timm:resnet18", weights=weights)
    x = torch.randn(2, 3, 64, 64, generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        assert torch.equal(loaded.module(x), model(x))           # the weights timm's own model holds
    assert loaded.reference == "timm:resnet18"
    converted, plan = orbify.convert(loaded.module, "c4", example_input=torch.zeros(1, 3, SIZE, SIZE))
    path = orbify.save(converted, plan, tmp_path / "r18.orb", reference=loaded.reference)
    again = orbify.load(path)                                     # no consent needed: timm's registry vouches
    y = torch.randn(2, 3, SIZE, SIZE)
    assert torch.equal(again.module(y), converted(y))
    exported = orbify.export_model(again.module, y[:1], tmp_path / "r18.pt2", format="pt2")
    program = torch.export.load(exported).module()
    assert torch.allclose(program(y), converted(y), atol=1e-4, rtol=1e-4)


def test_an_unknown_timm_name_is_refused_with_close_names():
    with pytest.raises(SourceError, match="close names: resnet18"):
        rebuild("timm:resnet81")


def test_a_missing_timm_is_a_clear_error(monkeypatch):
    real_import = builtins.__import__

    def without_timm(name, *args, **kwargs):
        if name == "timm" or name.startswith("timm."):
            raise ImportError("no timm here")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", without_timm)
    with pytest.raises(SourceError, match=r"pip install 'orbify\[timm\]'"):
        load_source("timm:resnet18")


def test_a_damaged_safetensors_file_is_refused_and_nothing_is_written(tmp_path):
    _, weights = _timm_weights(tmp_path)
    damaged = tmp_path / "damaged.safetensors"
    damaged.write_bytes(weights.read_bytes()[:1000])
    digest = sha256_file(damaged)
    with pytest.raises(CheckpointError, match="damaged.safetensors"):
        load_source("timm:resnet18", weights=damaged)
    out = tmp_path / "x.orb"
    result = CliRunner().invoke(app, ["convert", "timm:resnet18", "--weights", str(damaged), "--input-size",
                                      str(SIZE), "-o", str(out)])
    assert result.exit_code == 2 and "Traceback" not in result.output, result.output
    assert "damaged.safetensors" in " ".join(result.output.split())
    assert not out.exists() and sha256_file(damaged) == digest
