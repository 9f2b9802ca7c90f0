"""Inference cost of a converted model beside the original and the original averaged over the group.

For each model and batch size, in eval mode without gradients on the CPU, one interleaved run times:

* the original plain model;
* the converted model (``channels`` budget) under each group, with the tying cached
  (``torch.nn.utils.parametrize.cached()``, entered once around the whole run) and baked
  (:func:`orbify.bake_model`, plain modules);
* the original with test-time averaging over each group, in two forms: all views of the batch in
  one forward pass (:class:`orbify.tuning.teacher.GroupAveraged`) and one forward pass per view
  (:class:`ViewByView`). Which is faster depends on the batch: a small batch leaves cores idle
  that the stacked views fill, a large stacked batch outgrows the caches. The targets compare with
  the faster form, round by round;
* expanding every tied weight of the converted model once: what each forward would pay on top
  if the tying were not cached.

Targets: converted / original ≤ 1.05; averaging / converted ≥ 0.9·order (order: number of group elements).

Run: ``python benchmarks/inference.py`` (full, a quarter of an hour on 2 idle cores) or ``--quick``
(smoke run, under a minute).
"""

from __future__ import annotations

from collections.abc import Callable  # noqa: E402

import torch  # noqa: E402
import typer  # noqa: E402
from torch import nn  # noqa: E402
from torch.nn.utils import parametrize  # noqa: E402

import harness  # first: it sets the OpenMP wait policy before torch loads
from orbify import bake_model, convert, parse_group
from orbify.graph.sizes import SizeChecker
from orbify.symmetry.groups import Group
from orbify.tuning.teacher import GroupAveraged, combine_views

CONVERTED_MAX = 1.05        # converted / original
AVERAGING_MIN_SHARE = 0.9   # averaging / converted ≥ this · order
CALLS_AT_BATCH_1 = 5        # calls per timing sample at batch 1 (single short calls scatter)


class ViewByView(nn.Module):
    """Test-time averaging of ``model``'s logits over ``group`` with one forward pass per view."""

    def __init__(self, model: nn.Module, group: Group):
        super().__init__()
        self.model = model
        self.group = group

    def forward(self, images: torch.Tensor) -> torch.Tensor:
        views = [self.model(self.group.act_grid(g, images)) for g in range(self.group.order)]
        return combine_views(torch.stack(views), "logit")


def expand_all(model: nn.Module) -> Callable[[], None]:
    """A call that expands every tied tensor of ``model`` from its base once (bypassing any cache)."""
    pairs = harness.tied_tensors(model)

    def expand() -> None:
        for parametrization, base in pairs:
            parametrization(base)

    return expand


def labels(group: str) -> dict[str, str]:
    """Variant labels of one group."""
    return {"cached": f"{group} converted, tying cached", "baked": f"{group} converted, baked",
            "stacked": f"original averaged over {group}, views in one batch",
            "view by view": f"original averaged over {group}, one forward per view",
            "expansion": f"{group} expanding all tied weights once (cost per forward if not cached)"}


def variants_for(plain: nn.Module, size: int, groups: list[str]) -> dict[str, Callable[[torch.Tensor], object]]:
    """Named calls to time on a batch: the original and, per group, the converted and averaged models and the expansion."""
    example = torch.randn(1, 3, size, size)
    calls: dict[str, Callable[[torch.Tensor], object]] = {"original": plain}
    for group in groups:
        # matching chooses which channels share an orbit; it does not change the structure timed here
        converted, _ = convert(plain, group, "channels", "invariant", example, match=False)
        label = labels(group)
        calls[label["cached"]] = converted.eval()
        calls[label["baked"]] = bake_model(converted).eval()
        calls[label["stacked"]] = GroupAveraged(plain, group, views="logit").eval()
        calls[label["view by view"]] = ViewByView(plain, parse_group(group)).eval()
        expand = expand_all(converted)
        calls[label["expansion"]] = lambda _, expand=expand: expand()
    return calls


