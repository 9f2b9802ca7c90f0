"""Conversion time and peak memory: ``orbify.convert`` on large backbones, each run in a fresh process.

Every measurement starts a new Python process (this file with ``--child``), which imports torch and
orbify, builds the plain model (torchvision, weights=None) and an example input, reads its peak
resident memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss``), converts once and reads the peak
again. The table gives the wall and CPU time of ``convert`` alone, the process's peak resident memory and
the part of it reached during conversion (peak after − peak before). Rows with matching off show
what channel matching adds.

Targets (with matching on): under 10 s and under 2 GB peak on 2 cores.

Run: ``python benchmarks/conversion.py`` (full, a few minutes) or ``--quick`` (smoke run, under a minute).
"""

from __future__ import annotations

import json  # noqa: E402
import resource  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import torch  # noqa: E402
import torchvision  # noqa: E402
import typer  # noqa: E402

import harness  # first: it sets the OpenMP wait policy before torch loads

SECONDS_MAX = 10.0
PEAK_MB_MAX = 2048.0


def peak_mb() -> float:
    """Peak resident memory of this process so far, MiB (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def measure_in_this_process(name: str, group: str, size: int, match: bool) -> dict[str, float]:
    """Convert torchvision ``name`` once here and return seconds and memory figures."""
    from orbify import convert

    harness.fix_threads()
    model = getattr(torchvision.models, name)(weights=None).eval()
    example = torch.randn(1, 3, size, size)
    before = peak_mb()
    start, start_cpu = time.perf_counter(), time.process_time()
    convert(model, group, "channels", "invariant", example, match=match)
    seconds, cpu_seconds = time.perf_counter() - start, time.process_time() - start_cpu
    after = peak_mb()
    return {"seconds": seconds, "cpu_seconds": cpu_seconds, "peak_mb": after, "before_mb": before,
            "conversion_mb": after - before}


def measure_in_fresh_process(name: str, group: str, size: int, match: bool) -> dict[str, float]:
    """Run :func:`measure_in_this_process` in a new interpreter (so peak memory is this conversion's own)."""
    command = [sys.executable, __file__, "--child", f"{name},{group},{size},{int(match)}"]
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    if done.returncode:
        raise SystemExit(f"measuring {name} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def torch_import_peak_mb() -> float:
    """Peak resident memory of a fresh interpreter that only imports torch, MiB (the floor of every row)."""
    command = [sys.executable, "-c", "import resource, torch; "
               "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)"]
    return float(subprocess.run(command, capture_output=True, text=True, check=True).stdout)


def main(
    quick: bool = typer.Option(False, "--quick", help="Smoke run: resnet18 only, one run per setting."),
    runs: int = typer.Option(0, "--runs", help="Fresh-process runs per setting (0: 3, or 1 with --quick)."),
    child: str = typer.Option("", "--child", hidden=True, help="Internal: NAME,GROUP,SIZE,MATCH to measure here."),
) -> None:
    """Measure conversion wall time and peak memory in fresh processes; print the table."""
    if child:
        name, group, size, match = child.split(",")
        print(json.dumps(measure_in_this_process(name, group, int(size), bool(int(match)))))
        return
    harness.fix_threads()
    names = ["resnet18"] if quick else ["resnet50", "densenet121"]
    group, size = "d4", 225
    runs = runs or (1 if quick else 3)
    harness.print_header("Conversion time and peak memory (orbify.convert, CPU, fresh process per run)", {
        "models": ", ".join(f"torchvision {n} (weights=None)" for n in names), "group": group,
        "budget": "channels", "example input": f"1×3×{size}×{size}",
        "runs": f"{runs} per setting, each in a fresh process; median (quartiles)",
        "peak memory": "resource.getrusage ru_maxrss: the whole process (torch, model, conversion) and the rise "
                       "during convert()",
        "peak of a process that only imports torch": f"{torch_import_peak_mb():.0f} MiB",
    })
    table = harness.markdown_table("model", "matching", f"convert() wall s (< {SECONDS_MAX:.0f})", "convert() CPU s",
                                   f"process peak MiB (< {PEAK_MB_MAX:.0f})", "rise during convert() MiB",
                                   "peak before convert() MiB")
    for name in names:
        for match in (True, False):
            harness.progress(f"{name}, matching {'on' if match else 'off'}: {runs} fresh processes")
            results = [measure_in_fresh_process(name, group, size, match) for _ in range(runs)]

            def spread(key: str) -> harness.Spread:
                return harness.Spread.of([r[key] for r in results])

            seconds, peak = spread("seconds"), spread("peak_mb")
            timed = f"{seconds.format()}" + (f" {harness.verdict(seconds.median, SECONDS_MAX, True)}" if match else "")
            peaked = f"{peak.format(digits=0)}" + (f" {harness.verdict(peak.median, PEAK_MB_MAX, True)}" if match else "")
            table.add_row(name, "on" if match else "off", timed, spread("cpu_seconds").format(), peaked, spread("conversion_mb").format(digits=0),
                          spread("before_mb").format(digits=0))
    harness.console.print(table)


if __name__ == "__main__":
    typer.run(main)
