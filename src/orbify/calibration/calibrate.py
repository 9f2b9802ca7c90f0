"""Calibrated conversion: refit a converted model on a few hundred unlabeled images (design.md section 7b).

Orbit averaging uses the weights alone and leaves a converted model near chance until it is
tuned. :func:`calibrate_conversion` is a pass over an already converted model that uses a small
set of the user's images, without labels, to bring it close to the original at once:

1. **Kept channels.** Per channel class (values joined by residual adds and the like share one),
   orbit o of a layer stands for one kept original channel: slot 0 reproduces it, the other slots
   its moved copies. The channels are chosen by the reconstruction error dropping them would
   leave in the next layers, or by importance (:mod:`orbify.calibration.selection`).
2. **Norm layers** copy the statistics and affine parameters of the channels they now carry.
3. **Layer by layer** in graph order, the base weights are refitted by ridge least squares so that
   the converted layer, fed with the *converted* previous layers' output, reproduces the
   original layer's output (before its batch norm) on the kept channels
   (:mod:`orbify.calibration.equations`): with ``transformed_copies`` on the images and their
   moved copies, and layers with plain outputs — the classifier after the orbit pool — against
   the original's output averaged over the group. The constant of the fit goes into the bias,
   or into the running mean of the batch norm that follows; with ``refit_norms`` that batch
   norm's statistics are also set so its output keeps the mean and variance of the original's.
4. **Fallback**: a layer that cannot be refitted (transposed convs, more than
   ``MAX_FEATURES`` inputs per output) gets the orbit average of its original weight under the
   kept channels, and the report says why.

Both models run node by node over the batches (:mod:`orbify.calibration.paired`): every node runs
once per batch and view, values are kept only while a later node needs them, and only normal
equations are accumulated, so memory stays bounded by ``cache_bytes`` plus one layer's system.
"""

from __future__ import annotations

import time
from collections.abc import Iterable

import torch
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from torch import fx, nn
from torch.nn.utils import parametrize

from orbify.calibration.equations import MAX_FEATURES, LayerEquations, NotRefittable, Solution
from orbify.calibration.paired import CONVERTED, ORIGINAL, PairedRun, original_graph
from orbify.calibration.report import LEAST_SQUARES, ORBIT_AVERAGE, CalibrationReport, LayerCalibration
from orbify.calibration.selection import LAYER_TYPES, SELECTIONS, ChannelChoice, following_norm, out_first_weight
from orbify.transfer.channels import ChannelMap, feed, groups_from_dense, rows
from orbify.errors import DataError
from orbify.graph.tracing import shape
from orbify.symmetry.groups import Group, parse_group
from orbify.layers.tied import OrbitBatchNorm, OrbitPool
from orbify.graph.plan import ConversionPlan
from orbify.common.options import check_choice
from orbify.transfer.matching import is_depthwise, load_weight

__all__ = ["CalibrationReport", "LayerCalibration", "MAX_FEATURES", "SELECTIONS", "calibrate_conversion"]

#: Default ridge, relative to the mean diagonal of each layer's Gram matrix (see DEVELOPERS.md, "Calibration").
RIDGE = 1e-3
#: Default memory for the values kept between stages (the frontiers of every batch and view).
CACHE_BYTES = 2 * 1024**3


