"""``orbify sizes``: input sizes at which every strided and resampling op of a model is exact."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.table import Table

from orbify.cli.app import app, console
from orbify.cli.models import Trust, read_model
from orbify.cli.options import SOURCE_HELP, TrustOption, TrustSourceOption, WeightsOption
from orbify.errors import InputShapeError
from orbify.files.sources import IMAGENET_SIZE
from orbify.graph.sizes import SizeChecker
from orbify.graph.stride_conflicts import no_exact_size_error
from orbify.graph.stride_repair import repaired_model

REPAIR_STRIDES_HELP = ("When no input size is exact because two ops reading the same size need sides of opposite "
                       "parity (a 3×3 stride-2 conv beside a 2×2 stride-2 pool), replace one of each such pair by "
                       "its nearest counterpart exact on the other parity (a 2×2 average pool by a 3×3 one with "
                       "padding 1); the plan notes each replacement and the drift it causes before tuning.")


@app.command()
def sizes(
    source: str = typer.Argument(..., help=SOURCE_HELP),
    near: int = typer.Option(IMAGENET_SIZE, "--near", help="Look for safe sizes near this one."),
    count: int = typer.Option(5, "--count", help="How many safe sizes to list."),
    channels: int = typer.Option(3, "--channels", help="Input channels of the model."),
    repair_strides: bool = typer.Option(False, "--repair-strides", help="List the sizes of the model as orbify "
                                        "convert --repair-strides converts it: " + REPAIR_STRIDES_HELP),
    weights: Optional[Path] = WeightsOption,
    trust_pickle: bool = TrustOption,
    trust_source: bool = TrustSourceOption,
) -> None:
    """List safe input sizes near --near, and say which strided or resampling ops break at --near itself.

    When no input size is exact at all, it says why — the ops that conflict and what each needs — and exits
    non-zero; --repair-strides then lists the sizes of the repaired model.

    Example: orbify sizes torchvision:resnet18 --near 224
    """
    model = read_model(source, weights, Trust(trust_pickle, trust_source)).module
    if repair_strides:
        model, repairs = repaired_model(model, channels, near)
        for repair in repairs:
            console.print(f"[yellow]note:[/] {repair.note}", highlight=False)
        if not repairs:
            console.print("nothing to repair: no ops conflict on the input side's parity", highlight=False)
    checker = SizeChecker(model, channels)
    found = checker.safe_sizes(near, count)
    if not found and checker.conflicts(near):
        raise no_exact_size_error(checker.conflicts(near))
    try:
        broken = checker.violations(near)
    except InputShapeError as error:
        console.print(f"[yellow]{near} is not safe[/]: the model does not run at it ({error.what})", highlight=False)
        broken = None
    if broken:
        console.print(f"[yellow]{near} is not safe[/]: the first strided or resampling op that breaks is {broken[0]}")
    elif broken is not None:
        console.print(f"[green]{near} is safe[/]: every strided and resampling op samples a symmetric grid")
    table = Table("safe size", "distance")
    for size in found:
        table.add_row(str(size), f"{size - near:+d}")
    console.print(table)
