"""Calibrated conversion on rotated digits: agreement before tuning, epochs of tuning, and the cost on backbones.

Data: scikit-learn's bundled handwritten digits (``sklearn.datasets.load_digits``, the UCI optical
recognition of handwritten digits set, 8×8 pixels; nothing is downloaded), loaded by
:mod:`orbify.experiments.digits`: padded to 9×9, split 70/30 at random (seed 0), the 9s dropped
(``SIX_NINE_POLICY``). The original is the small plain CNN of that module (three conv-bn-relu
blocks, 32 channels) trained with rotation augmentation by the group (every batch moved by a
random element). Calibration uses the first 512 training images, without labels.

1. **Before tuning.** For each group (c4, d4) and several seeds of the original: top-1 agreement,
   on the test split, of each converted model with the original's logits averaged over the group,
   and its accuracy on the test split moved by every element. Variants: orbit averaging (the
   default conversion, channel matching on); the first calibrated version of docs/design.md §9.6
   (kept channels by importance, images as given, no norm refit); and the calibrated conversion
   with each improvement added — transformed copies, kept channels by reconstruction error,
   refitted batch norms — then without each of them (the ablation of the final choice).
2. **Tuning.** Orbit averaging and calibration as starting points for :func:`orbify.tune`
   (distillation from the probability average over the group, no labels, cosine schedule, the
   tuner's defaults otherwise) at three learning rates: accuracy on every orientation after every
   epoch. The claim: calibrated reaches test-time averaging (TTA) within 0.5 points in no more
   epochs than orbit averaging needs to get within 2 points (each at its best learning rate).
3. **Epoch budgets.** Reading accuracy off one long run flatters nobody: after epoch 6 of a
   15-epoch cosine schedule the learning rate is still high. A practitioner chooses the number of
   epochs and the schedule anneals over it, so this part runs :func:`orbify.tune` once per
   budget E (cosine over E epochs) and learning rate, for every seed of the original, and reports
   the final accuracy on every element minus TTA, averaged over the seeds. The claim, read here:
   the smallest budget at which calibrated ends within 0.5 points of TTA is no larger than the
   smallest at which orbit averaging ends within 2 points (best learning rate at each budget).
4. **Backbones** (``--backbones``): resnet18 and mobilenet_v2 (random weights, batch-norm
   statistics set on random images) calibrated under d4 on 256 random images of 65×65: wall and
   CPU time, peak memory (resident set of a fresh process), agreement, invariance in float64.
   The target: under a minute and within a 2-core, 24 GB machine.

Run: ``python benchmarks/calibrated_digits.py`` (several minutes on two cores), ``--quick`` (smoke
run), ``--backbones`` (adds part 3). Everything is seeded; numbers repeat with the same torch
version and thread count.
"""

from __future__ import annotations

import json  # noqa: E402
import resource  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from dataclasses import dataclass  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Optional  # noqa: E402

import torch  # noqa: E402
import typer  # noqa: E402
from torch import nn  # noqa: E402

import harness  # first: it sets the OpenMP wait policy before torch loads
from orbify import convert, parse_group
from orbify.calibration.calibrate import calibrate_conversion
from orbify.common.safe_io import atomic_write
from orbify.experiments.digits import (
    SIX_NINE_POLICY,
    DigitSplits,
    accuracy_every_element,
    load_digit_splits,
    train_digits_cnn,
)
from orbify.symmetry.groups import Group
from orbify.tuning.loop import tune
from orbify.tuning.teacher import GroupAveraged

CALIBRATION_IMAGES = 512
FIRST_VERSION = dict(selection="importance", transformed_copies=False, refit_norms=False)
IMPROVED = dict(selection="reconstruction", transformed_copies=True, refit_norms=True)
VARIANTS = {
    "orbit average (default conversion)": None,
    "calibrated, first version (design 7b)": FIRST_VERSION,
    "  + transformed copies": dict(FIRST_VERSION, transformed_copies=True),
    "  + kept channels by reconstruction error": dict(FIRST_VERSION, transformed_copies=True,
                                                      selection="reconstruction"),
    "  + refitted batch norms (all improvements)": IMPROVED,
    "all but transformed copies": dict(IMPROVED, transformed_copies=False),
    "all but reconstruction (importance)": dict(IMPROVED, selection="importance"),
    "all but refitted batch norms": dict(IMPROVED, refit_norms=False),
    "calibrated (the defaults)": {},
}


