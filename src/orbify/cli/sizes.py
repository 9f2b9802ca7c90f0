"""``orbify sizes``: input sizes at which every strided op of a model is exact."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.table import Table

from orbify.cli.app import app, console
from orbify.cli.models import Trust, read_model
from orbify.cli.options import SOURCE_HELP, TrustOption, TrustSourceOption, WeightsOption
from orbify.files.sources import IMAGENET_SIZE
from orbify.graph.sizes import SizeChecker


@app.command()
def sizes(
    source: str = typer.Argument(..., help=SOURCE_HELP),
    near: int = typer.Option(IMAGENET_SIZE, "--near", help="Look for safe sizes near this one."),
    count: int = typer.Option(5, "--count", help="How many safe sizes to list."),
    channels: int = typer.Option(3, "--channels", help="Input channels of the model."),
    weights: Optional[Path] = WeightsOption,
    trust_pickle: bool = TrustOption,
    trust_source: bool = TrustSourceOption,
) -> None:
    """List safe input sizes near --near, and say which strided layers break at --near itself.

    Example: orbify sizes torchvision:resnet18 --near 224
    """
    model = read_model(source, weights, Trust(trust_pickle, trust_source)).module
    checker = SizeChecker(model, channels)
    broken = checker.violations(near)
    if broken:
        console.print(f"[yellow]{near} is not safe[/]: the first strided op that breaks is {broken[0]}")
    else:
        console.print(f"[green]{near} is safe[/]: every strided op samples a symmetric grid")
    table = Table("safe size", "distance")
    for size in checker.safe_sizes(near, count):
        table.add_row(str(size), f"{size - near:+d}")
    console.print(table)
