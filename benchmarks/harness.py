"""Shared measuring harness for the benchmark scripts in this folder.

Every script times its variants *interleaved*: each round runs every variant once (in a rotated
order), so a change of machine load hits all variants alike, and ratios are taken round by round
(the median of the per-round ratios, with their spread). Each timing records wall-clock time and
the process CPU time (all threads); on a shared machine the CPU time is the steadier of the two.

Scripts are run as files (``python benchmarks/inference.py``), which puts this folder on
``sys.path``; they import this module as ``harness``, *before* torch: importing it sets
``OMP_WAIT_POLICY=PASSIVE`` (unless already set) so that idle OpenMP threads sleep instead of
spinning. On a machine shared with other work, spinning threads make two-thread timings several
times slower and fill the CPU time with waiting (measured here: resnet18 at 65 px, batch 1,
2 threads, load 13 on 2 cores: 120 ms CPU per forward spinning, 20 ms passive).
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import datetime  # noqa: E402  (after the OpenMP setting, which must precede loading torch)
import platform  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402
from collections.abc import Callable, Sequence  # noqa: E402
from dataclasses import dataclass, field  # noqa: E402

import torch  # noqa: E402
import torchvision  # noqa: E402
from rich import box  # noqa: E402
from rich.console import Console  # noqa: E402
from rich.table import Table  # noqa: E402
from torch import nn  # noqa: E402
from torch.nn.utils import parametrize  # noqa: E402

from orbify import recalibrate_batch_norm

THREADS = 2
"""Intra-op threads every benchmark uses (``torch.set_num_threads``), stated in every header."""

console = Console(width=1000, highlight=False, soft_wrap=True)   # wide: tables print unwrapped
_progress = Console(stderr=True, highlight=False)


def progress(message: str) -> None:
    """A progress line on standard error (the tables go to standard output)."""
    _progress.print(f"[{datetime.datetime.now():%H:%M:%S}] {message}")


def fix_threads(threads: int = THREADS) -> None:
    """Pin torch to ``threads`` intra-op threads (and one inter-op thread) for a comparable run."""
    torch.set_num_threads(threads)
    try:
        torch.set_num_interop_threads(1)
    except RuntimeError:   # already set once in this process
        pass


def environment() -> dict[str, str]:
    """What a reader needs to compare a run: date, machine, core count, load, torch version, threads."""
    load = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    return {
        "date": datetime.datetime.now().strftime("%Y-%m-%d %H:%M"),
        "machine": f"{platform.machine()} {platform.processor() or platform.system()}",
        "cores (nproc)": str(len(os.sched_getaffinity(0))),
        "load average (1, 5, 15 min)": load,
        "torch": torch.__version__,
        "torchvision": torchvision.__version__,
        "torch threads": f"{torch.get_num_threads()} (set explicitly with torch.set_num_threads)",
        "OMP_WAIT_POLICY": os.environ.get("OMP_WAIT_POLICY", "(unset)"),
    }


def print_header(title: str, settings: dict[str, object]) -> None:
    """Print the run's title, environment and settings as a two-column Markdown table."""
    console.print(f"\n## {title}\n")
    table = Table("setting", "value", box=box.MARKDOWN)
    for key, value in {**environment(), **{k: str(v) for k, v in settings.items()}}.items():
        table.add_row(key, value)
    console.print(table)


# -- timing ------------------------------------------------------------------------------------
@dataclass
class Samples:
    """Timings of one variant, one entry per round (seconds)."""

    wall: list[float] = field(default_factory=list)
    cpu: list[float] = field(default_factory=list)


def time_once(fn: Callable[[], object]) -> tuple[float, float]:
    """(wall seconds, process CPU seconds) of one call of ``fn``."""
    wall, cpu = time.perf_counter(), time.process_time()
    fn()
    return time.perf_counter() - wall, time.process_time() - cpu


def interleaved(variants: dict[str, Callable[[], object]], rounds: int, warmup: int = 1,
                calls: int = 1) -> dict[str, Samples]:
    """Time every variant ``rounds`` times after ``warmup`` untimed calls each; one sample per variant per round.

    A sample is the mean over ``calls`` consecutive calls (more than one for short calls, whose
    single timings scatter). The order of the variants is rotated from round to round so that no
    variant always runs first (or always right after a heavy one).
    """
    names = list(variants)
    for _ in range(warmup):
        for name in names:
            variants[name]()
    samples = {name: Samples() for name in names}
    for r in range(rounds):
        for name in names[r % len(names):] + names[:r % len(names)]:
            wall, cpu = time_once(lambda: [variants[name]() for _ in range(calls)])
            samples[name].wall.append(wall / calls)
            samples[name].cpu.append(cpu / calls)
    return samples


@dataclass(frozen=True)
class Spread:
    """Median with the lower and upper quartile of a list of values."""

    median: float
    low: float
    high: float

    @classmethod
    def of(cls, values: Sequence[float]) -> "Spread":
        if len(values) == 1:
            return cls(values[0], values[0], values[0])
        q1, _, q3 = statistics.quantiles(values, n=4, method="inclusive")
        return cls(statistics.median(values), q1, q3)

    def format(self, scale: float = 1.0, digits: int = 2) -> str:
        return f"{self.median * scale:.{digits}f} ({self.low * scale:.{digits}f}–{self.high * scale:.{digits}f})"


def ratios(numerator: Sequence[float], denominator: Sequence[float]) -> Spread:
    """Median and quartiles of the per-round ratios numerator[i] / denominator[i]."""
    return Spread.of([a / b for a, b in zip(numerator, denominator)])


def verdict(value: float, target: float, at_most: bool) -> str:
    """'met' or 'NOT met' for ``value ≤ target`` (``at_most``) or ``value ≥ target``."""
    return "met" if (value <= target if at_most else value >= target) else "NOT met"


def markdown_table(*columns: str) -> Table:
    """A rich table that prints as a Markdown table (pasteable into the README; no '|' inside cells)."""
    return Table(*columns, box=box.MARKDOWN)


# -- models ----------------------------------------------------------------------------------------
def build_plain(name: str, size: int, seed: int = 0) -> nn.Module:
    """A torchvision model with random weights (weights=None), batch-norm statistics set on random images.

    Recalibrating keeps activations at a normal scale: a random-weight backbone with default
    statistics drives them towards zero, and denormal floats would distort CPU timings.
    """
    torch.manual_seed(seed)
    model = getattr(torchvision.models, name)(weights=None)
    generator = torch.Generator().manual_seed(seed)
    recalibrate_batch_norm(model, [torch.randn(4, 3, size, size, generator=generator) for _ in range(2)])
    return model.eval()



def tied_tensors(model: nn.Module) -> list[tuple[nn.Module, torch.Tensor]]:
    """(parametrization, stored base tensor) of every tied tensor in ``model``.

    Calling ``parametrization(base)`` expands the tensor as a forward pass does, bypassing the
    ``parametrize.cached()`` cache.
    """
    return [(tensor_parametrizations[0], tensor_parametrizations.original)
            for module in model.modules() if parametrize.is_parametrized(module)
            for tensor_parametrizations in module.parametrizations.values()]
