"""``orbify export``: write a model as a pt2 program, TorchScript or ONNX file that runs without orbify."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import torch
import typer
from rich.table import Table

from orbify.cli.app import app, console
from orbify.cli.models import Trust, read_converted, read_model
from orbify.cli.options import SOURCE_HELP, ForceOption, TrustOption, TrustSourceOption, WeightsOption
from orbify.errors import ExportError
from orbify.files.export import FORMATS, export_model, output_difference, run_exported
from orbify.files.saving import is_converted_file
from orbify.files.sources import IMAGENET_SIZE

_DEFAULT_CHANNELS = 3


@app.command("export")
def export(
    model: str = typer.Argument(..., help=SOURCE_HELP),
    format: str = typer.Option("pt2", "--format", "-f", help=f"Output format: {', '.join(FORMATS)}."),
    output: Path = typer.Option(..., "--output", "-o", help="The file to write."),
    input_size: Optional[int] = typer.Option(None, "--input-size", min=1, help="Height and width the file is exported at "
                                             "(default: the size a converted file was converted at, else "
                                             f"{IMAGENET_SIZE}). Use a safe size (orbify sizes)."),
    channels: Optional[int] = typer.Option(None, "--channels", min=1, help="Input channels (default: as converted, else "
                                           f"{_DEFAULT_CHANNELS})."),
    weights: Optional[Path] = WeightsOption,
    trust_pickle: bool = TrustOption,
    trust_source: bool = TrustSourceOption,
    force: bool = ForceOption,
) -> None:
    """Bake MODEL into plain torch layers and export it; then run the file once and compare it with MODEL.

    Example: orbify export resnet18-d4.orb --format onnx -o resnet18-d4.onnx
    """
    recorded: tuple[int, ...] = ()
    trust = Trust(trust_pickle, trust_source)
    if weights is None and Path(model).is_file() and is_converted_file(Path(model)):
        converted = read_converted(model, trust)
        module, recorded = converted.module, tuple(converted.plan.input_shape)
    else:
        module = read_model(model, weights, trust).module
    if input_size is not None:
        spatial = (input_size, input_size)
    else:
        spatial = recorded[2:] if recorded else (IMAGENET_SIZE, IMAGENET_SIZE)
    channels = channels or (recorded[1] if recorded else _DEFAULT_CHANNELS)
    example = torch.randn(1, channels, *spatial, generator=torch.Generator().manual_seed(0))
    path = export_model(module, example, output, format, force=force)
    table = Table("format", "file", "bytes", "input", "max |Δ| / max |y| vs MODEL")
    table.add_row(format, str(path), f"{path.stat().st_size:,}", "×".join(map(str, example.shape[1:])),
                  _difference(module, path, format, example))
    console.print(table)


def _difference(module: torch.nn.Module, path: Path, format: str, example: torch.Tensor) -> str:
    """How far the exported file's output is from the model's on two inputs (a relative max difference; the
    largest over the tensors of a dict or tuple output)."""
    inputs = torch.cat([example, torch.randn_like(example)])
    with torch.no_grad():
        expected = module.eval()(inputs)
    try:
        return f"{output_difference(run_exported(path, format, inputs), expected):.1e}"
    except ExportError as error:
        return f"not checked: {error.what}"
