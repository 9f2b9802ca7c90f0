"""``orbify demo``: the whole job on a bundled example, with the before/after table."""

from __future__ import annotations

from pathlib import Path

import typer
from rich.table import Table

from orbify.cli.app import app, console
from orbify.cli.options import ForceOption
from orbify.common.options import check_choice
from orbify.example.demo import DemoResult, run_demo
from orbify.example.segment_demo import SegmentDemoResult, run_segment_demo

DEMO_TASKS = ("classify", "segment")


@app.command()
def demo(
    out: Path = typer.Option(Path("orbify-demo"), "--out", "-o", help="Folder for the models, reports, exported "
                             "program, table and plots (created if missing)."),
    task: str = typer.Option("classify", "--task", help="classify: the tile classifier (c4); segment: the scene "
                             "segmenter (d4, --head map)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="Print only the final table."),
    force: bool = ForceOption,
) -> None:
    """Convert, tune and export a bundled example model, measure every step; print the before/after table.

    The bundled models see micrograph particles of six shapes. They were trained on upright particles only and
    meet them at any angle in the field.

    --task classify (the default) takes the tile classifier. The demo converts it to c4 (quarter turns)
    with the shipped 'example' recipe, calibrated on unlabeled upright tiles (it says so in the
    table's title), tunes it by distillation on upright tiles, exports it as a
    pt2 program, then compares the original, the original averaged over c4 at test time (exact too,
    at 4× the cost), the converted, tuned and exported models: accuracy upright, in the field and on
    upright tiles moved by every group element, invariance error, parameters, MACs and inference
    time. It writes an HTML check report of the tuned model to hand on. Under three minutes on two
    CPU cores.

    --task segment takes the scene segmenter, a small encoder–decoder that labels every pixel. The
    demo converts it to d4 with a map head (its masks turn with the scene), tunes it on upright
    scenes and their masks, exports it, then compares the original, the original averaged over d4
    at test time (8× the cost), the converted, tuned and exported models: mean IoU on upright scenes,
    on field scenes and on upright scenes moved by every group element, equivariance error, cost.
    It draws one scene and every model's mask at a few angles. Under three minutes on two CPU cores.

    Examples:

      orbify demo

      orbify demo --task segment --out demo-out --force
    """
    check_choice("demo task", task, DEMO_TASKS)
    if task == "segment":
        result = run_segment_demo(out, force=force, progress=not quiet)
    else:
        result = run_demo(out, force=force, progress=not quiet)
    console.print(result_table(result))
    for note in result.notes:
        console.print(f"note: {note}", highlight=False)
    console.print(f"files in {result.out_dir}: " + ", ".join(sorted(path.name for path in result.files.values())),
                  highlight=False)
    console.print(f"done in {result.seconds:.0f} s", highlight=False)


def result_table(result: DemoResult | SegmentDemoResult) -> Table:
    """The before/after table of a demo run."""
    header, rows = result.table_rows()
    title = (result.title if isinstance(result, SegmentDemoResult)
             else f"the bundled example, {result.group}, budget {result.budget}, init {result.init}")
    table = Table(*header, title=title)
    for row in rows:
        table.add_row(*row)
    return table
