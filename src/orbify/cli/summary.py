"""``orbify summary`` and ``orbify diff``: per-layer cost of a model, and of two models side by side."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import torch
import typer

from orbify.cli.app import app, console
from orbify.cli.models import Trust, is_converted_source, read_converted, read_model
from orbify.cli.options import (
    BUDGET_HELP,
    SOURCE_HELP,
    BudgetOption,
    ChannelsOption,
    ForceOption,
    HeadOption,
    JsonOption,
    MarkdownOption,
    TrustOption,
    TrustSourceOption,
    WeightsOption,
)
from orbify.cli.outputs import refuse_existing
from orbify.conversion.converter import convert
from orbify.files.sources import usual_input_size
from orbify.graph.sizes import input_channels
from orbify.recipes.schema import CONVERT_DEFAULTS
from orbify.verification.report import (
    diff_markdown,
    diff_table,
    summary_markdown,
    summary_table,
    write_json,
    write_text,
)
from orbify.verification.summary import ModelSummary, diff_summaries, summarize

SIZE_HELP = ("Height and width of the input (default: as converted for a converted file, else the architecture's "
             "usual size, e.g. 224 for torchvision models).")


@app.command()
def summary(
    source: str = typer.Argument(..., help=SOURCE_HELP),
    group: Optional[str] = typer.Option(None, "--group", "-g", help="Convert first with this group (c4, d4, ...) "
                                        "and summarise the converted model; default: the model as it is."),
    budget: str = BudgetOption,
    head: str = HeadOption,
    input_size: Optional[int] = typer.Option(None, "--input-size", min=1, help=SIZE_HELP),
    channels: Optional[int] = ChannelsOption,
    json_path: Optional[Path] = JsonOption,
    markdown_path: Optional[Path] = MarkdownOption,
    weights: Optional[Path] = WeightsOption,
    trust_pickle: bool = TrustOption,
    trust_source: bool = TrustSourceOption,
    force: bool = ForceOption,
) -> None:
    """One row per conv, linear and norm layer: op, layouts, channels, kernel, stride, params, MACs, output shape.

    Examples: orbify summary torchvision:resnet18; orbify summary torchvision:resnet18 --group c4
    """
    refuse_existing([json_path, markdown_path], force)
    result = summarize_source(source, group, budget, head, input_size, channels, weights,
                              Trust(trust_pickle, trust_source))
    console.print(summary_table(result))
    if json_path is not None:
        write_json(json_path, result.to_dict(), force=force)
    if markdown_path is not None:
        write_text(markdown_path, summary_markdown(result), force=force)


@app.command()
def diff(
    source_a: str = typer.Argument(..., metavar="A", help="The first model (a SOURCE, see orbify summary)."),
    source_b: str = typer.Argument(..., metavar="B", help="The second model (a SOURCE)."),
    group: Optional[str] = typer.Option(None, "--group", "-g", help="Convert both A and B with this group."),
    group_a: Optional[str] = typer.Option(None, "--group-a", help="Convert A with this group (overrides --group)."),
    group_b: Optional[str] = typer.Option(None, "--group-b", help="Convert B with this group (overrides --group)."),
    budget: str = typer.Option(CONVERT_DEFAULTS["budget"], "--budget", help="The budget of both conversions. "
                               + BUDGET_HELP),
    budget_a: Optional[str] = typer.Option(None, "--budget-a", help="The budget of A's conversion."),
    budget_b: Optional[str] = typer.Option(None, "--budget-b", help="The budget of B's conversion."),
    head: str = HeadOption,
    input_size: Optional[int] = typer.Option(None, "--input-size", min=1, help=SIZE_HELP + " The same for A and B."),
    channels: Optional[int] = ChannelsOption,
    json_path: Optional[Path] = JsonOption,
    markdown_path: Optional[Path] = MarkdownOption,
    trust_pickle: bool = TrustOption,
    trust_source: bool = TrustSourceOption,
    force: bool = ForceOption,
) -> None:
    """Compare two models layer by layer: rows aligned by node name, changed cells marked, totals with ratios.

    A side is converted when it gets a group (--group for both, --group-a / --group-b for one), else taken as it is.
    Examples: orbify diff torchvision:resnet18 torchvision:resnet18 --group-b c4;
    orbify diff torchvision:resnet18 torchvision:resnet18 --group-a c4 --group-b d4;
    orbify diff torchvision:resnet18 torchvision:resnet18 --group c4 --budget-a channels --budget-b params
    """
    refuse_existing([json_path, markdown_path], force)
    trust = Trust(trust_pickle, trust_source)
    a = summarize_source(source_a, group_a or group, budget_a or budget, head, input_size, channels, None, trust)
    size = input_size or a.input_shape[-1]
    b = summarize_source(source_b, group_b or group, budget_b or budget, head, size, channels, None, trust)
    result = diff_summaries(a, b)
    console.print(diff_table(result))
    if json_path is not None:
        write_json(json_path, result.to_dict(), force=force)
    if markdown_path is not None:
        write_text(markdown_path, diff_markdown(result), force=force)


def summarize_source(source: str, group: str | None, budget: str, head: str, input_size: int | None,
                     channels: int | None, weights: Path | None, trust: Trust) -> ModelSummary:
    """Summarise a SOURCE: a converted file as it is, else the plain model, converted first when ``group`` is given."""
    if is_converted_source(source):
        loaded = read_converted(source, trust)
        shape = loaded.plan.input_shape
        size = (input_size, input_size) if input_size else tuple(shape[-2:])
        example = torch.zeros(1, channels or shape[1], *size)
        return summarize(loaded.module, example, loaded.plan, title=source)
    model = read_model(source, weights, trust).module
    size = input_size or usual_input_size(source)[0]
    example = torch.zeros(1, channels or input_channels(model), size, size)
    if group is None:
        return summarize(model, example, title=source)
    converted, plan = convert(model, group, budget, head, example)
    return summarize(converted, example, plan, title=source)
