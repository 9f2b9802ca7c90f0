"""A check report as one self-contained HTML file, to hand to a colleague or a reviewer who has no orbify.

The file holds everything it shows: the tables of :func:`orbify.verification.report.check_sections`,
a style sheet inside the page, and the plots of :func:`orbify.verification.report.check_plot_images`
as base64 PNG ``data:`` URIs. It links to no other file, script or style sheet, and runs no script.
Without matplotlib (the ``plot`` extra) the page says that the plots were left out.
"""

from __future__ import annotations

import base64
from html import escape
from pathlib import Path

from orbify.common.safe_io import atomic_write
from orbify.common.version import __version__
from orbify.verification.check import CheckReport
from orbify.verification.report import check_headline, check_plot_images, check_sections, check_title

_STYLE = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 70em; color: #222; }
table { border-collapse: collapse; margin: 0.5em 0 1.5em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: left; vertical-align: top; }
th { background: #f2f2f2; }
tr.worst td { color: #b00; font-weight: bold; }
tr.unsafe td { background: #fff3c4; }
figure { margin: 1em 0; }
img { max-width: 100%; }
.meta { color: #666; font-size: 0.9em; }
"""

_CAPTIONS = {
    "layer_errors.png": "Equivariance error and weight residual per converted layer (log scale).",
    "first_layer_filters.png": "The first converted conv: the original filters (left) and the tied orbits "
                               "(right; one row per orbit, one column per group element).",
}


def check_html(report: CheckReport) -> str:
    """The report as a complete HTML page (tables and embedded plots); see the module docstring."""
    title = escape(check_title(report))
    parts = [
        "<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">', f"<title>{title}</title>",
        f"<style>{_STYLE}</style>", "</head>", "<body>", f"<h1>{title}</h1>",
        f"<p>{escape(check_headline(report))}</p>",
        f'<p class="meta">Written by orbify {escape(__version__)}; {escape(report.inputs)}.</p>',
    ]
    for heading, header, rows in check_sections(report):
        parts += [f"<h2>{escape(heading)}</h2>", _table(report, heading, header, rows)]
    parts += ["<h2>Plots</h2>", *_plots(report), "</body>", "</html>", ""]
    return "\n".join(parts)


def write_check_html(report: CheckReport, path: str | Path, *, force: bool = False) -> Path:
    """Write :func:`check_html` to ``path`` atomically and return the path.

    Raises :class:`~orbify.errors.OutputError` when ``path`` exists and ``force`` is false, or its
    folder is missing or not writable.
    """
    text = check_html(report)
    return atomic_write(path, lambda stream: stream.write(text.encode("utf-8")), force=force)


def _table(report: CheckReport, heading: str, header: tuple[str, ...], rows: list[tuple[str, ...]]) -> str:
    """One section as a table; the worst layer and an unsafe input size are marked by a row class."""
    worst = report.worst_layer
    lines = ["<table>", "<thead><tr>" + "".join(f"<th>{escape(cell)}</th>" for cell in header) + "</tr></thead>",
             "<tbody>"]
    for row in rows:
        marked = ""
        if heading == "Layers" and worst is not None and row[0] == worst.name:
            marked = ' class="worst"'
        if heading == "Input size" and row[0] == "size" and not report.size.safe:
            marked = ' class="unsafe"'
        lines.append(f"<tr{marked}>" + "".join(f"<td>{escape(str(cell))}</td>" for cell in row) + "</tr>")
    lines += ["</tbody>", "</table>"]
    return "\n".join(lines)


def _plots(report: CheckReport) -> list[str]:
    """Each plot as a figure with its PNG inlined, or one paragraph saying that they were left out."""
    images = check_plot_images(report)
    if images is None:
        return ["<p>The plots were left out: matplotlib is not installed where this report was written "
                "(pip install 'orbify[plot]').</p>"]
    figures = []
    for name, png in images.items():
        data = base64.b64encode(png).decode("ascii")
        caption = escape(_CAPTIONS.get(name, name))
        figures.append(f'<figure><img src="data:image/png;base64,{data}" alt="{caption}">'
                       f"<figcaption>{caption}</figcaption></figure>")
    return figures


__all__ = ["check_html", "write_check_html"]
