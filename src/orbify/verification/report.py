"""Rendering check reports, summaries and diffs: rich tables, JSON, markdown and plots.

Every writer goes through :func:`orbify.common.safe_io.atomic_write` and refuses to replace an existing
file unless ``force`` is given. Plots need matplotlib (the ``plot`` extra).
"""

from __future__ import annotations

import io
import json
import math
from pathlib import Path

from rich.console import Group as RenderGroup
from rich.table import Table
from rich.text import Text

from orbify.common.safe_io import atomic_write
from orbify.errors import OptionError
from orbify.graph.stride_repair import REPAIR_NOTE
from orbify.verification.check import CheckReport
from orbify.verification.summary import LayerRow, ModelSummary, SummaryDiff


# -- numbers ---------------------------------------------------------------------------------------------
def si(value: int | float) -> str:
    """A count with an SI prefix: 11.69 M, 1.814 G, 512."""
    for limit, suffix, digits in ((1e9, "G", 3), (1e6, "M", 2), (1e3, "k", 1)):
        if abs(value) >= limit:
            return f"{value / limit:.{digits}f} {suffix}"
    return f"{value:g}"


def error(value: float | None) -> str:
    return "-" if value is None or (isinstance(value, float) and math.isnan(value)) else f"{value:.2e}"


def ratio(value: float) -> str:
    """``×0.250 (÷4.00)``: after ÷ before, and its inverse when it shrinks."""
    if math.isnan(value) or value == 0:
        return "-"
    return f"×{value:.3f}" + (f" (÷{1 / value:.2f})" if value < 1 else "")


def percent(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.1f} %"


def size_bytes(value: int) -> str:
    for limit, suffix in ((2**30, "GiB"), (2**20, "MiB"), (2**10, "KiB")):
        if value >= limit:
            return f"{value / limit:.2f} {suffix}"
    return f"{value} B"


# -- check report: sections as (title, header, rows) shared by the terminal and markdown ------------------
def check_sections(report: CheckReport) -> list[tuple[str, tuple[str, ...], list[tuple[str, ...]]]]:
    """The report as titled tables of strings (the terminal and the markdown render the same content)."""
    kind = f"{report.output_property} error"
    worst = report.worst_layer
    size = report.size
    sections = [
        ("Cost", ("", "before", "after", "after ÷ before"), [
            ("parameters", f"{report.params_before:,}", f"{report.params_after:,}", ratio(report.param_ratio)),
            ("MACs per image", si(report.macs_before), si(report.macs_after), ratio(report.mac_ratio)),
            ("checkpoint", "", size_bytes(report.checkpoint_bytes), ""),
        ]),
        ("Exactness", ("measure", "value"), [
            (f"output {kind} ({report.precision}, max over {len(report.elements)} elements)",
             error(report.invariance_error)),
            *([(f"output {kind} (float32)", error(report.invariance_error_float32))]
              if report.precision != "float32" else []),
            ("worst layer", f"{worst.name} ({error(worst.equivariance_error)})" if worst else "-"),
            ("group", f"{report.group} ({'exact' if report.exact_group else 'interpolated'} on the pixel grid)"),
        ]),
        ("Drift from the original (upright inputs)", ("measure", "value"), _drift_rows(report)),
        ("Input size", ("measure", "value"), [
            ("size", f"{size.input_size[0]}×{size.input_size[1]}: " + ("safe" if size.safe else "NOT safe")),
            ("first strided or resampling op that breaks", size.first_violation_detail or "-"),
            ("strided or resampling ops that break", ", ".join(size.violations) or "-"),
            ("nearest safe sizes", ", ".join(map(str, size.safe_sizes)) or "-"),
            *_repair_rows(report),
        ]),
        *_segmentation_sections(report),
        _layer_section(report),
    ]
    notes = report.roundings + report.notes
    if notes:
        sections.append(("Notes", ("note",), [(note,) for note in notes]))
    return sections


def _repair_rows(report: CheckReport) -> list[tuple[str, str]]:
    """A row counting the ops --repair-strides replaced (each is a note of the plan), when it replaced any."""
    repairs = [note for note in report.notes if note.startswith(f"{REPAIR_NOTE}: '")]
    return [("ops replaced by --repair-strides", f"{len(repairs)} (see the notes)")] if repairs else []


NOT_MEASURED = "not measured"
"""What the drift cells read when the original's trained weights were not given (never a zero)."""


