"""Building models from SOURCE strings, loading weights into them, and refusing unsafe files."""

from __future__ import annotations

import itertools
import os
import textwrap
from pathlib import Path

import pytest
import torch
import torchvision
from torch import nn

from orbify.common.safe_io import sha256_file
from orbify.errors import CheckpointError, SourceError, TrustError
from orbify.files.sources import LoadedSource, load_source, rebuild, register_file_loader

_module_numbers = itertools.count()

SMALL_MODEL = """
import torch
from torch import nn


def build():
    return nn.Sequential(
        nn.Conv2d(3, 4, 3, padding=1), nn.BatchNorm2d(4), nn.ReLU(),
        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(4, 10),
    )


def build_wide():
    return nn.Sequential(
        nn.Conv2d(3, 6, 3, padding=1), nn.BatchNorm2d(6), nn.ReLU(),
        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(6, 10),
    )


class Zoo:
    @staticmethod
    def build():
        return build()


def needs_arguments(width):
    return nn.Linear(width, width)


def broken():
    raise RuntimeError("factory exploded")


def not_a_model():
    return {"weight": torch.zeros(2)}


CONSTANT = 3
"""


@pytest.fixture
def model_module(tmp_path, monkeypatch) -> str:
    """The name of a fresh importable module holding SMALL_MODEL (unique per test)."""
    name = f"orbify_test_models_{os.getpid()}_{next(_module_numbers)}"
    (tmp_path / f"{name}.py").write_text(textwrap.dedent(SMALL_MODEL))
    monkeypatch.syspath_prepend(str(tmp_path))
    return name


def _same_architecture(first: nn.Module, second: nn.Module) -> bool:
    first_state, second_state = first.state_dict(), second.state_dict()
    return first_state.keys() == second_state.keys() and all(
        first_state[key].shape == second_state[key].shape for key in first_state
    )


# --- torchvision:NAME ---------------------------------------------------------------------


def test_torchvision_source_matches_the_torchvision_definition():
    # Reference: torchvision's own model definition, built directly.
    loaded = load_source("torchvision:squeezenet1_1")
    assert loaded.reference == "torchvision:squeezenet1_1"
    assert not loaded.module.training
    assert _same_architecture(loaded.module, torchvision.models.squeezenet1_1(weights=None))


def test_torchvision_source_never_downloads_backbone_weights(monkeypatch):
    """Segmentation and detection builders default to pretrained backbones; none may be fetched."""

    def refuse_download(*args, **kwargs):
        raise AssertionError("a weights download was attempted")

    monkeypatch.setattr(torchvision.models.WeightsEnum, "get_state_dict", refuse_download)
    loaded = load_source("torchvision:lraspp_mobilenet_v3_large")
    assert isinstance(loaded.module, nn.Module)
    assert loaded.reference == "torchvision:lraspp_mobilenet_v3_large"


def test_unknown_torchvision_name_suggests_close_matches():
    with pytest.raises(SourceError) as caught:
        load_source("torchvision:resnet19")
    message = str(caught.value)
    assert "resnet19" in message
    assert "close names: resnet18" in message


def test_torchvision_reference_rebuilds_the_architecture():
    loaded = load_source("torchvision:squeezenet1_1")
    rebuilt = rebuild(loaded.reference)
    assert not rebuilt.training
    assert _same_architecture(rebuilt, loaded.module)


# --- package.module:factory ---------------------------------------------------------------


def test_factory_source_builds_and_rebuilds(model_module):
    spec = f"{model_module}:build"
    loaded = load_source(spec)
    assert loaded.reference == spec
    assert not loaded.module.training
    assert isinstance(loaded.module[0], nn.Conv2d)
    assert _same_architecture(rebuild(spec), loaded.module)


def test_factory_may_be_a_dotted_attribute(model_module):
    loaded = load_source(f"{model_module}:Zoo.build")
    assert loaded.module[0].out_channels == 4


def test_factory_in_a_missing_module():
    with pytest.raises(SourceError, match="Cannot import the module") as caught:
        load_source("orbify_no_such_package.models:build")
    assert "PYTHONPATH" in str(caught.value)


