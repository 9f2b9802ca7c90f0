"""Fine-tuned backbones and training-framework checkpoints: ``torchvision:NAME?ARG=VALUE`` sources and prefixed keys.

The outside references are torchvision's builders called directly (``torchvision.models.resnet18(num_classes=6)``)
and torch's own wrapper ``torch.nn.DataParallel``, whose state dict prefixes every key with ``module.`` as
DistributedDataParallel's does (both keep the wrapped model as their attribute ``module``).
"""

import copy
import functools
import json

import pytest
import torch
import torchvision
from torch import nn
from torchvision.models import _api as torchvision_registry
from typer.testing import CliRunner

import orbify
from orbify.cli import app
from orbify.cli.tune import _rebuild_teacher
from orbify.errors import CheckpointError, OrbifyError, SourceError
from orbify.files.saving import DESCRIPTION_KEY, require_reference
from orbify.files.source_arguments import TorchvisionSource
from orbify.files.sources import load_source, rebuild, usual_input_size
from orbify.files.weights import load_weights_file

FINE_TUNED = "torchvision:resnet18?num_classes=6"
TILE = 33  # a safe size of resnet18 under quarter turns: (33 + 2·3 − 7) = 32 is even, and so on down the net


def _randomised(model: nn.Module) -> nn.Module:
    """``model`` in eval mode with random weights and batch-norm statistics, so that every tensor matters."""
    with torch.no_grad():
        for name, tensor in model.state_dict().items():
            if name.endswith("running_var"):
                tensor.uniform_(0.5, 2.0)
            elif tensor.is_floating_point():
                tensor.normal_(0, 0.1)
    return model.eval()


@pytest.fixture(scope="module")
def fine_tuned() -> nn.Module:
    """A resnet18 with a 6-class head, as fine-tuning leaves it (built by torchvision itself)."""
    torch.manual_seed(0)
    return _randomised(torchvision.models.resnet18(num_classes=6))


@pytest.fixture
def weights_file(tmp_path, fine_tuned):
    path = tmp_path / "resnet18-6-classes.pt"
    torch.save(fine_tuned.state_dict(), path)
    return path


@pytest.fixture
def builder_calls(monkeypatch) -> list[dict]:
    """Every call of torchvision's resnet18 builder from now on, with its arguments (the registry entry is spied)."""
    calls: list[dict] = []
    original = torchvision_registry.BUILTIN_MODELS["resnet18"]

    @functools.wraps(original)
    def spy(**arguments):
        calls.append(arguments)
        return original(**arguments)

    monkeypatch.setitem(torchvision_registry.BUILTIN_MODELS, "resnet18", spy)
    return calls


# --- arguments in a torchvision source ---------------------------------------------------------------------------


def test_a_fine_tuned_resnet18_loads_through_its_arguments_and_matches_torchvision(fine_tuned, weights_file):
    # Reference: torchvision's builder called directly with num_classes=6 (the fixture), run on the same input.
    loaded = load_source(FINE_TUNED, weights=weights_file)
    assert loaded.reference == FINE_TUNED
    assert loaded.notes == ()
    assert not loaded.module.training
    x = torch.randn(2, 3, 64, 64)
    with torch.no_grad():
        assert torch.equal(loaded.module(x), fine_tuned(x))
    assert usual_input_size(loaded.reference)[0] == 224
    require_reference(loaded.reference)  # a source with arguments can be saved in a .orb file


def test_arguments_are_recorded_in_one_order_and_rebuild():
    loaded = load_source("torchvision:ResNet18?zero_init_residual=TRUE&num_classes=6")
    assert loaded.reference == "torchvision:resnet18?num_classes=6&zero_init_residual=true"
    direct = torchvision.models.resnet18(num_classes=6, zero_init_residual=True)  # reference: torchvision
    assert {k: v.shape for k, v in rebuild(loaded.reference).state_dict().items()} == \
        {k: v.shape for k, v in direct.state_dict().items()}
    # zero_init_residual=True zeroes the last batch norm of each block: the argument reached the builder.
    assert torch.count_nonzero(rebuild(loaded.reference).layer1[0].bn2.weight) == 0
    # An integer given where the builder takes a number is recorded as a number, and reads back the same.
    squeezenet = load_source("torchvision:squeezenet1_1?dropout=0").reference
    assert squeezenet == "torchvision:squeezenet1_1?dropout=0.0"
    assert TorchvisionSource.parse(squeezenet).reference == squeezenet