@dataclass(frozen=True)
class Settings:
    seeds: tuple[int, ...]
    original_epochs: int
    tune_epochs: int
    learning_rates: tuple[float, ...]
    budgets: tuple[int, ...]
    budget_learning_rates: tuple[float, ...]


FULL = Settings(seeds=(0, 1, 2), original_epochs=30, tune_epochs=15, learning_rates=(3e-4, 1e-3, 3e-3, 1e-2),
                budgets=(1, 2, 3, 4, 6, 8), budget_learning_rates=(1e-3, 3e-3, 1e-2))
QUICK = Settings(seeds=(0,), original_epochs=4, tune_epochs=2, learning_rates=(3e-3,), budgets=(1,),
                 budget_learning_rates=(3e-3,))
PARTS = ("before", "curves", "budgets")


def logit_average_top(original: nn.Module, group: Group, images: torch.Tensor) -> torch.Tensor:
    with torch.no_grad():
        return torch.stack([original(group.act_grid(g, images)) for g in range(group.order)]).mean(0).argmax(1)


def converted(original: nn.Module, group: Group, splits: DigitSplits, options: dict | None) -> tuple[nn.Module, float]:
    """The converted model (orbit averaging when ``options`` is None, else calibrated) and the seconds it took."""
    started = time.perf_counter()
    model, plan = convert(original, group, example_input=splits.test_images[:1])
    if options is not None:
        calibrate_conversion(model, plan, original, splits.train_images[:CALIBRATION_IMAGES], progress=False,
                             **options)
    return model.eval(), time.perf_counter() - started


def original_for(group: Group, splits: DigitSplits, settings: Settings, seed: int, width: int) -> nn.Module:
    harness.progress(f"{group.name}, seed {seed}: training the original (width {width})")
    return train_digits_cnn(splits, epochs=settings.original_epochs, seed=seed, augment_group=group, width=width)


def probability_tta(original: nn.Module, group: Group, splits: DigitSplits) -> float:
    """Test accuracy on every element of the original averaged over the group (probabilities, the teacher's rule)."""
    return accuracy_every_element(GroupAveraged(original, group, "probability").eval(), group, splits.test_images,
                                  splits.test_labels)


def tune_quietly(model: nn.Module, original: nn.Module, group: Group, splits: DigitSplits, epochs: int, lr: float,
                 on_epoch_end=None) -> None:
    """The tuning every part uses: cosine over ``epochs``, probability-average teacher, no labels, seed 0."""
    tune(model, original, group, splits.train_images, epochs=epochs, lr=lr, schedule="cosine",
         view_combination="probability", seed=0, progress=False, distributed=False, on_epoch_end=on_epoch_end)


def before_tuning(group: Group, splits: DigitSplits, settings: Settings, width: int) -> list[dict]:
    rows = []
    for seed in settings.seeds:
        original = original_for(group, splits, settings, seed, width)
        top = logit_average_top(original, group, splits.test_images)
        tta = accuracy_every_element(GroupAveraged(original, group, "logit").eval(), group, splits.test_images,
                                     splits.test_labels)
        for name, options in VARIANTS.items():
            model, seconds = converted(original, group, splits, options)
            with torch.no_grad():
                agreement = float((model(splits.test_images).argmax(1) == top).float().mean())
            accuracy = accuracy_every_element(model, group, splits.test_images, splits.test_labels)
            rows.append(dict(group=group.name, seed=seed, variant=name, agreement=agreement, accuracy=accuracy,
                             tta=tta, seconds=seconds))
    return rows


