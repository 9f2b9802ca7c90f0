"""Files from elsewhere choose no code and no allocation: crafted .orb files and oversized images.

A converted-model file is plain data plus a JSON description that anyone can edit. These tests
write files whose ``source`` or leaf types name code that leaves a marker file when it runs (at
import, when called, or from the working directory) and check that ``orbify.load``, ``orbify check``
and ``orbify export`` refuse each before importing anything: the marker never appears, nothing is
written and the input is byte-for-byte unchanged. With the user's consent (``trust_source=True``,
``--trust-source`` or the same ``--original``) a legitimate factory loads with bitwise the saved
outputs. Images whose header declares far more pixels than any tile are refused by every command
that reads images.
"""

import itertools
import json
import os
import struct
import textwrap
import zlib

import pytest
import torch
from typer.testing import CliRunner

import orbify
from orbify.cli import app
from orbify.common.safe_io import sha256_file
from orbify.errors import DataError, TrustError
from orbify.example.model import build_example_cnn
from orbify.files.saving import DESCRIPTION_KEY

runner = CliRunner()
_numbers = itertools.count()
TILE = 33


def cli(*args):
    result = runner.invoke(app, [str(a) for a in args])
    return result.exit_code, result.output


def unique(stem: str) -> str:
    """A module name no other test (or earlier import) has used."""
    return f"orbify_{stem}_{os.getpid()}_{next(_numbers)}"


@pytest.fixture
def marker(tmp_path):
    return tmp_path / "code-ran.txt"


@pytest.fixture
def site(tmp_path, monkeypatch):
    """A folder on sys.path for the test's modules (like an installed package)."""
    folder = tmp_path / "site"
    folder.mkdir()
    monkeypatch.syspath_prepend(str(folder))
    return folder


def write_module(folder, name, marker, *, at_import: bool, in_factory: bool) -> str:
    """A module with ``build()`` (the example CNN) and ``Block`` (a module class); it writes ``marker``
    when imported (``at_import``) or when ``build`` is called (``in_factory``)."""
    text = f"""
        import pathlib
        from torch import nn
        from orbify.example.model import build_example_cnn
        if {at_import!r}:
            pathlib.Path({str(marker)!r}).write_text("imported")

        class Block(nn.Module):
            def forward(self, x):
                return x

        def build():
            if {in_factory!r}:
                pathlib.Path({str(marker)!r}).write_text("called")
            return build_example_cnn()
        """
    (folder / f"{name}.py").write_text(textwrap.dedent(text))
    return name


@pytest.fixture(scope="module")
def converted_example():
    model = build_example_cnn().eval()
    torch.manual_seed(0)
    for parameter in model.parameters():
        parameter.data.normal_(0, 0.2)
    converted, plan = orbify.convert(model, "c4", example_input=torch.zeros(1, 3, TILE, TILE))
    return converted, plan


def save_with(converted_example, path, reference, leaf_types=()):
    """Save the converted example under ``reference``, then write ``leaf_types`` into its description."""
    converted, plan = converted_example
    orbify.save(converted, plan, path, reference=reference)
    if leaf_types:
        content = torch.load(path, weights_only=True)
        metadata = json.loads(content[DESCRIPTION_KEY])
        metadata["conversion"]["leaf_types"] = list(leaf_types)
        content[DESCRIPTION_KEY] = json.dumps(metadata)
        torch.save(content, path)
    return path


def crafted_files(tmp_path, site, marker, converted_example, monkeypatch):
    """(name, file, module it names) for each way a file could choose code."""
    imports = write_module(site, unique("runs_at_import"), marker, at_import=True, in_factory=False)
    calls = write_module(site, unique("runs_when_called"), marker, at_import=False, in_factory=True)
    local = unique("in_working_directory")
    workdir = tmp_path / "downloads"
    workdir.mkdir()
    write_module(workdir, local, marker, at_import=True, in_factory=True)
    monkeypatch.chdir(workdir)
    leaf_owner = write_module(site, unique("leaf_at_import"), marker, at_import=True, in_factory=False)
    return [
        ("import", save_with(converted_example, workdir / "import.orb", f"{imports}:build"), imports),
        ("call", save_with(converted_example, workdir / "call.orb", f"{calls}:build"), calls),
        ("cwd", save_with(converted_example, workdir / "cwd.orb", f"{local}:build"), local),
        ("leaf", save_with(converted_example, workdir / "leaf.orb", "example", [f"{leaf_owner}:Block"]), leaf_owner),
    ]


def test_crafted_files_are_refused_before_any_code_runs(tmp_path, site, marker, converted_example, monkeypatch):
    files = crafted_files(tmp_path, site, marker, converted_example, monkeypatch)
    for name, path, module in files:
        digest = sha256_file(path)
        with pytest.raises(TrustError, match=f"wants to import the module '{module}'"):
            orbify.load(path)
        # check: --original names a different source, so it is no consent for the file's own
        code, output = cli("check", path, "--original", "example")
        flat = " ".join(output.split())
        assert code != 0 and "Traceback" not in output, (name, output)
        assert f"wants to import the module '{module}'" in flat and "--trust-source" in flat, (name, output)
        exported = tmp_path / f"{name}.pt2"
        code, output = cli("export", path, "-o", exported)
        assert code != 0 and f"'{module}'" in " ".join(output.split()), (name, output)
        assert not exported.exists()
        code, output = cli("summary", path)
        assert code != 0 and "--trust-source" in " ".join(output.split()), (name, output)
        assert not marker.exists(), f"{name}: code ran ({marker.read_text()})"
        assert sha256_file(path) == digest
        assert sorted(p.name for p in path.parent.glob(f"{name}*")) == [path.name]