def calibrate_conversion(converted: fx.GraphModule, plan: ConversionPlan, original: nn.Module,
                         images: torch.Tensor | Iterable[torch.Tensor], *, batch_size: int = 32,
                         transformed_copies: bool = True, refit_norms: bool = False,
                         selection: str = "reconstruction", ridge: float = RIDGE, cache_bytes: int = CACHE_BYTES,
                         progress: bool = True, console: Console | None = None) -> CalibrationReport:
    """Refit the base weights of ``converted`` in place so that it keeps ``original``'s behaviour on ``images``.

    Args:
        converted: a model returned by :func:`orbify.convert` (any budget, head and init) from ``original``.
        plan: its conversion plan; every layer's entry gets a note, and ``plan.notes`` a summary.
        original: the plain model it was converted from (only read).
        images: unlabeled images, one (N, C, H, W) tensor or an iterable of such batches, prepared as
            the original expects them (size, normalisation).
        batch_size: images per batch when ``images`` is one tensor.
        transformed_copies: fit every layer on the images and their copies moved by each group
            element (exact groups); False fits hidden layers on the images as given.
        refit_norms: set the statistics of a batch norm that follows a refitted layer so its output
            keeps the original's mean and variance on the calibration images (off by default: on the
            digits it changed the agreement by less than 0.005; see DEVELOPERS.md, "Calibration").
        selection: how to choose the kept channels: "reconstruction" or "importance".
        ridge: ridge penalty relative to the mean diagonal of each layer's Gram matrix.
        cache_bytes: memory for values kept between layers; beyond it batches are recomputed.
        progress: show a progress bar per layer (rich).
        console: the rich console for the bars (default: a new one on stderr).

    Returns:
        The :class:`CalibrationReport`. The models are left in the modes they came in.

    Raises:
        DataError: no images, or images that are not float (N, C, H, W) tensors.
        OptionError: an unknown ``selection``.
    """
    check_choice("selection", selection, SELECTIONS)
    device = next(iter(converted.parameters()), torch.zeros(0)).device
    batches = _batches(images, batch_size, device)
    modes = converted.training, original.training
    converted.eval()
    original.eval()
    started = time.perf_counter()
    try:
        with torch.no_grad():
            run = _Calibration(converted, plan, original, batches, transformed_copies, refit_norms, selection, ridge,
                               cache_bytes)
            report = run.execute(_Bars(progress, console))
    finally:
        converted.train(modes[0])
        original.train(modes[1])
    report.seconds = time.perf_counter() - started
    plan.notes.append(report.summary())
    for layer in report.layers:
        entry = next((p for p in plan.layers if p.name == layer.name), None)
        if entry is not None:
            error = "" if layer.error is None else f", unexplained variance {layer.error:.4f}"
            entry.notes.append(f"calibrated: {layer.method}{error}" + (f" ({layer.note})" if layer.note else ""))
    return report


def _batches(images, batch_size: int, device: torch.device) -> list[torch.Tensor]:
    if isinstance(images, torch.Tensor):
        images = images.split(max(1, batch_size))
    batches = [batch.to(device) for batch in images]
    if not batches or any(not isinstance(b, torch.Tensor) or b.dim() != 4 or not b.is_floating_point()
                          for b in batches) or sum(b.shape[0] for b in batches) == 0:
        raise DataError("Calibration needs unlabeled images as float tensors of shape (N, C, H, W)",
                        where="calibration images",
                        fix="pass a few hundred images prepared like the original's inputs "
                            "(orbify.data.read_images reads a folder or an .npz file)")
    return batches


class _Bars:
    """A progress bar per layer stage (nothing when disabled)."""

    def __init__(self, enabled: bool, console: Console | None):
        self.progress = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                 TimeElapsedColumn(), TextColumn("{task.fields[status]}"),
                                 console=console or Console(stderr=True), disable=not enabled)

    def __enter__(self) -> "_Bars":
        self.progress.__enter__()
        return self

    def __exit__(self, *exc) -> None:
        self.progress.__exit__(*exc)

    def stage(self, names: list[str], batches: int) -> int:
        return self.progress.add_task("calibrating " + ", ".join(names), total=batches, status="")

    def advance(self, task: int) -> None:
        self.progress.update(task, advance=1)

    def done(self, task: int, status: str) -> None:
        self.progress.update(task, status=status)