def _drift_rows(report: CheckReport) -> list[tuple[str, str]]:
    """Agreement, KL and accuracies; "not measured" for the original's figures when its weights are unknown."""
    known = report.original_weights_known
    def measured(text: str) -> str:
        return text if known else NOT_MEASURED
    return [
        ("top-1 agreement", measured(percent(report.top1_agreement))),
        ("mean KL(original ‖ converted)",
         measured("-" if report.mean_kl is None else f"{report.mean_kl:.4g}")),
        ("accuracy before → after",
         f"{measured(percent(report.accuracy_before))} → {percent(report.accuracy_after)}"),
        ("inputs", report.inputs),
    ] + ([] if known else [("why not measured", "the original's trained weights were not given")])


def _segmentation_sections(report: CheckReport) -> list[tuple[str, tuple[str, ...], list[tuple[str, ...]]]]:
    """Per-pixel accuracy and mean IoU of each model against the given masks (dense models), upright and moved."""
    if not report.segmentation:
        return []
    header = ("model", "pixel accuracy upright", "pixel accuracy moved", "mean IoU upright", "mean IoU moved (mean)",
              "mean IoU worst element")
    rows = [(name, percent(s.upright.accuracy), percent(s.moved_accuracy), percent(s.upright.mean_iou),
             percent(s.moved_mean_iou), percent(s.worst_iou)) for name, s in report.segmentation.items()]
    return [(f"Segmentation against the given masks (moved with the images by each of {len(report.elements)} "
             "elements)", header, rows)]


def _layer_section(report: CheckReport) -> tuple[str, tuple[str, ...], list[tuple[str, ...]]]:
    """Per layer: residual and equivariance error, plus the refit's unexplained variance for a calibrated model."""
    calibrated = report.init == "calibrated"
    header = ("node", "op", "layout in → out", "weight residual", "equivariance error")
    rows = []
    for layer in report.layers:
        row = (layer.name, layer.kind, f"{layer.layout_in} → {layer.layout_out}", error(layer.weight_residual),
               error(layer.equivariance_error))
        if calibrated:
            row += ("-" if layer.calibration_error is None else f"{layer.calibration_error:.4f}",)
        rows.append(row)
    return "Layers", header + (("refit error",) if calibrated else ()), rows


def check_renderable(report: CheckReport) -> RenderGroup:
    """The check report as rich tables; the worst layer and an unsafe size are highlighted."""
    worst = report.worst_layer
    tables = []
    for title, header, rows in check_sections(report):
        table = Table(*header, title=title, title_justify="left", title_style="bold")
        for row in rows:
            style = None
            if title == "Layers" and worst is not None and row[0] == worst.name:
                style = "bold red"
            if title == "Input size" and row[0] == "size" and not report.size.safe:
                style = "yellow"
            table.add_row(*row, style=style)
        tables.append(table)
    return RenderGroup(*tables)


def check_title(report: CheckReport) -> str:
    """``Conversion check: d4, budget channels, head invariant``."""
    return f"Conversion check: {report.group}, budget {report.budget}, head {report.head}"


def check_headline(report: CheckReport) -> str:
    """One sentence with the output error, the cost ratios and the input size's verdict."""
    verdict = "safe" if report.size.safe else "NOT safe"
    return (f"Output {report.output_property} error {error(report.invariance_error)} ({report.precision}), "
            f"parameters {ratio(report.param_ratio)}, MACs {ratio(report.mac_ratio)}, "
            f"input size {report.size.input_size[0]}×{report.size.input_size[1]} {verdict}.")


def check_markdown(report: CheckReport) -> str:
    """A markdown report for a lab notebook or a pull request."""
    lines = [f"# {check_title(report)}", "", check_headline(report), ""]
    worst = report.worst_layer
    for title, header, rows in check_sections(report):
        lines += [f"## {title}", ""]
        marked = [tuple(f"**{cell}**" if title == "Layers" and worst and row[0] == worst.name and cell else cell
                        for cell in row) for row in rows]
        lines += markdown_table(header, marked) + [""]
    return "\n".join(lines)


# -- summaries and diffs ----------------------------------------------------------------------------------
def _layouts(row: LayerRow) -> str:
    return "-" if row.layout_in == row.layout_out == "-" else f"{row.layout_in}→{row.layout_out}"


def _kernel(row: LayerRow) -> str:
    if row.kernel == "-":
        return "-"
    steps = set(row.stride.split("×"))
    return f"{row.kernel} s{steps.pop() if len(steps) == 1 else row.stride}"


# Displayed columns: heading, the LayerRow fields shown in it, and how they are written.
DISPLAY = (
    ("op", ("op",), lambda row: row.op),
    ("layouts", ("layout_in", "layout_out"), _layouts),
    ("channels", ("channels",), lambda row: row.channels),
    ("kernel", ("kernel", "stride"), _kernel),
    ("params", ("params",), lambda row: f"{row.params:,}"),
    ("MACs", ("macs",), lambda row: si(row.macs)),
    ("output", ("output_shape",), lambda row: row.output_shape),
)
_PARAMS_COLUMN = 5   # position of "params" after the node column; totals go there and into "MACs"


