"""Tuning on a large dataset: peak memory against the number of tiles, epoch speed against plain fine-tuning, the cache.

Three measurements on generated PNG tiles (a folder written first; smooth random blobs on a
textured background, procedurally drawn):

- **memory**: the peak resident memory of ``orbify tune`` (the command, in a fresh process; the
  proportional set sizes of the main process and its DataLoader workers summed, sampled every
  0.1 s from /proc, so pages the forked workers share are counted once) on ``--tiles`` tiles and
  on a tenth of them;
- **speed**: images per second of one epoch of ``orbify.tune`` with a cached teacher (the cache
  made beforehand), against a plain PyTorch fine-tuning loop of the original (cross-entropy,
  AdamW) reading the same tiles with the same DataLoader settings, measured side by side in one
  process; and the online teacher (augmentation on, |G| forward passes of the original per step),
  with its expected cost;
- **cache**: the teacher pass of a first run, and a second run that reuses the cache.

Full run: ``python benchmarks/streaming.py`` (resnet18, c4, 225 px, batch 64, 2 workers, 20,000 and
2,000 tiles). ``--quick``: a small CNN, 33 px, 300 and 30 tiles.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
import typer
from PIL import Image

import harness  # noqa: I001  (sets OMP_WAIT_POLICY before torch loads)
import orbify
from orbify.data.catalog import open_tiles
from orbify.data.tiles import Preparation
from orbify.tuning.distributed import World
from orbify.tuning.loop import tune
from orbify.tuning.samples import BatchPlan, batch_loader

CLASSES = 6
"""The tiles' classes (folders); the torchvision originals keep their 1,000 outputs."""


def write_tiles(folder: Path, count: int, side: int, seed: int = 0) -> Path:
    """``count`` RGB PNG tiles of ``side`` px in six class folders: blobs on a textured background."""
    generator = np.random.default_rng(seed)
    grid = np.mgrid[0:side, 0:side].astype(np.float32) / side
    for index in range(count):
        label = index % CLASSES
        (folder / f"kind{label}").mkdir(parents=True, exist_ok=True)
        centre = generator.uniform(0.2, 0.8, 2)
        radius = 0.08 + 0.03 * label
        blob = np.exp(-((grid[0] - centre[0]) ** 2 + (grid[1] - centre[1]) ** 2) / (2 * radius ** 2))
        base = generator.uniform(0, 0.3, (side, side, 3)) + blob[..., None] * generator.uniform(0.4, 0.7, 3)
        Image.fromarray((np.clip(base, 0, 1) * 255).astype(np.uint8)).save(folder / f"kind{label}" / f"{index:06d}.png")
    return folder


def original_model(name: str, side: int) -> torch.nn.Module:
    if name == "small":
        torch.manual_seed(0)
        return torch.nn.Sequential(
            torch.nn.Conv2d(3, 16, 3, padding=1), torch.nn.BatchNorm2d(16), torch.nn.ReLU(),
            torch.nn.Conv2d(16, 16, 3, stride=2, padding=1), torch.nn.BatchNorm2d(16), torch.nn.ReLU(),
            torch.nn.AdaptiveAvgPool2d(1), torch.nn.Flatten(), torch.nn.Linear(16, CLASSES)).eval()
    return harness.build_plain(name, side)


# -- memory ----------------------------------------------------------------------------------------
def tree_memory(pid: int) -> int:
    """Proportional resident bytes (PSS) of a process and all its descendants (Linux /proc).

    PSS divides each shared page among the processes sharing it, so DataLoader workers forked from
    the main process do not count the pages they share with it (and each other) several times, as a
    sum of RSS would.
    """
    total, stack = 0, [pid]
    while stack:
        current = stack.pop()
        try:
            rollup = Path(f"/proc/{current}/smaps_rollup").read_text()
            total += int(next(line.split()[1] for line in rollup.splitlines() if line.startswith("Pss:"))) * 1024
            for task in Path(f"/proc/{current}/task").iterdir():
                stack += [int(child) for child in (task / "children").read_text().split()]
        except (OSError, StopIteration, ValueError):
            continue
    return total