class _Calibration:
    def __init__(self, converted: fx.GraphModule, plan: ConversionPlan, original: nn.Module,
                 batches: list[torch.Tensor], transformed_copies: bool, refit_norms: bool, selection: str,
                 ridge: float, cache_bytes: int):
        self.converted = converted
        self.group: Group = parse_group(plan.group)
        self.order = self.group.order
        self.view_graph = original_graph(converted, original)
        self.batches = batches
        self.refit_norms = refit_norms
        self.ridge = ridge
        self.report = CalibrationReport(sum(b.shape[0] for b in batches), 1, selection, ridge, transformed_copies,
                                        refit_norms)
        self.all_slots = list(range(self.order)) if self.group.exact else [0]
        if not self.group.exact:
            self.report.notes.append(f"{self.group.name} moves images by resampling: fitted on the images as given, "
                                     "the classifier against the original on them alone")
        self.hidden_slots = self.all_slots if transformed_copies else [0]
        self.layers = [node for node in converted.graph.nodes
                       if node.op == "call_module" and isinstance(converted.get_submodule(node.target), LAYER_TYPES)]
        self.choice = ChannelChoice(converted, self.view_graph, self.layers, self._orbits, selection, batches,
                                    self.group, self.all_slots)
        self.maps = self._maps()
        self.run = PairedRun(converted, self.view_graph, batches, self.group, cache_bytes)

    # -- structure ---------------------------------------------------------------------------------
    def _module(self, node: fx.Node) -> nn.Module:
        return self.converted.get_submodule(node.target)

    def _orbits(self, node: fx.Node) -> int | None:
        """Output orbits of a layer node, None for plain outputs."""
        module = self._module(node)
        if parametrize.is_parametrized(module, "weight"):
            tying = module.parametrizations.weight[0]
            if tying.out_is_orbit:
                return tying.out_count
        return None

    def _maps(self) -> dict[fx.Node, ChannelMap | None]:
        """The channel map of every value under the kept channels (which original channel each converted one carries)."""
        maps: dict[fx.Node, ChannelMap | None] = {}
        for node in self.converted.graph.nodes:
            inputs = [maps.get(arg) for arg in node.all_input_nodes]
            first = next((m for m in inputs if m is not None), None)
            module = self._module(node) if node.op == "call_module" else None
            if node.op == "placeholder":
                maps[node] = ChannelMap.identity(shape(node)[1])
            elif node.op in ("get_attr", "output"):
                maps[node] = None
            elif isinstance(module, LAYER_TYPES) and not is_depthwise(module):
                channels = shape(node)[1]
                orbits = self._orbits(node)
                maps[node] = (ChannelMap.identity(channels) if orbits is None else
                              ChannelMap.from_source(self.choice.keep(node).repeat_interleave(self.order), channels))
            elif node.target is torch.cat and all(maps.get(a) is not None for a in node.args[0]):
                maps[node] = ChannelMap.concat([maps[a] for a in node.args[0]])
            elif isinstance(module, OrbitPool) and first is not None:
                maps[node] = first.pooled(self.order)
            elif first is not None and _flattens(node):
                before = shape(node.all_input_nodes[0])
                maps[node] = first.flattened(before[2] * before[3])
            else:
                maps[node] = first
        return maps

    def _stages(self) -> list[list[fx.Node]]:
        """Layers in graph order, grouped so that no layer of a stage reads a value computed after its first layer."""
        position = {node: i for i, node in enumerate(self.converted.graph.nodes)}
        stages: list[list[fx.Node]] = []
        for node in self.layers:
            if stages and position[node.args[0]] < position[stages[-1][0]]:
                stages[-1].append(node)
            else:
                stages.append([node])
        return stages

    # -- the run -------------------------------------------------------------------------------------
    def execute(self, bars: _Bars) -> CalibrationReport:
        self._load_norms()
        with bars:
            for stage in self._stages():
                self._fit(stage, bars)
        self.report.views = len(self.hidden_slots)
        self.report.agreement = self._agreement()
        self.report.recomputed = self.run.recomputed
        for key, note in self.choice.notes.items():
            self.report.notes.append(f"channel class {key}: {note}")
        return self.report

    def _load_norms(self) -> None:
        """Norm layers take the statistics and affine parameters of the channels they now carry."""
        for node in self.converted.graph.nodes:
            if node.op != "call_module" or self.maps.get(node.args[0]) is None:
                continue
            module, old = self._module(node), self.view_graph.get_submodule(node.target)
            source = self.maps[node.args[0]].source
            if isinstance(module, OrbitBatchNorm):
                _copy_norm(module, old, source[::self.order])
            elif isinstance(module, (nn.modules.batchnorm._BatchNorm, nn.GroupNorm, nn.LayerNorm)):
                _copy_norm(module, old, source)

    def _fit(self, stage: list[fx.Node], bars: _Bars) -> None:
        systems: dict[fx.Node, LayerEquations] = {}
        for node in stage:
            try:
                systems[node] = self._equations(node)
            except NotRefittable as why:
                self._fall_back(node, str(why))
        task = bars.stage([str(node.target) for node in stage], len(self.batches))
        slots = sorted({s for system in systems.values() for s in system.slots})
        inputs = [node.args[0].name for node in systems]
        names = [node.name for node in systems]
        with parametrize.cached():
            for b in range(len(self.batches)):
                if systems:
                    given = self.run.values(b, CONVERTED, 0, inputs)
                    outputs = {s: self.run.values(b, ORIGINAL, self.group.inverse(s), names) for s in slots}
                    for node, system in systems.items():
                        aligned = {s: self._align(outputs[s][node.name], s) for s in system.slots}
                        system.add(given[node.args[0].name], aligned)
                bars.advance(task)
        errors = []
        for node, system in systems.items():
            try:
                solution = system.solve(self.ridge)
            except NotRefittable as why:
                self._fall_back(node, str(why))
                continue
            self._store(node, system, solution)
            errors.append(f"{solution.error:.4f}")
        bars.done(task, "unexplained variance " + ", ".join(errors) if errors else "orbit average")

    def _equations(self, node: fx.Node) -> LayerEquations:
        module = self._module(node)
        orbits = self._orbits(node)
        source = self.maps[node].source
        targets = source[::self.order] if orbits is not None else source
        slots = self.hidden_slots if orbits is not None else self.all_slots
        intercept = getattr(module, "bias", None) is not None or following_norm(node, self.converted) is not None
        return LayerEquations(module, self.group, targets, slots, intercept)

    def _align(self, output: torch.Tensor, slot: int) -> torch.Tensor:
        """The original's output on the copy moved by slot⁻¹, its pixels moved back by the slot."""
        return self.group.act_grid(slot, output) if output.dim() == 4 and slot else output

    def _store(self, node: fx.Node, system: LayerEquations, solution: Solution) -> None:
        module = self._module(node)
        dtype = module.parametrizations.weight.original.dtype if system.tying is not None else module.weight.dtype
        if system.tying is not None:
            base = module.parametrizations.weight.original
            base.copy_(solution.base.to(dtype).reshape(base.shape))
        else:
            module.weight.copy_(solution.base.to(dtype).reshape(module.weight.shape))
        folded = None
        if solution.intercept is not None:
            if module.bias is not None:
                stored = (module.parametrizations.bias.original if parametrize.is_parametrized(module, "bias")
                          else module.bias)
                stored.copy_(solution.intercept.to(dtype))
            else:
                folded = solution.intercept
        norm = following_norm(node, self.converted)
        if norm is not None and norm.track_running_stats:
            self._set_norm(norm, solution, folded)
        self.report.layers.append(LayerCalibration(node.name, str(node.target), LEAST_SQUARES, solution.base.shape[0],
                                                   solution.base.shape[1], len(system.slots),
                                                   system.targets.tolist(), solution.error))

    def _set_norm(self, norm: nn.Module, solution: Solution, folded: torch.Tensor | None) -> None:
        """Move the constant of the fit into the running mean and, with ``refit_norms``, match the output's moments.

        The batch norm then maps the refitted output to the mean and variance that the original's
        batch norm gives the original's output: std' = std·√(var_fit/var_target),
        mean' = mean_fit − (mean_target − mean)·std'/std.
        """
        mean = norm.running_mean.double()
        std = (norm.running_var.double() + norm.eps).sqrt()
        shift = folded if folded is not None else torch.zeros_like(mean)
        if not self.refit_norms:
            self._own_statistics(norm, solution, mean - shift, std, shift)
            return
        fitted_var = (solution.fitted_square - solution.fitted_mean.square()).clamp_min(0)
        target_var = (solution.target_square - solution.target_mean.square()).clamp_min(0)
        usable = (fitted_var > 1e-12 * target_var.mean().clamp_min(1e-30)) & (target_var > 0)
        ratio = torch.where(usable, (fitted_var / target_var.clamp_min(1e-30)).sqrt(), torch.ones_like(std))
        new_std = std * ratio
        new_mean = solution.fitted_mean - shift - (solution.target_mean - mean) * ratio
        norm.running_mean.copy_(new_mean)
        norm.running_var.copy_((new_std.square() - norm.eps).clamp_min(0))

    @staticmethod
    def _own_statistics(norm: nn.Module, solution: Solution, centre: torch.Tensor, std: torch.Tensor,
                        shift: torch.Tensor) -> None:
        """Running statistics set to the refitted output's own moments, the affine compensating.

        In eval mode the norm must compute γ·(z − centre)/std + β. With the statistics of z itself
        (mean m, variance v over the calibration images and copies) and γ' = γ·√(v + ε)/std,
        β' = β + γ·(m − centre)/std it computes exactly that, and training mode, which normalises
        by the batch's own statistics, starts where eval mode is instead of jumping away.
        Without affine parameters only the centre is set.
        """
        if not norm.affine or parametrize.is_parametrized(norm):
            norm.running_mean.copy_(centre)
            return
        own_mean = solution.fitted_mean - shift
        own_var = (solution.fitted_square - solution.fitted_mean.square()).clamp_min(0)
        own_std = (own_var + norm.eps).sqrt()
        gamma, beta = norm.weight.detach().double(), norm.bias.detach().double()
        norm.weight.copy_(gamma * own_std / std)
        norm.bias.copy_(beta + gamma * (own_mean - centre) / std)
        norm.running_mean.copy_(own_mean)
        norm.running_var.copy_(own_var)

    def _fall_back(self, node: fx.Node, why: str) -> None:
        """The orbit average of the original weight under the kept channels."""
        module, old = self._module(node), self.view_graph.get_submodule(node.target)
        out_source, in_map = self.maps[node].source, self.maps[node.args[0]]
        transposed = isinstance(old, nn.ConvTranspose2d)
        if is_depthwise(old):
            weight = rows(old.weight.detach(), out_source)
        else:
            dense = rows(out_first_weight(old), out_source)
            weight = groups_from_dense(feed(dense, in_map), getattr(module, "groups", 1))
        load_weight(module, weight, transposed)
        if old.bias is not None:
            bias = rows(old.bias.detach(), out_source)
            if parametrize.is_parametrized(module, "bias"):
                module.bias = bias
            else:
                module.bias.copy_(bias)
        features = weight[0].numel()
        self.report.layers.append(LayerCalibration(node.name, str(node.target), ORBIT_AVERAGE, weight.shape[0],
                                                   features, 0, out_source.tolist(), None, why))

    def _agreement(self) -> float | None:
        """Top-1 agreement of the calibrated model with the original's output averaged over the group."""
        mine, theirs = self.run.output_name(CONVERTED), self.run.output_name(ORIGINAL)
        if mine is None or theirs is None:
            self.report.notes.append("the model returns several values: no agreement measured")
            return None
        agree = total = 0
        with parametrize.cached():
            for b in range(len(self.batches)):
                ours = self.run.values(b, CONVERTED, 0, [mine])[mine]
                views = [self._align(self.run.values(b, ORIGINAL, self.group.inverse(s), [theirs])[theirs], s)
                         for s in self.all_slots]
                average = torch.stack(views).mean(0)
                if ours.dim() not in (2, 4) or ours.shape != average.shape:
                    return None
                agree += int((ours.argmax(1) == average.argmax(1)).sum())
                total += ours.argmax(1).numel()
        return agree / total if total else None