def _totals(label: str, header: tuple[str, ...], params: str, macs: str) -> tuple[str, ...]:
    cells = [label] + [""] * (len(header) - 1)
    start = len(header) - len(DISPLAY) + _PARAMS_COLUMN - 1
    cells[start], cells[start + 1] = params, macs
    return tuple(cells)


def summary_rows(summary: ModelSummary) -> tuple[tuple[str, ...], list[tuple[str, ...]]]:
    header = ("node",) + tuple(heading for heading, _, _ in DISPLAY)
    rows = [(row.name,) + tuple(show(row) for _, _, show in DISPLAY) for row in summary.rows]
    rows.append(_totals("total", header, f"{summary.params:,}", si(summary.macs)))
    return header, rows


def _table(header: tuple[str, ...], title: str) -> Table:
    """A table whose node names and counts never wrap (the other columns give way on narrow terminals)."""
    table = Table(title=title, title_justify="left", title_style="bold")
    for name in header:
        table.add_column(name, no_wrap=name in ("node", "params", "MACs"))
    return table


def summary_table(summary: ModelSummary) -> Table:
    header, rows = summary_rows(summary)
    table = _table(header, _summary_title(summary))
    for row in rows:
        table.add_row(*row, style="bold" if row[0] == "total" else None)
    return table


def summary_markdown(summary: ModelSummary) -> str:
    header, rows = summary_rows(summary)
    return "\n".join([f"# {_summary_title(summary)}", ""] + markdown_table(header, rows) + [""])


def _summary_title(summary: ModelSummary) -> str:
    conversion = f", {summary.group} / {summary.budget}" if summary.group else ""
    shape = "×".join(map(str, summary.input_shape))
    return f"{summary.title}{conversion} (input {shape})"


def diff_rows(diff: SummaryDiff, changed_mark: tuple[str, str] = ("", "")) -> tuple[tuple[str, ...], list[tuple]]:
    """Header and rows of a diff: changed cells read ``A → B`` wrapped in ``changed_mark``; a node in one model
    only is suffixed ``(only A)`` / ``(only B)``."""
    header = ("node",) + tuple(heading for heading, _, _ in DISPLAY)
    rows = []
    for row in diff.rows:
        if row.a is None or row.b is None:
            side = "A" if row.b is None else "B"
            rows.append((f"{row.name} (only {side})",) + tuple(show(row.a or row.b) for _, _, show in DISPLAY))
            continue
        cells = [row.name]
        for _, fields, show in DISPLAY:
            before, after = show(row.a), show(row.b)
            changed = any(f in row.changed for f in fields)
            cells.append(f"{changed_mark[0]}{before} → {after}{changed_mark[1]}" if changed else before)
        rows.append(tuple(cells))
    rows.append(_totals("total A", header, f"{diff.a.params:,}", si(diff.a.macs)))
    rows.append(_totals("total B", header, f"{diff.b.params:,}", si(diff.b.macs)))
    rows.append(_totals("B ÷ A", header, ratio(diff.param_ratio), ratio(diff.mac_ratio)))
    return header, rows


def diff_table(diff: SummaryDiff) -> Table:
    header, rows = diff_rows(diff, ("[bold yellow]", "[/]"))
    table = _table(header, f"A: {_summary_title(diff.a)}\nB: {_summary_title(diff.b)}")
    for row in rows:
        style = "red" if row[0].endswith("(only A)") else "green" if row[0].endswith("(only B)") else None
        if row[0] in ("total A", "total B", "B ÷ A"):
            style = "bold"
        table.add_row(*(Text.from_markup(cell) for cell in row), style=style)
    return table


def diff_markdown(diff: SummaryDiff) -> str:
    header, rows = diff_rows(diff, ("**", "**"))
    return "\n".join(["# Diff", "", f"- A: {_summary_title(diff.a)}", f"- B: {_summary_title(diff.b)}", ""]
                     + markdown_table(header, rows) + [""])


def markdown_table(header: tuple[str, ...], rows: list[tuple[str, ...]]) -> list[str]:
    """Lines of a GitHub-style pipe table (pipes in cells escaped)."""
    def line(cells) -> str:
        return "| " + " | ".join(str(c).replace("|", "\\|") for c in cells) + " |"
    return [line(header), line(["---"] * len(header))] + [line(row) for row in rows]