def print_before(rows: list[dict]) -> None:
    for group in dict.fromkeys(row["group"] for row in rows):
        mine = [row for row in rows if row["group"] == group]
        seeds = sorted({row["seed"] for row in mine})
        table = harness.markdown_table("variant", "agreement (mean)", *[f"seed {s}" for s in seeds],
                                       "accuracy, every element (mean)", "seconds (mean)")
        for variant in VARIANTS:
            cells = [row for row in mine if row["variant"] == variant]
            table.add_row(variant, f"{_mean(cells, 'agreement'):.3f}", *[f"{c['agreement']:.3f}" for c in cells],
                          f"{_mean(cells, 'accuracy'):.3f}", f"{_mean(cells, 'seconds'):.2f}")
        harness.console.print(f"\n### {group}: before tuning — top-1 agreement with the original's logits averaged "
                              f"over the group (test split; TTA accuracy {_mean(mine, 'tta'):.3f})\n")
        harness.console.print(table)
        default = [row for row in mine if row["variant"] == "calibrated (the defaults)"]
        harness.console.print(f"- calibrated agreement ≥ 0.5 on every seed: "
                              f"{harness.verdict(min(r['agreement'] for r in default), 0.5, at_most=False)}")


def tuning_curves(group: Group, splits: DigitSplits, settings: Settings, width: int) -> tuple[dict, float]:
    """Accuracy on every element after each epoch, per (start, learning rate); and the TTA accuracy."""
    original = original_for(group, splits, settings, settings.seeds[0], width)
    tta = probability_tta(original, group, splits)
    curves = {}
    for start, options in (("orbit average", None), ("calibrated", {})):
        for lr in settings.learning_rates:
            harness.progress(f"{group.name}: tuning from {start} at lr {lr:g}")
            model, _ = converted(original, group, splits, options)
            accuracies = [accuracy_every_element(model, group, splits.test_images, splits.test_labels)]

            def evaluate(_record, model=model, accuracies=accuracies):
                model.eval()
                accuracies.append(accuracy_every_element(model, group, splits.test_images, splits.test_labels))

            tune_quietly(model, original, group, splits, settings.tune_epochs, lr, on_epoch_end=evaluate)
            curves[(start, lr)] = accuracies
    return curves, tta


def first_epoch(accuracies: list[float], threshold: float) -> int | None:
    return next((epoch for epoch, value in enumerate(accuracies) if value >= threshold), None)


def print_tuning(group: str, curves: dict, tta: float) -> dict:
    epochs = len(next(iter(curves.values())))
    table = harness.markdown_table("start", "lr", *[str(e) for e in range(epochs)], "epochs to TTA − 2 pt",
                                   "epochs to TTA − 0.5 pt")
    for (start, lr), accuracies in curves.items():
        reach = [first_epoch(accuracies, tta - gap) for gap in (0.02, 0.005)]
        table.add_row(start, f"{lr:g}", *[f"{a:.3f}" for a in accuracies],
                      *["never" if r is None else str(r) for r in reach])
    harness.console.print(f"\n### {group}: accuracy on every element after each epoch of tuning "
                          f"(TTA, probability average: {tta:.3f})\n")
    harness.console.print(table)
    best = {start: min((first_epoch(a, tta - gap) for (s, _), a in curves.items() if s == start
                        and first_epoch(a, tta - gap) is not None), default=None)
            for start, gap in (("orbit average", 0.02), ("calibrated", 0.005))}
    averaged, calibrated = best["orbit average"], best["calibrated"]
    met = calibrated is not None and (averaged is None or calibrated <= averaged)
    harness.console.print(f"- calibrated within 0.5 pt of TTA after {calibrated} epochs; orbit averaging within "
                          f"2 pt after {averaged} epochs (best learning rate each): {'met' if met else 'NOT met'}")
    return dict(group=group, tta=tta, calibrated_epochs=calibrated, orbit_average_epochs=averaged, met=met,
                curves={f"{start} lr {lr:g}": a for (start, lr), a in curves.items()})


def epoch_budgets(group: Group, splits: DigitSplits, settings: Settings, width: int) -> dict:
    """Final accuracy on every element minus TTA (points), per (start, budget, lr), one value per seed.

    Budget 0 is the converted model before tuning (one value per seed, learning rate 0)."""
    gaps: dict[tuple[str, int, float], list[float]] = {}
    runs = [(0, 0.0)] + [(e, lr) for e in settings.budgets for lr in settings.budget_learning_rates]
    for seed in settings.seeds:
        original = original_for(group, splits, settings, seed, width)
        tta = probability_tta(original, group, splits)
        for start, options in (("orbit average", None), ("calibrated", {})):
            for epochs, lr in runs:
                harness.progress(f"{group.name}, seed {seed}: {start}, {epochs} epochs at lr {lr:g}")
                model, _ = converted(original, group, splits, options)
                if epochs:
                    tune_quietly(model, original, group, splits, epochs, lr)
                accuracy = accuracy_every_element(model, group, splits.test_images, splits.test_labels)
                gaps.setdefault((start, epochs, lr), []).append(100 * (accuracy - tta))
    return gaps