REFUSED = [
    ("torchvision:resnet18?num_clases=6", "takes no argument 'num_clases'.*num_classes, width_per_group"),
    ("torchvision:resnet18?weights=DEFAULT", "would choose pretrained weights to download"),
    ("torchvision:resnet18?weights_backbone=DEFAULT", "would choose pretrained weights to download"),
    ("torchvision:resnet18?progress=true", "takes no argument 'progress'"),
    ("torchvision:resnet18?num_classes=__import__('os')", "is not a literal"),
    ("torchvision:resnet18?num_classes=6;import", "is not a literal"),
    ("torchvision:resnet18?num_classes=true", "must be an integer"),
    ("torchvision:resnet18?num_classes=6&num_classes=7", "twice"),
    ("torchvision:resnet18?num_classes", "not an argument NAME=VALUE"),
    ("torchvision:resnet18?num_classes=100000000000", "more than the 2,147,483,648"),
]


def test_bad_arguments_are_refused_with_nothing_built(builder_calls):
    for spec, expected in REFUSED:
        with pytest.raises(SourceError, match=expected):
            load_source(spec)
    # Nothing was built: only the oversized model was counted, on the meta device, which takes no memory.
    assert [call["num_classes"] for call in builder_calls] == [100000000000]
    assert builder_calls[0]["weights"] is None
    # Control: the spy sees a source that passes the checks.
    load_source(FINE_TUNED)
    assert builder_calls[-1]["num_classes"] == 6 and builder_calls[-1]["weights"] is None


# --- the hint when a fine-tuned head does not fit ----------------------------------------------------------------


def test_the_plain_source_names_the_argument_that_fits(weights_file):
    with pytest.raises(CheckpointError) as caught:
        load_source("torchvision:resnet18", weights=weights_file)
    message = str(caught.value)
    assert "fc.weight model [1000, 512], file [6, 512]" in message
    assert f"add ?num_classes=6 to the source: {FINE_TUNED}" in message
    suggested = message.rsplit("to the source: ", 1)[1].rstrip(".")
    assert load_source(suggested, weights=weights_file).reference == FINE_TUNED  # the hint works as given


def test_no_argument_is_suggested_when_more_than_the_head_differs(tmp_path, fine_tuned):
    state = dict(fine_tuned.state_dict())
    state["layer1.0.bn1.weight"] = torch.ones(65)
    path = tmp_path / "wider.pt"
    torch.save(state, path)
    with pytest.raises(CheckpointError) as caught:
        load_source("torchvision:resnet18", weights=path)
    assert "num_classes" not in str(caught.value)


def test_input_channels_are_named_but_no_argument_torchvision_lacks(tmp_path, fine_tuned):
    # torchvision's resnet18 takes no argument for input channels (its signature, via ResNet.__init__).
    four_bands = _randomised(torchvision.models.resnet18(num_classes=6))
    four_bands.conv1 = nn.Conv2d(4, 64, 7, 2, 3, bias=False)
    path = tmp_path / "four-bands.pt"
    torch.save(four_bands.state_dict(), path)
    with pytest.raises(CheckpointError) as caught:
        load_source(FINE_TUNED, weights=path)
    message = str(caught.value)
    assert "first conv 'conv1' takes 4 input channels, the model's 3" in message
    assert "takes no argument that sets this" in message
    assert "in_chans" not in message


def _tiny_builder(*, weights=None, progress: bool = True, in_chans: int = 3, num_classes: int = 10) -> nn.Module:
    """A builder like torchvision's whose signature takes input channels (as multispectral backbones do)."""
    return nn.Sequential(nn.Conv2d(in_chans, 8, 3), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(8, num_classes))


