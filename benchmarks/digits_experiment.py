"""Getting the accuracy back on rotated digits: original, test-time averaging, converted, converted and tuned.

Data: scikit-learn's bundled handwritten digits (``sklearn.datasets.load_digits``, the UCI optical
recognition of handwritten digits set, 8×8 pixels; nothing is downloaded), loaded by
:mod:`orbify.experiments.digits`: padded to 9×9, split 70/30 at random (seed 0). The 6/9 ambiguity
(a half turn makes a 6 a 9, and an invariant classifier cannot tell them apart) is handled as
``SIX_NINE_POLICY`` says: the 9s are dropped, 9 classes remain.

The original, a small plain CNN (three conv-bn-relu blocks, 32 channels), is trained on *upright*
digits only. For each group (c4, d4) the test set is moved by every group element and the mean
accuracy over the elements is reported for:

* the original as it is (one forward pass per image);
* the original with test-time averaging (TTA) over the group, each way of combining the |G| views
  (:class:`orbify.tuning.teacher.GroupAveraged`; |G| forward passes per image);
* the converted model (``channels`` budget, same width and about the same MACs) before tuning;
* the converted model tuned by distillation (:func:`orbify.tune`) from the most confident view
  of the original, on the training split's images without labels, then with labels as well;
  and, for comparison, from the probability average (docs/design.md §13: with an upright-only
  original the most confident view is the far better teacher).

Inference cost per image: multiply-accumulates counted by ``torch.utils.flop_counter`` and
wall/CPU time of the whole test set in batches of 64 (eval mode, no gradients; the tuned model baked
to plain modules), interleaved over rounds (``harness.interleaved``). The target: the tuned model at
or above TTA accuracy while costing about 1/|G| of it.

Run: ``python benchmarks/digits_experiment.py`` (a few minutes on two cores) or ``--quick`` (smoke run).
Everything is seeded; accuracies repeat exactly with the same torch version and thread count.
"""

from __future__ import annotations

import json  # noqa: E402
from dataclasses import asdict, dataclass  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Optional  # noqa: E402

import torch  # noqa: E402
import typer  # noqa: E402
from torch import nn  # noqa: E402

import harness  # first: it sets the OpenMP wait policy before torch loads
from orbify import bake_model, convert, parse_group
from orbify.common.safe_io import atomic_write
from orbify.experiments.digits import (
    SIX_NINE_POLICY,
    DigitSplits,
    accuracy,
    load_digit_splits,
    train_digits_cnn,
)
from orbify.symmetry.groups import Group
from orbify.tuning.loop import tune
from orbify.tuning.teacher import VIEW_COMBINATIONS, GroupAveraged
from orbify.verification.measure import count_macs

SEED = 0
WIDTH = 32
TIMING_BATCH = 64
"""Images per call when timing. (One batch of the whole test set, ×|G| views for TTA, leaves the CPU caches:
measured here, TTA then cost up to 14× the original per image instead of 4×.)"""


@dataclass(frozen=True)
class Settings:
    original_epochs: int
    tune_epochs: int
    lr: float
    batch_size: int
    schedule: str
    rounds: int


FULL = Settings(original_epochs=30, tune_epochs=30, lr=1e-2, batch_size=64, schedule="one-cycle", rounds=15)
QUICK = Settings(original_epochs=5, tune_epochs=2, lr=1e-2, batch_size=64, schedule="one-cycle", rounds=3)


@dataclass
class Row:
    """One model in the table: accuracy on every group element (mean and worst), upright, and cost."""

    group: str
    model: str
    forwards: int
    accuracy_every_element: float
    worst_element: float
    upright: float
    macs_per_image: int
    wall_ms_per_image: float = float("nan")
    cpu_ms_per_image: float = float("nan")


def evaluate(name: str, model: nn.Module, group: Group, splits: DigitSplits, forwards: int) -> Row:
    """Accuracy of ``model`` on the test set moved by every element of ``group``, and its MACs per image."""
    per_element = [accuracy(model, group.act_grid(g, splits.test_images), splits.test_labels)
                   for g in range(group.order)]
    macs = count_macs(model, splits.test_images[:1])
    return Row(group.name, name, forwards, sum(per_element) / len(per_element), min(per_element), per_element[0],
               macs)


def tuned_variants(original: nn.Module, group: Group, splits: DigitSplits, settings: Settings
                   ) -> dict[str, nn.Module]:
    """The converted model tuned three ways: most confident view without and with labels, probability average."""
    variants = {}
    for label, views, with_labels in (("most-confident teacher, no labels", "most-confident", False),
                                      ("most-confident teacher + labels", "most-confident", True),
                                      ("probability-average teacher, no labels", "probability", False)):
        student, _ = convert(original, group, example_input=splits.train_images[:1])
        tune(student, original, group, splits.train_images, splits.train_labels if with_labels else None,
             epochs=settings.tune_epochs, lr=settings.lr, batch_size=settings.batch_size, view_combination=views,
             schedule=settings.schedule, seed=SEED, progress=False, distributed=False)
        variants[f"converted, tuned ({label})"] = bake_model(student).eval()
    return variants


