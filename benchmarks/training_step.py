"""Training-step cost of a converted model beside the original, and what share the weight expansion takes.

For each model, one interleaved run times a full step (forward, cross-entropy loss, backward,
SGD-with-momentum step) on the CPU, in training mode (batch norms update their statistics), for:

* the original plain model;
* the converted model (``channels`` budget) under each group, tied: every forward expands the
  base weights (one gather per tied tensor) and the backward pass scatters their gradients back;
* the same converted model baked (:func:`orbify.bake_model`) and trained as a plain model: the
  expanded weights become free parameters, so this is the converted architecture's own cost
  with no expansion (the floor that tying can approach);
* the expansion alone: forward and backward of every tied tensor of the converted model, with the
  gradient a step would receive.

Target: converted (tied) / original ≤ 1.2. The expansion's share of the tied step says what bounds it.
``--profile`` adds, per model and group, the operators that take the most CPU time in one tied step
(torch.profiler), beside the same operators in one original step.

Run: ``python benchmarks/training_step.py`` (full, several minutes) or ``--quick`` (smoke run, under a minute).
"""

from __future__ import annotations

from collections.abc import Callable  # noqa: E402

import torch  # noqa: E402
import typer  # noqa: E402
from torch import nn  # noqa: E402
from torch.profiler import ProfilerActivity, profile  # noqa: E402

import harness  # first: it sets the OpenMP wait policy before torch loads
from orbify import bake_model, convert

TIED_MAX = 1.2   # converted (tied) step / original step


def step_of(model: nn.Module, x: torch.Tensor, labels: torch.Tensor) -> Callable[[], None]:
    """One training step of ``model`` on a fixed batch: forward, loss, backward, SGD with momentum."""
    model.train()
    optimiser = torch.optim.SGD(model.parameters(), lr=1e-3, momentum=0.9)

    def step() -> None:
        loss = nn.functional.cross_entropy(model(x), labels)
        optimiser.zero_grad(set_to_none=True)
        loss.backward()
        optimiser.step()

    return step


def expansion_of(model: nn.Module) -> Callable[[], None]:
    """Forward and backward of every tied tensor of ``model`` alone, with a fixed random output gradient."""
    pairs = harness.tied_tensors(model)
    with torch.no_grad():
        gradients = [torch.randn_like(parametrization(base)) for parametrization, base in pairs]

    def expand() -> None:
        for _, base in pairs:
            base.grad = None
        expanded = [parametrization(base) for parametrization, base in pairs]
        torch.autograd.backward(expanded, gradients)

    return expand


def top_operators(step: Callable[[], None], count: int) -> list[tuple[str, float]]:
    """The ``count`` operators with the most self CPU time in one call of ``step`` (name, ms)."""
    step()
    with profile(activities=[ProfilerActivity.CPU]) as profiler:
        step()
    averages = sorted(profiler.key_averages(), key=lambda e: e.self_cpu_time_total, reverse=True)
    return [(e.key, e.self_cpu_time_total / 1e3) for e in averages[:count]]


def main(
    quick: bool = typer.Option(False, "--quick", help="Smoke run: resnet18 under d4 only, 65 px, batch 4, 3 rounds."),
    rounds: int = typer.Option(0, "--rounds", help="Timed rounds (0: 5, or 3 with --quick)."),
    size: int = typer.Option(0, "--size", help="Input size (0: 225, or 65 with --quick); must be safe."),
    profile_steps: bool = typer.Option(False, "--profile", help="Also list the top operators of one step."),
    models: str = typer.Option("", "--models", help="Comma-separated torchvision names instead of the default ones."),
) -> None:
    """Time training steps of original, converted (tied and baked) models and the expansion alone; print tables."""
    harness.fix_threads()
    names = models.split(",") if models else ["resnet18"] if quick else ["resnet18", "mobilenet_v2"]
    size = size or (65 if quick else 225)
    batch = 4 if quick else 16
    groups = ["d4"] if quick else ["c4", "d4"]
    rounds = rounds or (3 if quick else 5)
    harness.print_header("Training step (forward + backward + SGD step, CPU)", {
        "models": ", ".join(f"torchvision {n} (weights=None)" for n in names),
        "input size": f"{size}×{size}", "batch": batch, "groups": ", ".join(groups), "budget": "channels",
        "optimiser": "SGD, lr 1e-3, momentum 0.9; cross-entropy on fixed random labels",
        "rounds": f"{rounds} timed, 1 warm-up (variants interleaved per round)",
        "times": "median (lower quartile–upper quartile), ms per step",
        "ratios": "median (quartiles) of per-round ratios",
    })
    times = harness.markdown_table("model", "variant", "wall ms", "CPU ms")
    ratio_tables = {clock: harness.markdown_table(
        "model", "group", f"tied ÷ original (≤ {TIED_MAX})", "baked ÷ original", "expansion ÷ tied step")
        for clock in ("wall", "cpu")}
    profiles: list[tuple[str, list[tuple[str, float]]]] = []
    generator = torch.Generator().manual_seed(0)
    x = torch.randn(batch, 3, size, size, generator=generator)
    labels = torch.randint(0, 1000, (batch,), generator=generator)
    for name in names:
        harness.progress(f"{name}: building and converting")
        plain = harness.build_plain(name, size)
        # matching chooses which channels share an orbit; it does not change the structure timed here
        converted_models = {group: convert(plain, group, "channels", "invariant", x[:1], match=False)[0]
                            for group in groups}
        steps = {"original": step_of(plain, x, labels)}
        for group, converted in converted_models.items():
            steps[f"{group} tied"] = step_of(converted, x, labels)
            steps[f"{group} baked"] = step_of(bake_model(converted), x, labels)
            steps[f"{group} expansion alone (forward + backward)"] = expansion_of(converted)
            if profile_steps:
                profiles.append((f"{name}, {group} tied", top_operators(steps[f"{group} tied"], 12)))
        if profile_steps:
            profiles.append((f"{name}, original", top_operators(steps["original"], 12)))
        harness.progress(f"{name}: timing {len(steps)} variants")
        samples = harness.interleaved(steps, rounds)
        for label, s in samples.items():
            times.add_row(name, label, harness.Spread.of(s.wall).format(1e3, 0), harness.Spread.of(s.cpu).format(1e3, 0))
        for clock, table in ratio_tables.items():
            for group in groups:
                def values(label: str) -> list[float]:
                    return getattr(samples[label], clock)
                tied = harness.ratios(values(f"{group} tied"), values("original"))
                baked = harness.ratios(values(f"{group} baked"), values("original"))
                share = harness.ratios(values(f"{group} expansion alone (forward + backward)"), values(f"{group} tied"))
                table.add_row(name, group, f"{tied.format()} {harness.verdict(tied.median, TIED_MAX, True)}",
                              baked.format(), share.format())
    harness.console.print("\n### Times\n")
    harness.console.print(times)
    for clock, title in (("wall", "wall-clock time"), ("cpu", "process CPU time (steadier on a shared machine)")):
        harness.console.print(f"\n### Ratios of {title}\n")
        harness.console.print(ratio_tables[clock])
    for title, operators in profiles:
        harness.console.print(f"\n### Top operators by self CPU time, one step: {title}\n")
        table = harness.markdown_table("operator", "self CPU ms")
        for key, ms in operators:
            table.add_row(key, f"{ms:.1f}")
        harness.console.print(table)


if __name__ == "__main__":
    typer.run(main)