def test_both_arguments_are_suggested_where_the_builder_takes_them(tmp_path, monkeypatch):
    monkeypatch.setitem(torchvision_registry.BUILTIN_MODELS, "orbify_tiny_net", _tiny_builder)
    path = tmp_path / "tiny.pt"
    torch.save(_tiny_builder(in_chans=4, num_classes=6).state_dict(), path)
    with pytest.raises(CheckpointError) as caught:
        load_source("torchvision:orbify_tiny_net", weights=path)
    assert "add ?in_chans=4&num_classes=6 to the source: torchvision:orbify_tiny_net?in_chans=4&num_classes=6" \
        in str(caught.value)
    loaded = load_source("torchvision:orbify_tiny_net?num_classes=6&in_chans=4", weights=path)
    assert loaded.module[0].in_channels == 4 and loaded.module[4].out_features == 6


# --- checkpoints written by training code ------------------------------------------------------------------------


def _wrapped_state(model: nn.Module) -> dict[str, torch.Tensor]:
    """The state dict torch's DataParallel wrapper writes (keys prefixed ``module.``, as DistributedDataParallel)."""
    return nn.DataParallel(model).state_dict()


def _optimizer_state(model: nn.Module) -> dict:
    """An SGD optimizer's state after one step (momentum buffers), as a training loop saves it."""
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    model(torch.randn(2, 3, 32, 32)).sum().backward()
    optimizer.step()
    model.zero_grad()
    return optimizer.state_dict()


@pytest.fixture(scope="module")
def trained(fine_tuned) -> tuple[nn.Module, dict]:
    """A copy of the fine-tuned model after one SGD step, and the optimizer's state."""
    model = copy.deepcopy(fine_tuned)
    optimizer = _optimizer_state(model.train())
    return model.eval(), optimizer


@pytest.mark.parametrize("layout", ["flat", "model_state_dict", "state_dict"])
def test_a_wrapped_checkpoint_loads_with_a_one_line_note(tmp_path, trained, layout):
    model, optimizer = trained
    wrapped = _wrapped_state(model)
    assert all(key.startswith("module.") for key in wrapped)
    if layout == "flat":
        checkpoint = {"epoch": 7, "optimizer": optimizer, **wrapped}
    elif layout == "model_state_dict":
        checkpoint = {"epoch": 7, "model_state_dict": wrapped, "optimizer_state_dict": optimizer}
    else:  # a training wrapper keeps the network as its attribute 'model' and saves under 'state_dict'
        checkpoint = {"epoch": 7, "state_dict": {"model." + key: value for key, value in model.state_dict().items()},
                      "optimizer_states": [optimizer]}
    path = tmp_path / "checkpoint.pt"
    torch.save(checkpoint, path)
    loaded = load_source(FINE_TUNED, weights=path)
    for key, value in model.state_dict().items():
        assert torch.equal(loaded.module.state_dict()[key], value), key
    assert len(loaded.notes) == 1 and "\n" not in loaded.notes[0]
    assert ("'module.'" if layout != "state_dict" else "'model.'") in loaded.notes[0]
    if layout == "flat":
        assert "ignored 2 entries of the file that are not weights (epoch, optimizer)" in loaded.notes[0]


@pytest.fixture
def ddp_checkpoint(tmp_path, trained) -> tuple[nn.Module, object]:
    """A checkpoint as a DistributedDataParallel training loop saves it (keys prefixed ``module.``, an epoch)."""
    model, _ = trained
    path = tmp_path / "ddp.pt"
    torch.save({"epoch": 7, **_wrapped_state(model)}, path)
    return model, path


def test_the_command_line_prints_the_note_of_a_wrapped_checkpoint(tmp_path, monkeypatch, ddp_checkpoint):
    monkeypatch.chdir(tmp_path)
    result = CliRunner().invoke(app, ["convert", FINE_TUNED, "--weights", "ddp.pt", "--input-size", str(TILE),
                                      "-o", "x.orb"])
    assert result.exit_code == 0, result.output
    output = " ".join(result.output.split())  # the console wraps long lines
    assert output.count("note: the weights' keys all began with 'module.'") == 1
    assert "ignored 1 entries of the file that are not weights (epoch)" in output
    assert "tip: the shipped recipe 'resnet'" in output  # the recipe is found by the name, arguments aside
    assert orbify.load(tmp_path / "x.orb").metadata["source"] == FINE_TUNED