def main(
    quick: bool = typer.Option(False, "--quick", help="Smoke run: resnet18 under d4 only, 65 px, batches 1 and 4, "
                                                      "3 rounds."),
    rounds: int = typer.Option(0, "--rounds", help="Timed rounds (0: 5, or 3 with --quick)."),
    models: str = typer.Option("", "--models", help="Comma-separated torchvision names instead of the default ones."),
    batch_sizes: str = typer.Option("", "--batches", help="Comma-separated batch sizes instead of the default ones."),
    size_option: int = typer.Option(0, "--size", help="Input side instead of the default (65 with --quick, else 225); "
                                                      "224 for vision transformers (a multiple of the patch)."),
    group_names: str = typer.Option("", "--groups", help="Comma-separated groups instead of the default ones."),
) -> None:
    """Time inference of original, converted (cached and baked) and group-averaged models; print the tables."""
    harness.fix_threads()
    names = models.split(",") if models else ["resnet18"] if quick else ["resnet18", "mobilenet_v2"]
    size = size_option or (65 if quick else 225)
    batches = [int(b) for b in batch_sizes.split(",")] if batch_sizes else [1, 4] if quick else [1, 16]
    groups = group_names.split(",") if group_names else ["d4"] if quick else ["c4", "d4"]
    rounds = rounds or (3 if quick else 5)
    calls_at_1 = 1 if quick else CALLS_AT_BATCH_1
    harness.print_header("Inference (eval mode, no gradients, CPU)", {
        "models": ", ".join(f"torchvision {n} (weights=None, batch-norm statistics from random images)" for n in names),
        "input size": f"{size}×{size} (safe: every strided op exact)", "batches": ", ".join(map(str, batches)),
        "groups": ", ".join(groups), "budget": "channels",
        "rounds": f"{rounds} timed, 1 warm-up; variants interleaved per round; at batch 1 a sample is the mean of "
                  f"{calls_at_1} calls",
        "times": "median (lower quartile–upper quartile), ms per batch",
        "ratios": "median (quartiles) of per-round ratios; averaged: the faster averaging form in that round; "
                  "order: the number of group elements (4 for c4, 8 for d4)",
    })
    times = harness.markdown_table("model", "batch", "variant", "wall ms", "CPU ms")
    ratio_tables = {clock: harness.markdown_table(
        "model", "batch", "group", f"converted cached ÷ original (≤ {CONVERTED_MAX})",
        f"converted baked ÷ original (≤ {CONVERTED_MAX})", "averaged ÷ converted cached (≥ 0.9·order)",
        "averaged ÷ converted baked (≥ 0.9·order)", "averaged ÷ original") for clock in ("wall", "cpu")}
    for name in names:
        harness.progress(f"{name}: building and converting")
        plain = harness.build_plain(name, size)
        if not SizeChecker(plain).is_safe(size):
            raise SystemExit(f"{size} is not a safe size for {name}; pick one from `orbify sizes torchvision:{name}`")
        calls = variants_for(plain, size, groups)
        for batch in batches:
            harness.progress(f"{name}, batch {batch}: timing {len(calls)} variants")
            x = torch.randn(batch, 3, size, size)
            with torch.no_grad(), parametrize.cached():
                samples = harness.interleaved({label: (lambda f=f: f(x)) for label, f in calls.items()}, rounds,
                                              calls=calls_at_1 if batch == 1 else 1)
            for label, s in samples.items():
                times.add_row(name, str(batch), label, harness.Spread.of(s.wall).format(1e3, 1),
                              harness.Spread.of(s.cpu).format(1e3, 1))
            for clock, table in ratio_tables.items():
                for row in ratio_rows(name, batch, groups, samples, clock):
                    table.add_row(*row)
    harness.console.print("\n### Times\n")
    harness.console.print(times)
    for clock, title in (("wall", "wall-clock time"), ("cpu", "process CPU time (steadier on a shared machine)")):
        harness.console.print(f"\n### Ratios of {title}\n")
        harness.console.print(ratio_tables[clock])


def ratio_rows(name: str, batch: int, groups: list[str], samples: dict[str, harness.Samples],
               clock: str) -> list[tuple[str, ...]]:
    """One row per group: the four target ratios on ``clock`` ("wall" or "cpu") with their verdicts, and averaged ÷ original."""
    rows = []
    for group in groups:
        order = parse_group(group).order
        label = labels(group)

        def values(key: str) -> list[float]:
            return getattr(samples[label[key]], clock)

        original = getattr(samples["original"], clock)
        averaged = [min(a, b) for a, b in zip(values("stacked"), values("view by view"))]
        cells = []
        for numerator, denominator, target, at_most in (
                (values("cached"), original, CONVERTED_MAX, True),
                (values("baked"), original, CONVERTED_MAX, True),
                (averaged, values("cached"), AVERAGING_MIN_SHARE * order, False),
                (averaged, values("baked"), AVERAGING_MIN_SHARE * order, False)):
            ratio = harness.ratios(numerator, denominator)
            cells.append(f"{ratio.format()} {harness.verdict(ratio.median, target, at_most)}")
        cells.append(harness.ratios(averaged, original).format())   # the most a converted model at parity can reach
        rows.append((name, str(batch), f"{group} (0.9·order = {AVERAGING_MIN_SHARE * order:.1f})", *cells))
    return rows


if __name__ == "__main__":
    typer.run(main)
