"""What both bundled demos share: their output folder, the step log, timing, plots as PNG files.

:mod:`orbify.example.demo` (the tile classifier) and :mod:`orbify.example.segment_demo` (the scene
segmenter) run the same job on different models; the parts here behave the same for both.
"""

from __future__ import annotations

import io
import math
import time
from collections.abc import Iterable
from contextlib import contextmanager
from pathlib import Path

import torch
from rich.console import Console
from torch import nn

from orbify.common.safe_io import atomic_write
from orbify.errors import OutputError

TIMING_REPEATS = 5
"""Timed forward passes per model; the best is kept."""


def prepare_folder(folder: Path, names: Iterable[str], force: bool) -> None:
    """Create ``folder``; refuse when it is a file or, without ``force``, when one of the demo's files (``names``,
    relative to the folder) exists in it."""
    if folder.exists() and not folder.is_dir():
        raise OutputError(f"The demo folder {str(folder)!r} is a file", fix="give a folder path with --out")
    existing = [folder / name for name in names if (folder / name).exists()]
    if existing and not force:
        raise OutputError(f"The demo folder {str(folder)!r} already holds demo files ({existing[0].name}, ...)",
                          fix="choose another folder with --out, or pass --force to replace them")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise OutputError(f"Cannot create the demo folder {str(folder)!r}: {error.strerror or error}",
                          fix="choose a folder you can write to with --out") from error


def milliseconds_per_image(model: nn.Module, images: torch.Tensor) -> float:
    """Best of :data:`TIMING_REPEATS` timed forward passes over ``images``, per image, after one warm-up."""
    model(images)
    best = math.inf
    for _ in range(TIMING_REPEATS):
        begin = time.perf_counter()
        model(images)
        best = min(best, time.perf_counter() - begin)
    return 1000 * best / len(images)


def percent(value: float) -> str:
    """``0.1234`` as ``"12.3 %"``."""
    return f"{100 * value:.1f} %"


def figure_png(plt, figure) -> bytes:
    """``figure`` as the demo writes its plots (PNG, 120 dpi, tight bounding box); the figure is closed."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=120, bbox_inches="tight")
    plt.close(figure)
    return buffer.getvalue()


def write_figure(plt, figure, path: Path, force: bool) -> None:
    """Write ``figure`` to ``path`` as :func:`figure_png` makes it, atomically (refused if it exists, unless
    ``force``)."""
    png = figure_png(plt, figure)
    atomic_write(path, lambda stream: stream.write(png), force=force)


def pyplot():
    """matplotlib's pyplot on the file-only Agg backend, or None when matplotlib is not installed."""
    try:
        import matplotlib
    except ImportError:
        return None
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


PLOTS_SKIPPED = "plots skipped: matplotlib is not installed (pip install 'orbify[plot]')"


class DemoLog:
    """Prints one line per step with its duration when enabled; silent otherwise."""

    def __init__(self, enabled: bool):
        self.enabled = enabled
        self.console = Console(stderr=False)

    def say(self, text: str) -> None:
        if self.enabled:
            self.console.print(text, highlight=False)

    @contextmanager
    def step(self, text: str):
        begin = time.perf_counter()
        yield
        self.say(f"[green]✓[/] {text} ({time.perf_counter() - begin:.1f} s)")