def test_factory_module_with_a_missing_dependency(tmp_path, monkeypatch):
    name = f"orbify_test_needs_dependency_{next(_module_numbers)}"
    (tmp_path / f"{name}.py").write_text("import orbify_absent_dependency\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    with pytest.raises(SourceError, match="orbify_absent_dependency"):
        load_source(f"{name}:build")


def test_factory_module_that_fails_to_import(tmp_path, monkeypatch):
    name = f"orbify_test_bad_import_{next(_module_numbers)}"
    (tmp_path / f"{name}.py").write_text("raise ValueError('bad configuration')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    with pytest.raises(SourceError, match="bad configuration"):
        load_source(f"{name}:build")


def test_factory_name_with_a_typo_suggests_close_names(model_module):
    with pytest.raises(SourceError) as caught:
        load_source(f"{model_module}:biuld")
    assert "close names: build" in str(caught.value)


@pytest.mark.parametrize(
    ("factory", "expected"),
    [
        ("CONSTANT", "not a callable factory"),
        ("needs_arguments", "without arguments"),
        ("broken", "factory exploded"),
        ("not_a_model", "not a torch.nn.Module"),
    ],
)
def test_bad_factories_are_explained(model_module, factory, expected):
    with pytest.raises(SourceError, match=expected) as caught:
        load_source(f"{model_module}:{factory}")
    assert f"{model_module}" in str(caught.value)


@pytest.mark.parametrize("spec", ["just-a-word", "", "a:b:c"])
def test_unrecognised_source_lists_the_accepted_forms(spec):
    with pytest.raises(SourceError, match="torchvision:NAME"):
        load_source(spec)


def test_missing_model_file(tmp_path):
    with pytest.raises(SourceError, match="does not exist"):
        load_source(str(tmp_path / "model.pt"))


def test_rebuild_refuses_a_file_path(tmp_path):
    with pytest.raises(SourceError, match="not a reference that can be rebuilt"):
        rebuild(str(tmp_path / "model.pt"))


# --- pickled whole models -----------------------------------------------------------------


@pytest.fixture
def pickled_model(tmp_path) -> tuple[Path, nn.Module]:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv2d(3, 4, 3), nn.ReLU(), nn.Flatten(), nn.LazyLinear(2)).eval()
    model(torch.zeros(1, 3, 6, 6))
    path = tmp_path / "whole-model.pt"
    torch.save(model, path)
    return path, model


def test_pickled_model_without_trust_is_refused_and_nothing_is_written(pickled_model):
    path, _ = pickled_model
    before = sha256_file(path)
    listing = sorted(path.parent.iterdir())
    with pytest.raises(TrustError) as caught:
        load_source(str(path))
    message = str(caught.value)
    assert "arbitrary code" in message
    assert "--trust-pickle" in message
    assert "torch.nn.modules.container.Sequential" in message
    assert sha256_file(path) == before
    assert sorted(path.parent.iterdir()) == listing


class _RunsCodeWhenUnpickled:
    """Unpickling this object creates a directory: a stand-in for code hidden in a file."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (os.mkdir, (str(self.marker),))


def test_untrusted_pickle_runs_no_code_from_the_file(tmp_path):
    marker = tmp_path / "code-ran"
    path = tmp_path / "payload.pt"
    torch.save(_RunsCodeWhenUnpickled(marker), path)
    with pytest.raises(TrustError):
        load_source(str(path))
    assert not marker.exists()
    # The same file with trust runs the code, which is why trust must be explicit.
    with pytest.raises(SourceError, match="not a torch.nn.Module"):
        load_source(str(path), trust_pickle=True)
    assert marker.exists()


def test_pickled_model_with_trust_loads_the_same_model(pickled_model):
    path, model = pickled_model
    loaded = load_source(str(path), trust_pickle=True)
    assert loaded.reference is None
    assert not loaded.module.training
    example = torch.randn(2, 3, 6, 6)
    torch.testing.assert_close(loaded.module(example), model(example), rtol=0, atol=0)


def test_state_dict_given_as_a_model_file_points_to_weights_option(tmp_path):
    path = tmp_path / "weights.pt"
    torch.save(nn.Linear(2, 2).state_dict(), path)
    for trust in (False, True):
        with pytest.raises(SourceError, match="--weights"):
            load_source(str(path), trust_pickle=trust)


def test_truncated_model_file(pickled_model):
    path, _ = pickled_model
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    for trust in (False, True):
        with pytest.raises(CheckpointError, match="truncated, damaged"):
            load_source(str(path), trust_pickle=trust)


def test_empty_model_file(tmp_path):
    path = tmp_path / "model.pt"
    path.write_bytes(b"")
    with pytest.raises(CheckpointError, match="empty"):
        load_source(str(path))


# --- registered file formats --------------------------------------------------------------


def test_registered_file_loader_claims_its_files(tmp_path, model_module):
    path = tmp_path / "model.orbtest"
    path.write_bytes(b"ORBTEST")
    seen: list[Path] = []

    def load(claimed: Path, trust_source: bool) -> LoadedSource:
        seen.append(claimed)
        return LoadedSource(load_source(f"{model_module}:build").module, f"{model_module}:build")

    unregister = register_file_loader(lambda candidate: candidate.suffix == ".orbtest", load)
    try:
        loaded = load_source(str(path))
    finally:
        unregister()
    assert seen == [path]
    assert loaded.reference == f"{model_module}:build"
    assert not loaded.module.training
    # Once unregistered, the file is no longer understood.
    with pytest.raises(CheckpointError):
        load_source(str(path))


# --- weights files ------------------------------------------------------------------------


@pytest.fixture
def trained_state(model_module) -> dict[str, torch.Tensor]:
    torch.manual_seed(1)
    model = load_source(f"{model_module}:build").module
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.normal_()
        model[1].running_mean.normal_()
    return model.state_dict()


def _assert_holds(module: nn.Module, state: dict[str, torch.Tensor]) -> None:
    loaded = module.state_dict()
    assert loaded.keys() == state.keys()
    for key in state:
        assert torch.equal(loaded[key], state[key]), key


@pytest.mark.parametrize("wrapping", ["plain", "state_dict", "model"])
def test_weights_are_loaded(tmp_path, model_module, trained_state, wrapping):
    content = trained_state if wrapping == "plain" else {wrapping: trained_state, "epoch": 7}
    path = tmp_path / "weights.pt"
    torch.save(content, path)
    before = sha256_file(path)
    loaded = load_source(f"{model_module}:build", weights=path)
    _assert_holds(loaded.module, trained_state)
    assert not loaded.module.training
    assert sha256_file(path) == before


def test_missing_and_unexpected_keys_are_named(tmp_path, model_module, trained_state):
    state = dict(trained_state)
    state["classifier.weight"] = state.pop("5.weight")
    path = tmp_path / "weights.pt"
    torch.save(state, path)
    with pytest.raises(CheckpointError) as caught:
        load_source(f"{model_module}:build", weights=path)
    message = str(caught.value)
    assert "1 missing from the file (5.weight [10, 4])" in message
    assert "1 not in the model (classifier.weight [10, 4])" in message
    assert str(path) in message


def test_shape_mismatches_are_named_with_both_shapes(tmp_path, model_module):
    wide = load_source(f"{model_module}:build_wide").module
    path = tmp_path / "weights.pt"
    torch.save(wide.state_dict(), path)
    with pytest.raises(CheckpointError) as caught:
        load_source(f"{model_module}:build", weights=path)
    message = str(caught.value)
    # conv weight and bias, four batch-norm tensors (not its counter), classifier weight
    assert "7 with a different shape" in message
    assert "0.weight model [4, 3, 3, 3], file [6, 3, 3, 3]" in message
    assert "and 2 more" in message
    assert "5.weight" not in message  # seventh of seven: beyond the five listed


def test_weights_file_holding_a_pickled_model_is_refused(tmp_path, model_module):
    path = tmp_path / "weights.pt"
    torch.save(load_source(f"{model_module}:build").module, path)
    with pytest.raises(CheckpointError, match="pickled Python objects"):
        load_source(f"{model_module}:build", weights=path)


def test_weights_file_without_a_state_dict(tmp_path, model_module):
    path = tmp_path / "weights.pt"
    torch.save([torch.zeros(2)], path)
    with pytest.raises(CheckpointError, match="not a state dict"):
        load_source(f"{model_module}:build", weights=path)


def test_truncated_weights_file(tmp_path, model_module, trained_state):
    path = tmp_path / "weights.pt"
    torch.save(trained_state, path)
    path.write_bytes(path.read_bytes()[:100])
    with pytest.raises(CheckpointError, match="truncated, damaged"):
        load_source(f"{model_module}:build", weights=path)