def _flattens(node: fx.Node) -> bool:
    """A node that turns a spatial map into a (batch, features) tensor."""
    before = shape(node.all_input_nodes[0]) if node.all_input_nodes else None
    after = shape(node)
    return before is not None and after is not None and len(before) == 4 and len(after) == 2 \
        and before[2] * before[3] > 1


@torch.no_grad()
def _copy_norm(module: nn.Module, old: nn.Module, source: torch.Tensor) -> None:
    """Give a converted norm layer the parameters of the original channels ``source`` (one per entry)."""
    def take(name: str, fill: float) -> torch.Tensor:
        return rows(getattr(old, name).detach(), source, fill)

    for name, fill in (("weight", 1.0), ("bias", 0.0)):
        if getattr(old, name, None) is None:
            continue
        if parametrize.is_parametrized(module, name):   # one value per orbit: assigning stores the orbit mean
            setattr(module, name, take(name, fill))
        else:
            getattr(module, name).copy_(take(name, fill))
    if isinstance(module, nn.modules.batchnorm._BatchNorm) and module.track_running_stats \
            and old.running_mean is not None:
        module.running_mean.copy_(take("running_mean", 0.0))
        module.running_var.copy_(take("running_var", 1.0))
        module.num_batches_tracked.copy_(old.num_batches_tracked)
