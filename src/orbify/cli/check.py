"""``orbify check``: convert a model in memory (or read a converted file) and prove how exact it is.

Also holds what the check, summary and diff commands share: the conversion options and reading
a SOURCE into a plain or converted model at a chosen input size.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import torch
import typer
from torch import nn

from orbify.verification.check import check_model
from orbify.conversion.converter import convert
from orbify.data import ImageSet, read_images
from orbify.errors import OptionError, OutputError
from orbify.graph.plan import ConversionPlan
from orbify.transfer.recalibrate import recalibrate_batch_norm
from orbify.verification.report import (PLOT_FILES,
    check_markdown,
    check_renderable,
    plot_check,
    write_json,
    write_text)
from orbify.files.saving import is_converted_file, load
from orbify.cli.app import SOURCE_HELP, ForceOption, TrustOption, WeightsOption, app, console, errors, parse_floats
from orbify.cli.convert import choose_input_size, input_channels
from orbify.cli.models import read_model

GROUP_HELP = "The rotation group: c4 (quarter turns), d4 (quarter turns and mirror images), c2, d1, d2, c8, ..."
BUDGET_HELP = "channels (same width, ÷|G| parameters), params (≈ same parameters) or fields (×|G| width, lossless)."
HEAD_HELP = "invariant (a classifier whose output ignores the group) or map (a dense output that moves with the input)."
JsonOption = typer.Option(None, "--json", help="Also write the figures as JSON to this file.")
MarkdownOption = typer.Option(None, "--markdown", help="Also write a markdown report to this file.")
InputSizeOption = typer.Option(None, "--input-size", min=1, help="Height and width of the input (default: as "
                               "converted for a converted file, the images' size with --inputs, else the safe size "
                               "nearest the architecture's usual size).")
ChannelsOption = typer.Option(None, "--channels", min=1, help="Input channels (default: those of the first conv).")


@dataclass
class ModelPair:
    """A converted model with its plan and the plain original it is compared with."""

    converted: nn.Module
    plan: ConversionPlan
    original: nn.Module


@app.command()
def check(
    source: str = typer.Argument(..., help=SOURCE_HELP + " A converted file needs --original (and ignores "
                                 "--group, --budget, --head and --init)."),
    group: str = typer.Option("d4", "--group", "-g", help=GROUP_HELP),
    budget: str = typer.Option("channels", "--budget", help=BUDGET_HELP),
    head: str = typer.Option("invariant", "--head", help=HEAD_HELP),
    init: str = typer.Option("orbit-average", "--init", help="orbit-average (project the weights) or embed "
                             "(fields budget only: the original embedded exactly)."),
    original_source: Optional[str] = typer.Option(None, "--original", help="With a converted file as SOURCE: "
                                                  "the plain model it came from (--weights load into it)."),
    input_size: Optional[int] = InputSizeOption,
    inputs: Optional[Path] = typer.Option(None, "--inputs", help="An image folder (optionally one sub-folder per "
                                          "class) or an .npz file with 'images' (and 'labels'); default random "
                                          "normal images."),
    limit: int = typer.Option(64, "--limit", min=1, help="Use at most this many of the --inputs images."),
    mean: Optional[str] = typer.Option(None, "--mean", help="Per-channel mean to subtract from --inputs, "
                                       "e.g. 0.485,0.456,0.406."),
    std: Optional[str] = typer.Option(None, "--std", help="Per-channel std to divide --inputs by, "
                                      "e.g. 0.229,0.224,0.225."),
    channels: Optional[int] = ChannelsOption,
    recalibrate: bool = typer.Option(False, "--recalibrate", help="Re-estimate the converted model's batch-norm "
                                     "statistics on the check inputs first (for random-weight models)."),
    float32: bool = typer.Option(False, "--float32", help="Measure the per-layer errors in float32 instead of "
                                 "float64 (faster; float32 rounding then shows as ~1e-6..1e-5)."),
    safe_size_count: int = typer.Option(3, "--safe-sizes", min=1, help="How many safe sizes to propose when the "
                                        "input size is not safe."),
    tolerance: Optional[float] = typer.Option(None, "--tolerance", help="Exit with code 1 when the output's "
                                              "invariance (or equivariance) error exceeds this."),
    json_path: Optional[Path] = JsonOption,
    markdown_path: Optional[Path] = MarkdownOption,
    plot_dir: Optional[Path] = typer.Option(None, "--plot", help="Write plots (per-layer errors, first-layer "
                                            "filters) into this folder (needs matplotlib)."),
    weights: Optional[Path] = WeightsOption,
    trust_pickle: bool = TrustOption,
    force: bool = ForceOption,
) -> None:
    """Convert SOURCE in memory (or read a converted file) and report cost, exactness, drift and input-size safety.

    Examples: orbify check torchvision:resnet18 --group c4 --input-size 225 --json check.json;
    orbify check model.orb --original torchvision:resnet18 --weights resnet18.pt --inputs photos/
    """
    plots = [plot_dir / name for name in PLOT_FILES] if plot_dir is not None else []
    refuse_existing([json_path, markdown_path, *plots], force)
    images = None
    if inputs is not None:
        images = read_images(inputs, size=input_size, channels=channels or 3, limit=limit,
                             mean=parse_floats(mean, "--mean"), std=parse_floats(std, "--std"))
    pair = read_pair(source, original_source, weights, trust_pickle, group, budget, head, init, input_size, channels,
                     images)
    if recalibrate:
        batches = images.images.split(16) if images is not None else [_random_inputs(pair.plan, 16)]
        recalibrate_batch_norm(pair.converted, batches)
    report = check_model(pair.converted, pair.original, pair.plan, images,
                         input_size=input_size or tuple(pair.plan.input_shape[-2:]), float64=not float32,
                         safe_size_count=safe_size_count)
    console.print(check_renderable(report))
    if json_path is not None:
        write_json(json_path, report.to_dict(), force=force)
    if markdown_path is not None:
        write_text(markdown_path, check_markdown(report), force=force)
    if plot_dir is not None:
        for path in plot_check(report, plot_dir, force=force):
            console.print(f"wrote {path}")
    if tolerance is not None and report.invariance_error > tolerance:
        errors.print(f"[bold red]check failed:[/] the output {report.output_property} error "
                     f"{report.invariance_error:.2e} exceeds --tolerance {tolerance:g}", highlight=False)
        raise typer.Exit(1)


# -- shared by check, summary and diff ---------------------------------------------------------------------
def read_pair(source: str, original_source: str | None, weights: Path | None, trust_pickle: bool, group: str,
              budget: str, head: str, init: str, input_size: int | None, channels: int | None,
              images: ImageSet | None = None) -> ModelPair:
    """The converted model, its plan and the original: converted in memory, or read from a converted file."""
    if is_converted_source(source):
        if original_source is None:
            raise OptionError(f"{source!r} is a converted file; the check needs the plain model it came from",
                              where="option --original",
                              fix="add --original SOURCE (and --weights for its weights), e.g. --original "
                                  "torchvision:resnet18 --weights resnet18.pt")
        loaded = load(source)
        original = read_model(original_source, weights, trust_pickle).module
        return ModelPair(loaded.module, loaded.plan, original)
    if original_source is not None:
        raise OptionError("--original is for a converted file as SOURCE; here SOURCE is converted in memory",
                          where="option --original", fix="leave out --original, or give a converted (.orb) file")
    original = read_model(source, weights, trust_pickle).module
    example = images.images[:1] if images is not None else example_input(original, source, input_size, channels)
    converted, plan = convert(original, group, budget, head, example, init=init)
    return ModelPair(converted, plan, original)


def example_input(model: nn.Module, source: str, input_size: int | None, channels: int | None) -> torch.Tensor:
    """A zero image (1, C, S, S) at the given size, or at the safe size nearest the architecture's usual one."""
    channels = channels or input_channels(model)
    size = choose_input_size(model, source, requested=input_size, channels=channels).size
    return torch.zeros(1, channels, size, size)


def is_converted_source(source: str) -> bool:
    """True when SOURCE names an existing converted-model file."""
    path = Path(source)
    return path.is_file() and is_converted_file(path)


def _random_inputs(plan: ConversionPlan, count: int) -> torch.Tensor:
    return torch.randn(count, *plan.input_shape[1:], generator=torch.Generator().manual_seed(1))


def refuse_existing(paths: list[Path | None], force: bool) -> None:
    """Fail before any work when an output exists and --force is not given."""
    for path in paths:
        if path is not None and path.exists() and not force:
            raise OutputError(f"The output file {str(path)!r} already exists",
                              fix="choose another path, or pass --force to replace it")