def peak_memory_of(command: list[str]) -> tuple[float, float]:
    """Run ``command``; return (peak summed PSS in GB, wall seconds)."""
    started = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    peak = [0]

    def sample():
        while process.poll() is None:
            peak[0] = max(peak[0], tree_memory(process.pid))
            time.sleep(0.1)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    output, _ = process.communicate()
    sampler.join()
    if process.returncode != 0:
        raise SystemExit(f"{' '.join(command)} failed:\n{output[-3000:]}")
    return peak[0] / 1e9, time.perf_counter() - started


def measure_memory(args, root: Path, model_file: Path, weights: Path) -> list[tuple[int, float, float]]:
    rows = []
    for count in (args.tiles // 10, args.tiles):
        folder = write_tiles(root / f"tiles-{count}", count, args.size)
        harness.progress(f"memory: orbify tune on {count} tiles")
        command = [sys.executable, "-m", "orbify.cli", "tune", str(model_file), "--weights", str(weights),
                   "--data", str(folder), "--epochs", "1", "--batch-size", str(args.batch), "--workers",
                   str(args.workers), "--val-limit", "64", "-o", str(root / f"tuned-{count}.orb")]
        peak, seconds = peak_memory_of(command)
        rows.append((count, peak, seconds))
    return rows


# -- speed -----------------------------------------------------------------------------------------
def plain_epoch(model: torch.nn.Module, tiles, ids: torch.Tensor, args) -> float:
    """Images per second of a plain fine-tuning epoch (cross-entropy, AdamW) over ``ids``."""
    model.train()
    optimiser = torch.optim.AdamW(model.parameters(), lr=1e-4)
    loader = batch_loader(tiles, BatchPlan(ids, World(0, 1, torch.device("cpu")), args.batch, shuffle=True, seed=0),
                          args.workers, seed=0)
    started, seen = time.perf_counter(), 0
    for batch in loader:
        loss = F.cross_entropy(model(batch.images), batch.labels)
        optimiser.zero_grad(set_to_none=True)
        loss.backward()
        optimiser.step()
        seen += len(batch)
    return seen / (time.perf_counter() - started)


def orbify_epoch(original, student, tiles, args, cache: Path, **options) -> tuple[float, object]:
    """Images per second of one tuning epoch (training steps and the small evaluation), and the result."""
    result = tune(student, original, "c4", tiles, epochs=1, batch_size=args.batch, workers=args.workers,
                  teacher_cache=cache, progress=False, device="cpu", val_limit=64, recalibrate=False,
                  holdout_fraction=0.02, **options)
    record = result.history[-1]
    return record.images / record.seconds, result


@dataclass
class Settings:
    model: str
    size: int
    tiles: int
    speed_tiles: int
    batch: int
    workers: int


def main(
    quick: bool = typer.Option(False, "--quick", help="Smoke run: a small CNN, 33 px, 300 and 30 tiles, batch 32."),
    model: str = typer.Option("resnet18", "--model", help="The torchvision original."),
    size: int = typer.Option(225, "--size", help="Tile side in pixels."),
    tiles: int = typer.Option(20_000, "--tiles", help="Tiles of the larger memory run (the smaller has a tenth)."),
    speed_tiles: int = typer.Option(2_048, "--speed-tiles", help="Tiles of the speed and cache runs."),
    batch: int = typer.Option(64, "--batch", help="Images per step."),
    workers: int = typer.Option(2, "--workers", help="DataLoader worker processes."),
    parts: str = typer.Option("memory,speed,cache", "--parts", help="Which measurements, comma-separated."),
) -> None:
    """Measure peak memory, epoch speed and the teacher cache of tuning on streamed tiles; print the tables."""
    args = Settings("small", 33, 300, 256, 32, workers) if quick else Settings(model, size, tiles, speed_tiles, batch,
                                                                               workers)
    parts = parts.split(",")
    harness.fix_threads()
    harness.print_header("Tuning on a large dataset", {"model": args.model, "group": "c4", "tile side": args.size,
                                                       "batch": args.batch, "DataLoader workers": args.workers,
                                                       "tiles (memory)": f"{args.tiles // 10:,} and {args.tiles:,}",
                                                       "tiles (speed, cache)": f"{args.speed_tiles:,}"})
    with tempfile.TemporaryDirectory(prefix="orbify-streaming-") as temporary:
        root = Path(temporary)
        original = original_model(args.model, args.size)
        if "memory" in parts and args.model != "small":
            weights = root / "original.pt"
            torch.save(original.state_dict(), weights)
            student, plan = orbify.convert(original, "c4", example_input=torch.zeros(1, 3, args.size, args.size))
            model_file = orbify.save(student, plan, root / "converted.orb", reference=f"torchvision:{args.model}")
            report_memory(measure_memory(args, root, model_file, weights))
        if "speed" in parts or "cache" in parts:
            folder = write_tiles(root / "speed", args.speed_tiles, args.size, seed=1)
            tiles = open_tiles(folder, preparation=Preparation(3, args.size))
            report_speed_and_cache(args, original, tiles, root, parts)


def report_memory(rows: list[tuple[int, float, float]]) -> None:
    table = harness.markdown_table("tiles", "peak memory, process and workers (PSS, GB)", "wall (s)")
    for count, peak, seconds in rows:
        table.add_row(f"{count:,}", f"{peak:.2f}", f"{seconds:.0f}")
    harness.console.print("\n### Peak memory of `orbify tune`\n")
    harness.console.print(table)
    growth = rows[-1][1] - rows[0][1]
    harness.console.print(f"\ngrowth from {rows[0][0]:,} to {rows[-1][0]:,} tiles: {growth:+.2f} GB "
                          f"(target ≤ 0.5 GB: {harness.verdict(growth, 0.5, True)}; "
                          f"under 3 GB in all: {harness.verdict(rows[-1][1], 3.0, True)})")


def report_speed_and_cache(args, original, tiles, root: Path, parts: list[str]) -> None:
    fresh = lambda: orbify.convert(original, "c4", example_input=torch.zeros(1, 3, args.size, args.size))[0]  # noqa: E731
    cache = root / "teacher-cache"
    harness.progress("cache: first run (teacher pass)")
    first_rate, first = orbify_epoch(original, fresh(), tiles, args, cache)
    harness.progress("cache: second run")
    second_rate, second = orbify_epoch(original, fresh(), tiles, args, cache)
    if "cache" in parts:
        table = harness.markdown_table("run", "teacher pass (s)", "cache")
        table.add_row("first", f"{first.teacher_seconds:.1f}", "computed and written")
        table.add_row("second", "0 (skipped)", f"reused: {second.teacher_reused}; saved {second.teacher_seconds:.1f} s")
        harness.console.print("\n### The teacher cache\n")
        harness.console.print(table)
    if "speed" not in parts:
        return
    ids = torch.arange(len(tiles))
    harness.progress("speed: plain fine-tuning epoch")
    plain_rate = plain_epoch(original_model(args.model, args.size), tiles, ids, args)
    harness.progress("speed: online teacher epoch")
    online_rate, _ = orbify_epoch(original, fresh(), tiles, args, cache, augment="light", teacher="online")
    table = harness.markdown_table("epoch", "images/s", "÷ plain fine-tuning")
    table.add_row("plain PyTorch fine-tuning of the original", f"{plain_rate:.1f}", "1.00")
    table.add_row("orbify tune, cached teacher (cache reused)", f"{second_rate:.1f}", f"{second_rate / plain_rate:.2f}")
    table.add_row("orbify tune, online teacher, light augmentation", f"{online_rate:.1f}",
                  f"{online_rate / plain_rate:.2f}")
    harness.console.print("\n### Epoch speed\n")
    harness.console.print(table)
    harness.console.print(f"\ncached ÷ plain: {second_rate / plain_rate:.2f} (target ≥ 0.8: "
                          f"{harness.verdict(second_rate / plain_rate, 0.8, False)}); online costs "
                          f"{second_rate / online_rate:.2f}× the cached epoch, against about 1 + |G|/3 = 2.33 expected "
                          "(|G| = 4 teacher forward passes per step, a forward being about a third of forward + "
                          "backward; common practice)")


if __name__ == "__main__":
    typer.run(main)
