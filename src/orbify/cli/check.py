"""``orbify check``: convert a model in memory (or read a converted file) and prove how exact it is."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import torch
import typer

from orbify.cli.app import app, console, errors
from orbify.cli.models import Trust, is_converted_source, read_pair
from orbify.cli.options import (
    SOURCE_HELP,
    BudgetOption,
    ChannelsOption,
    ForceOption,
    GroupOption,
    HeadOption,
    JsonOption,
    MarkdownOption,
    TrustOption,
    TrustSourceOption,
    WeightsOption,
    parse_floats,
)
from orbify.cli.outputs import refuse_existing
from orbify.data import read_images
from orbify.graph.plan import ConversionPlan
from orbify.recipes.schema import CONVERT_DEFAULTS
from orbify.transfer.recalibrate import recalibrate_batch_norm
from orbify.verification.check import check_model
from orbify.verification.html_report import write_check_html
from orbify.verification.report import PLOT_FILES, check_markdown, check_renderable, plot_check, write_json, write_text


@app.command()
def check(
    source: str = typer.Argument(..., help=SOURCE_HELP + " A converted file is checked alone (cost, exactness, "
                                 "input sizes) or, with --original and --weights, against the plain model it came "
                                 "from (adds drift); it ignores --group, --budget, --head and --init."),
    group: str = GroupOption,
    budget: str = BudgetOption,
    head: str = HeadOption,
    init: str = typer.Option(CONVERT_DEFAULTS["init"], "--init", help="orbit-average (project the weights) or embed "
                             "(fields budget only: the original embedded exactly)."),
    original_source: Optional[str] = typer.Option(None, "--original", help="With a converted file as SOURCE: "
                                                  "the plain model it came from (--weights load into it), to "
                                                  "measure the drift from it."),
    input_size: Optional[int] = typer.Option(None, "--input-size", min=1, help="Height and width of the input "
                                             "(default: as converted for a converted file, the images' size with "
                                             "--inputs, else the safe size nearest the architecture's usual size)."),
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
    html_path: Optional[Path] = typer.Option(None, "--html", help="Write the report as one self-contained HTML "
                                             "file (tables, and the plots embedded when matplotlib is installed)."),
    weights: Optional[Path] = WeightsOption,
    trust_pickle: bool = TrustOption,
    trust_source: bool = TrustSourceOption,
    force: bool = ForceOption,
) -> None:
    """Convert SOURCE in memory (or read a converted file) and report cost, exactness, drift and input-size safety.

    Examples: orbify check torchvision:resnet18 --group c4 --input-size 225 --json check.json;
    orbify check model.orb --html report.html;
    orbify check model.orb --original torchvision:resnet18 --weights resnet18.pt --inputs photos/
    """
    plots = [plot_dir / name for name in PLOT_FILES] if plot_dir is not None else []
    refuse_existing([json_path, markdown_path, html_path, *plots], force)
    trained_original = original_source is not None or not is_converted_source(source)
    images = None
    if inputs is not None:
        images = read_images(inputs, size=input_size, channels=channels or 3, limit=limit,
                             mean=parse_floats(mean, "--mean"), std=parse_floats(std, "--std"))
    pair = read_pair(source, original_source, weights, Trust(trust_pickle, trust_source), group, budget, head, init,
                     input_size, channels, images)
    if recalibrate:
        batches = images.images.split(16) if images is not None else [_random_inputs(pair.plan, 16)]
        recalibrate_batch_norm(pair.converted, batches)
    report = check_model(pair.converted, pair.original, pair.plan, images,
                         input_size=input_size or tuple(pair.plan.input_shape[-2:]), float64=not float32,
                         safe_size_count=safe_size_count, original_weights_known=trained_original)
    console.print(check_renderable(report))
    if not trained_original:
        console.print("Drift from the original was not measured: it needs the plain model's trained weights, "
                      "--original SOURCE --weights FILE.", highlight=False)
    if json_path is not None:
        write_json(json_path, report.to_dict(), force=force)
    if markdown_path is not None:
        write_text(markdown_path, check_markdown(report), force=force)
    if plot_dir is not None:
        for path in plot_check(report, plot_dir, force=force):
            console.print(f"wrote {path}")
    if html_path is not None:
        console.print(f"wrote {write_check_html(report, html_path, force=force)}")
    if tolerance is not None and report.invariance_error > tolerance:
        errors.print(f"[bold red]check failed:[/] the output {report.output_property} error "
                     f"{report.invariance_error:.2e} exceeds --tolerance {tolerance:g}", highlight=False)
        raise typer.Exit(1)


def _random_inputs(plan: ConversionPlan, count: int) -> torch.Tensor:
    return torch.randn(count, *plan.input_shape[1:], generator=torch.Generator().manual_seed(1))