def print_budgets(group: str, gaps: dict, settings: Settings, width: int) -> dict:
    table = harness.markdown_table("start", "lr", "before tuning", *[f"{e} epochs" for e in settings.budgets])
    for start in ("orbit average", "calibrated"):
        before = _spread(gaps[(start, 0, 0.0)])
        for lr in settings.budget_learning_rates:
            table.add_row(start, f"{lr:g}", before, *[_spread(gaps[(start, e, lr)]) for e in settings.budgets])
    harness.console.print(f"\n### {group}, width {width}: accuracy on every element minus TTA after a tuning run "
                          f"of E epochs (points; mean over seeds {settings.seeds}, the seeds in brackets)\n")
    harness.console.print(table)

    def best(start: str, epochs: int) -> float:
        """The mean gap at the best learning rate for this budget (budget 0: before tuning)."""
        return max(statistics.fmean(gaps[key]) for key in gaps if key[:2] == (start, epochs))

    def smallest(start: str, gap: float) -> int | None:
        return next((e for e in (0,) + settings.budgets if best(start, e) >= -gap), None)

    calibrated, averaged = smallest("calibrated", 0.5), smallest("orbit average", 2.0)
    met = calibrated is not None and (averaged is None or calibrated <= averaged)
    harness.console.print(f"- smallest budget: calibrated within 0.5 pt of TTA {calibrated}, orbit averaging within "
                          f"2 pt {averaged}; calibrated within 2 pt {smallest('calibrated', 2.0)}, orbit averaging "
                          f"within 0.5 pt {smallest('orbit average', 0.5)} (mean over seeds, best lr): "
                          f"{'met' if met else 'NOT met'}")
    return dict(group=group, width=width, calibrated_budget=calibrated, orbit_average_budget=averaged, met=met,
                gaps={f"{start} {e} epochs lr {lr:g}": v for (start, e, lr), v in gaps.items()})


def _spread(values: list[float]) -> str:
    mean = f"{statistics.fmean(values):.1f}"
    return mean if len(values) == 1 else f"{mean} ({' '.join(f'{v:.1f}' for v in values)})"


# -- backbones ---------------------------------------------------------------------------------------
def measure_backbone(name: str, images: int, size: int) -> dict:
    """Calibrate one backbone in this process (run in a fresh process for a clean peak memory)."""
    original = harness.build_plain(name, size)
    batch = torch.randn(images, 3, size, size, generator=torch.Generator().manual_seed(1))
    group = parse_group("d4")
    model, plan = convert(original, group, example_input=batch[:1], match=False)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    wall, cpu = time.perf_counter(), time.process_time()
    report = calibrate_conversion(model, plan, original, batch, progress=False)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss   # KiB on Linux
    x = batch[:2].double()
    model = model.double()
    with torch.no_grad():
        y = model(x)
        error = max(float((model(group.act_grid(g, x)) - y).norm() / y.norm()) for g in range(group.order))
    return dict(model=name, images=images, size=size, wall=wall, cpu=cpu, peak_mb=peak / 1024,
                before_mb=before / 1024, agreement=report.agreement, refitted=len(report.layers) - len(report.fallbacks),
                layers=len(report.layers), invariance=error)


def backbones(threads: int, images: int, size: int) -> list[dict]:
    rows = []
    for name in ("resnet18", "mobilenet_v2"):
        harness.progress(f"calibrating {name} in a fresh process")
        done = subprocess.run([sys.executable, __file__, "--measure-backbone", name, "--threads", str(threads),
                               "--images", str(images), "--size", str(size)], capture_output=True, text=True,
                              check=True)
        rows.append(json.loads(done.stdout.strip().splitlines()[-1]))
    table = harness.markdown_table("model", "images", "wall s", "CPU s", "peak memory MB (process)",
                                   "layers refitted", "agreement", "invariance error (float64)", "under a minute")
    for row in rows:
        table.add_row(row["model"], f"{row['images']} × {row['size']}²", f"{row['wall']:.1f}", f"{row['cpu']:.1f}",
                      f"{row['peak_mb']:.0f}", f"{row['refitted']}/{row['layers']}", f"{row['agreement']:.3f}",
                      f"{row['invariance']:.1e}", harness.verdict(row["wall"], 60.0, at_most=True))
    harness.console.print("\n### backbones: calibration cost (d4, channels budget, random weights and images)\n")
    harness.console.print(table)
    return rows