def test_tuning_prints_the_note_when_it_rebuilds_the_teacher(capsys, ddp_checkpoint):
    model, path = ddp_checkpoint
    teacher = _rebuild_teacher(FINE_TUNED, path)
    for key, value in model.state_dict().items():
        assert torch.equal(teacher.state_dict()[key], value), key
    printed = " ".join(capsys.readouterr().out.split())
    assert printed.count("note: the weights' keys all began with 'module.'") == 1


def test_a_prefix_that_explains_most_of_a_mismatch_is_named(tmp_path, fine_tuned):
    path = tmp_path / "wrapped.pt"
    torch.save({"epoch": 3, **_wrapped_state(fine_tuned)}, path)
    with pytest.raises(CheckpointError) as caught:
        load_source("torchvision:resnet18", weights=path)
    message = str(caught.value)
    assert "without the prefix 'module.' that all its keys carry" in message
    assert "2 with a different shape" in message and "missing" not in message
    assert f"to the source: {FINE_TUNED}" in message


def test_keys_that_only_share_a_prefix_with_the_model_are_not_stripped(tmp_path):
    model = nn.Sequential(nn.Sequential(nn.Linear(2, 3), nn.Linear(3, 1)))  # every key begins with '0.'
    state = model.state_dict()
    state["0.2.weight"] = torch.zeros(1, 1)
    path = tmp_path / "extra.pt"
    torch.save(state, path)
    with pytest.raises(CheckpointError) as caught:
        load_weights_file(model, path)
    assert "1 not in the model (0.2.weight [1, 1])" in str(caught.value)
    assert "prefix" not in str(caught.value)


# --- converted files recording a source with arguments ------------------------------------------------------------


@pytest.fixture(scope="module")
def converted_file(tmp_path_factory, fine_tuned):
    """A .orb file converted from torchvision:resnet18?num_classes=6, and the converted model."""
    folder = tmp_path_factory.mktemp("orb")
    weights = folder / "weights.pt"
    torch.save(fine_tuned.state_dict(), weights)
    loaded = load_source(FINE_TUNED, weights=weights)
    converted, plan = orbify.convert(loaded.module, "c4", example_input=torch.zeros(1, 3, TILE, TILE))
    return orbify.save(converted, plan, folder / "fine-tuned-c4.orb", reference=loaded.reference), converted


def test_a_converted_file_rebuilds_its_source_with_arguments_bitwise(converted_file):
    path, converted = converted_file
    loaded = orbify.load(path)  # no consent needed: torchvision's registry and the builder's signature vouch
    assert loaded.metadata["source"] == FINE_TUNED
    x = torch.randn(2, 3, TILE, TILE)
    with torch.no_grad():
        assert torch.equal(loaded.module(x), converted(x))


def _crafted(path, tmp_path, source: str):
    """A copy of the converted file whose description names ``source``."""
    content = torch.load(path, weights_only=True)
    metadata = json.loads(content[DESCRIPTION_KEY])
    metadata["source"] = source
    content[DESCRIPTION_KEY] = json.dumps(metadata)
    crafted = tmp_path / "crafted.orb"
    torch.save(content, crafted)
    return crafted


CRAFTED = [
    ("torchvision:resnet18?num_classes=6&evil=1", "takes no argument 'evil'"),
    ("torchvision:resnet18?num_classes=__import__('os').system('x')", "is not a literal"),
    ("torchvision:resnet18?weights=IMAGENET1K_V1", "would choose pretrained weights"),
    ("torchvision:resnet18?num_classes=100000000000", "more than the 2,147,483,648"),
    ("torchvision:no_such_model?num_classes=6", "torchvision has no model named 'no_such_model'"),
]


def test_a_crafted_file_rebuilds_without_consent_only_when_the_checks_pass(converted_file, tmp_path, builder_calls):
    for source, expected in CRAFTED:
        with pytest.raises(OrbifyError, match=expected):
            orbify.load(_crafted(converted_file[0], tmp_path, source))
    assert [call["num_classes"] for call in builder_calls] == [100000000000]  # only counted, on the meta device
    # Control: the same file naming a source that passes the checks is rebuilt, without consent.
    assert orbify.load(_crafted(converted_file[0], tmp_path, FINE_TUNED)).metadata["source"] == FINE_TUNED
    assert builder_calls[-1]["num_classes"] == 6