def run_group(original: nn.Module, group_name: str, splits: DigitSplits, settings: Settings) -> list[Row]:
    group = parse_group(group_name)
    converted, _ = convert(original, group, example_input=splits.train_images[:1])
    models: dict[str, tuple[nn.Module, int]] = {"original": (original, 1)}
    for views in VIEW_COMBINATIONS:
        models[f"original + TTA ({views})"] = (GroupAveraged(original, group, views).eval(), group.order)
    models["converted, before tuning"] = (bake_model(converted).eval(), 1)
    models.update({name: (model, 1) for name, model in tuned_variants(original, group, splits, settings).items()})
    rows = {name: evaluate(name, model, group, splits, forwards) for name, (model, forwards) in models.items()}
    images = splits.test_images
    chunks = images.split(TIMING_BATCH)
    with torch.no_grad():
        samples = harness.interleaved({name: (lambda m=model: [m(chunk) for chunk in chunks])
                                       for name, (model, _) in models.items()}, settings.rounds)
    for name, row in rows.items():
        row.wall_ms_per_image = harness.Spread.of(samples[name].wall).median * 1e3 / len(images)
        row.cpu_ms_per_image = harness.Spread.of(samples[name].cpu).median * 1e3 / len(images)
    return list(rows.values())


def print_tables(rows: list[Row]) -> None:
    for group in dict.fromkeys(row.group for row in rows):
        mine = [row for row in rows if row.group == group]
        best_tta = max((row for row in mine if "TTA" in row.model), key=lambda row: row.accuracy_every_element)
        table = harness.markdown_table("model", "forwards", "accuracy, every element", "worst element", "upright",
                                       "MACs/image", "wall µs/image", "CPU µs/image", "CPU time ÷ best TTA")
        for row in mine:
            table.add_row(row.model, str(row.forwards), f"{row.accuracy_every_element:.3f}", f"{row.worst_element:.3f}",
                          f"{row.upright:.3f}", f"{row.macs_per_image:,}", f"{row.wall_ms_per_image * 1e3:.1f}",
                          f"{row.cpu_ms_per_image * 1e3:.1f}", f"{row.cpu_ms_per_image / best_tta.cpu_ms_per_image:.2f}")
        harness.console.print(f"\n### {group}: rotated test set ({len(mine)} models)\n")
        harness.console.print(table)
        tuned = [row for row in mine if row.model.startswith("converted, tuned")]
        best_tuned = max(tuned, key=lambda row: row.accuracy_every_element)
        label_free = max((row for row in tuned if "no labels" in row.model), key=lambda row: row.accuracy_every_element)
        for row in [label_free] + ([best_tuned] if best_tuned is not label_free else []):
            harness.console.print(
                f"- {row.model}: {row.accuracy_every_element:.3f} against best TTA ({best_tta.model}) "
                f"{best_tta.accuracy_every_element:.3f}: "
                f"{harness.verdict(row.accuracy_every_element, best_tta.accuracy_every_element, at_most=False)}; "
                f"MACs {row.macs_per_image / best_tta.macs_per_image:.3f} of TTA (1/|G| = "
                f"{1 / best_tta.forwards:.3f}), CPU time {row.cpu_ms_per_image / best_tta.cpu_ms_per_image:.3f} of TTA")


def main(
    quick: bool = typer.Option(False, "--quick", help="Smoke run: 5 training epochs, 2 tuning epochs, 3 rounds."),
    groups: str = typer.Option("c4,d4", "--groups", help="Comma-separated groups."),
    threads: int = typer.Option(1, "--threads", help="torch intra-op threads (1 keeps a shared machine steady)."),
    json_path: Optional[Path] = typer.Option(None, "--json", help="Also write the rows as JSON to this file."),
) -> None:
    """Train the upright-only digits CNN, then compare original, TTA, converted and tuned on rotated digits."""
    harness.fix_threads(threads)
    settings = QUICK if quick else FULL
    harness.print_header("Digits: accuracy on every orientation and inference cost", {
        "data": "scikit-learn load_digits, 9×9 (zero-padded), 70/30 split, seed 0",
        "6/9 ambiguity": SIX_NINE_POLICY,
        "original": f"3 conv-bn-relu blocks, width {WIDTH}, trained on upright digits only, "
                    f"{settings.original_epochs} epochs, seed {SEED}",
        "conversion": "channels budget, orbit-average initialisation with channel matching (the defaults)",
        "tuning": f"{settings.tune_epochs} epochs, AdamW lr {settings.lr}, {settings.schedule} schedule, batch "
                  f"{settings.batch_size}, training split (10% held out), batch-norm recalibration first, seed {SEED}",
        "accuracy": "test split moved by every group element; mean and worst element",
        "cost": f"MACs by torch.utils.flop_counter; time of the test set in batches of {TIMING_BATCH}, median of "
                f"{settings.rounds} interleaved rounds, per image",
    })
    splits = load_digit_splits(seed=SEED)
    original = train_digits_cnn(splits, epochs=settings.original_epochs, seed=SEED, width=WIDTH)
    rows = [row for group in groups.split(",") for row in run_group(original, group.strip(), splits, settings)]
    print_tables(rows)
    if json_path is not None:
        text = json.dumps([asdict(row) for row in rows], indent=1)
        atomic_write(json_path, lambda stream: stream.write(text.encode()), force=True)


if __name__ == "__main__":
    typer.run(main)