def test_trusting_a_file_never_imports_from_the_working_directory(tmp_path, site, marker, converted_example,
                                                                   monkeypatch):
    name, path, module = crafted_files(tmp_path, site, marker, converted_example, monkeypatch)[2]
    assert name == "cwd" and (path.parent / f"{module}.py").exists() and os.getcwd() == str(path.parent)
    with pytest.raises(orbify.OrbifyError, match=f"Cannot import the module '{module}'"):
        orbify.load(path, trust_source=True)
    code, output = cli("export", path, "--trust-source", "-o", tmp_path / "out.pt2")
    assert code != 0 and "cannot be rebuilt here" in " ".join(output.split()), output
    assert not marker.exists()


def test_consent_loads_a_legitimate_factory_with_bitwise_outputs(tmp_path, site, marker, converted_example,
                                                                 monkeypatch):
    factory = f"{write_module(site, unique('legitimate'), marker, at_import=False, in_factory=False)}:build"
    path = save_with(converted_example, tmp_path / "mine.orb", factory)
    x = torch.randn(3, 3, TILE, TILE, generator=torch.Generator().manual_seed(1))
    expected = converted_example[0](x)
    for loaded in (orbify.load(path, trust_source=True), orbify.load(path, original=factory)):
        assert torch.equal(loaded.module(x), expected)
    with pytest.raises(TrustError):
        orbify.load(path, original="example")      # consent is for the exact reference the file records
    exported = tmp_path / "mine.pt2"
    code, output = cli("export", path, "--trust-source", "-o", exported)
    assert code == 0 and exported.exists(), output
    code, output = cli("check", path, "--original", factory)
    assert code == 0, output
    assert not marker.exists()


def test_a_factory_the_user_types_is_found_in_the_working_directory(tmp_path, marker, converted_example,
                                                                    monkeypatch):
    workdir = tmp_path / "project"
    workdir.mkdir()
    factory = f"{write_module(workdir, unique('project_model'), marker, at_import=False, in_factory=False)}:build"
    monkeypatch.chdir(workdir)
    path = save_with(converted_example, workdir / "mine.orb", factory)
    with pytest.raises(orbify.OrbifyError, match="Cannot import the module"):
        orbify.load(path, trust_source=True)           # consent to run it, but the file cannot pick the folder
    loaded = orbify.load(path, original=factory)       # typed by the user: searched like python -m would
    x = torch.randn(2, 3, TILE, TILE)
    assert torch.equal(loaded.module(x), converted_example[0](x))


def test_a_recorded_leaf_type_from_the_typed_module_is_allowed(tmp_path, site, marker, converted_example):
    module = write_module(site, unique("with_leaf"), marker, at_import=False, in_factory=False)
    path = save_with(converted_example, tmp_path / "leafy.orb", f"{module}:build", [f"{module}:Block"])
    with pytest.raises(TrustError, match="wants to import"):
        orbify.load(path)
    loaded = orbify.load(path, original=f"{module}:build")
    x = torch.randn(2, 3, TILE, TILE)
    assert torch.equal(loaded.module(x), converted_example[0](x))


def test_registry_sources_need_no_consent(tmp_path, converted_example):
    # torchvision:NAME is looked up in torchvision's registry; a name it lacks is refused without any import.
    path = save_with(converted_example, tmp_path / "named.orb", "torchvision:no_such_model")
    with pytest.raises(orbify.OrbifyError, match="torchvision has no model named 'no_such_model'"):
        orbify.load(path)
    example = save_with(converted_example, tmp_path / "example.orb", "example")
    x = torch.randn(2, 3, TILE, TILE)
    assert torch.equal(orbify.load(example).module(x), converted_example[0](x))


# -- images whose header declares far more pixels than any tile --------------------------------------------------


def png_header_only(path, width, height):
    """A PNG declaring ``width`` × ``height`` RGB pixels, with almost no pixel data (PNG specification, RFC 2083)."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    header = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header) + chunk(b"IDAT", zlib.compress(b"\0" * 16))
                     + chunk(b"IEND", b""))
    return path


@pytest.mark.parametrize("side", [40_000, 9_000])   # beyond Pillow's own guard, and between ours and Pillow's
def test_an_oversized_image_is_refused_by_every_command_that_reads_images(tmp_path, side):
    folder = tmp_path / "tiles"
    folder.mkdir()
    bomb = png_header_only(folder / "bomb.png", side, side)
    digest = sha256_file(bomb)
    with pytest.raises(DataError, match="bomb.png"):
        orbify.read_images(folder)
    commands = {
        "check": ["check", "example", "--group", "c4", "--inputs", folder],
        "tune": ["tune", "example", "--group", "c4", "--data", folder, "--epochs", "1", "-o", tmp_path / "t.orb"],
        "convert": ["convert", "example", "--calibration", folder, "-o", tmp_path / "c.orb"],
    }
    for name, args in commands.items():
        code, output = cli(*args)
        flat = " ".join(output.split())
        assert code != 0 and "Traceback" not in output, (name, output)
        assert "bomb.png" in flat and "far beyond any tile" in flat, (name, output)
    assert sorted(p.name for p in tmp_path.rglob("*") if p.is_file()) == ["bomb.png"]
    assert sha256_file(bomb) == digest