def _mean(rows: list[dict], key: str) -> float:
    return sum(row[key] for row in rows) / len(rows)


def main(
    quick: bool = typer.Option(False, "--quick", help="Smoke run: one seed, 4 training epochs, 2 tuning epochs."),
    groups: str = typer.Option("c4,d4", "--groups", help="Comma-separated groups."),
    width: int = typer.Option(32, "--width", help="Channels of the digits CNN (orbits per layer: width ÷ |G|)."),
    parts: str = typer.Option(",".join(PARTS), "--parts", help=f"Comma-separated parts to run, of {', '.join(PARTS)}."),
    with_backbones: bool = typer.Option(False, "--backbones", help="Also time resnet18 and mobilenet_v2."),
    threads: int = typer.Option(harness.THREADS, "--threads", help="torch intra-op threads."),
    images: int = typer.Option(256, "--images", help="Calibration images for the backbones."),
    size: int = typer.Option(65, "--size", help="Image size for the backbones."),
    only_backbone: Optional[str] = typer.Option(None, "--measure-backbone", hidden=True,
                                                help="Internal: calibrate this backbone and print one JSON line."),
    json_path: Optional[Path] = typer.Option(None, "--json", help="Also write the results as JSON to this file."),
) -> None:
    """Calibrated against orbit-averaged conversion on rotated digits; optionally the cost on two backbones."""
    harness.fix_threads(threads)
    if only_backbone is not None:
        print(json.dumps(measure_backbone(only_backbone, images, size)))
        return
    settings = QUICK if quick else FULL
    harness.print_header("Calibrated conversion: digits before and after tuning", {
        "data": "scikit-learn load_digits, 9×9 (zero-padded), 70/30 split, seed 0",
        "6/9 ambiguity": SIX_NINE_POLICY,
        "original": f"3 conv-bn-relu blocks, width {width}, trained with rotation augmentation by the group, "
                    f"{settings.original_epochs} epochs, seeds {settings.seeds}",
        "conversion": "channels budget; orbit averaging with channel matching, or calibrated on the first "
                      f"{CALIBRATION_IMAGES} training images (no labels)",
        "agreement": "test split: top-1 of the converted model = top-1 of the original's logits averaged over the group",
        "tuning": f"orbify.tuning.loop, {settings.tune_epochs} epochs, cosine, lr {settings.learning_rates}, probability-"
                  "average teacher, no labels, batch-norm recalibration first (the tuner's default), seed 0",
        "epoch budgets": f"one cosine run per budget {settings.budgets} and lr {settings.budget_learning_rates}, "
                         f"every seed of the original",
    })
    chosen = [part.strip() for part in parts.split(",") if part.strip()]
    unknown = sorted(set(chosen) - set(PARTS))
    if unknown:
        raise typer.BadParameter(f"unknown parts {unknown}; choose from {', '.join(PARTS)}", param_hint="--parts")
    splits = load_digit_splits(seed=0)
    results: dict = {"before": [], "tuning": [], "budgets": [], "backbones": []}
    for name in groups.split(","):
        group = parse_group(name.strip())
        if "before" in chosen:
            rows = before_tuning(group, splits, settings, width)
            print_before(rows)
            results["before"] += rows
        if "curves" in chosen:
            curves, tta = tuning_curves(group, splits, settings, width)
            results["tuning"].append(print_tuning(group.name, curves, tta))
        if "budgets" in chosen:
            results["budgets"].append(print_budgets(group.name, epoch_budgets(group, splits, settings, width),
                                                    settings, width))
    if with_backbones:
        results["backbones"] = backbones(threads, images, size)
    if json_path is not None:
        text = json.dumps(results, indent=1)
        atomic_write(json_path, lambda stream: stream.write(text.encode()), force=True)


if __name__ == "__main__":
    typer.run(main)