# -- files ----------------------------------------------------------------------------------------------
def write_json(path: str | Path, data: dict, *, force: bool = False) -> Path:
    """Write ``data`` as indented JSON (NaN and infinities become null)."""
    text = json.dumps(_finite(data), indent=2, ensure_ascii=False) + "\n"
    return atomic_write(path, lambda stream: stream.write(text.encode()), force=force)


def write_text(path: str | Path, text: str, *, force: bool = False) -> Path:
    return atomic_write(path, lambda stream: stream.write(text.encode()), force=force)


def _finite(value):
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value


# -- plots ----------------------------------------------------------------------------------------------
PLOT_FILES = ("layer_errors.png", "first_layer_filters.png")


def plot_check(report: CheckReport, directory: str | Path, *, force: bool = False) -> list[Path]:
    """Write the plots of :func:`check_plot_images` into ``directory`` (created when missing).

    Raises OptionError without matplotlib, and OutputError for an existing plot without ``force``.
    """
    images = check_plot_images(report)
    if images is None:
        raise OptionError("Plots need matplotlib, which is not installed", where="option --plot",
                          fix="pip install 'orbify[plot]' (or pip install matplotlib), or leave out --plot")
    folder = Path(directory)
    folder.mkdir(parents=True, exist_ok=True)
    return [atomic_write(folder / name, lambda stream, png=png: stream.write(png), force=force)
            for name, png in images.items()]


def check_plot_images(report: CheckReport) -> dict[str, bytes] | None:
    """The check's plots as PNG bytes by file name (a name of ``PLOT_FILES``); None without matplotlib.

    ``layer_errors.png``: equivariance error and weight residual per layer on a log scale.
    ``first_layer_filters.png`` (when the report has the filters): the original filters of the first
    converted conv beside its tied orbits (one row per orbit, one column per group element).
    """
    try:
        import matplotlib
    except ImportError:
        return None
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    figures = [("layer_errors.png", _layer_error_figure(plt, report))]
    if report.first_layer is not None:
        figures.append(("first_layer_filters.png", _filter_figure(plt, report)))
    images = {}
    for name, figure in figures:
        buffer = io.BytesIO()
        figure.savefig(buffer, format="png", dpi=120, bbox_inches="tight")
        plt.close(figure)
        images[name] = buffer.getvalue()
    return images


def _layer_error_figure(plt, report: CheckReport):
    names = [layer.name for layer in report.layers]
    floor = 1e-17   # exact zeros drawn at the floor of the log scale
    figure, axes = plt.subplots(figsize=(max(6.0, 0.22 * len(names) + 2), 4))
    positions = range(len(names))
    axes.plot(positions, [max(layer.equivariance_error, floor) for layer in report.layers], "o-",
              label=f"equivariance error ({report.precision})")
    residuals = [(i, layer.weight_residual) for i, layer in enumerate(report.layers) if layer.weight_residual is not None]
    if residuals:
        axes.plot([i for i, _ in residuals], [max(r, floor) for _, r in residuals], "s", label="weight residual")
    axes.set_yscale("log")
    axes.set_xticks(list(positions))
    axes.set_xticklabels(names, rotation=90, fontsize=7)
    axes.set_ylabel("relative error")
    axes.set_title(f"{report.group}, budget {report.budget}: per-layer exactness")
    axes.legend()
    return figure


def _filter_figure(plt, report: CheckReport):
    filters = report.first_layer
    order = filters.after.shape[1]
    rows = min(8, filters.after.shape[0])
    figure, axes = plt.subplots(rows, 2 * order + 1, figsize=(1.0 * (2 * order + 1), 1.0 * rows + 0.6),
                                squeeze=False)
    for r in range(rows):
        for s in range(order):
            index = r * order + s
            if index < filters.before.shape[0]:
                axes[r, s].imshow(_filter_image(filters.before[index]), cmap="gray")
            axes[r, order + 1 + s].imshow(_filter_image(filters.after[r, s]), cmap="gray")
    for axis in axes.flat:
        axis.set_axis_off()
    axes[0, 0].set_title("before: original filters", loc="left", fontsize=8)
    axes[0, order + 1].set_title("after: tied orbits (row = orbit, column = group element)", loc="left", fontsize=8)
    figure.suptitle(f"first layer '{filters.name}'", fontsize=9)
    return figure


def _filter_image(weight):
    """An (in, kh, kw) filter as an RGB image (3 inputs) or a grey one (their mean), scaled to [0, 1]."""
    image = weight if weight.shape[0] == 3 else weight.mean(0, keepdim=True)
    image = image - image.min()
    image = image / image.max().clamp_min(1e-12)
    return image.permute(1, 2, 0).squeeze(-1).numpy()
