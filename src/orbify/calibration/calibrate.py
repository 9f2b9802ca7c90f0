"""Calibrated conversion: refit a converted model on a few hundred unlabeled images (docs/design.md §9).

Orbit averaging uses the weights alone and leaves a converted model near chance until it is
tuned. :func:`calibrate_conversion` is a pass over an already converted model that uses a small
set of the user's images, without labels, to bring it close to the original at once:

1. **Kept channels.** Per channel class (values joined by residual adds and the like share one),
   orbit o of a layer stands for one kept original channel: slot 0 reproduces it, the other slots
   its moved copies. The channels are chosen by the reconstruction error dropping them would
   leave in the next layers, or by importance (:mod:`orbify.calibration.selection`); the channel
   map of every value follows (:mod:`orbify.calibration.targets`).
2. **Norm layers** copy the statistics and affine parameters of the channels they now carry
   (:mod:`orbify.calibration.norms`); per-channel tensors (a layer scale), token tensors and
   self-attention are carried again under the kept channels' maps and not refitted
   (:mod:`orbify.calibration.kept_tensors`).
3. **Layer by layer** in graph order, the base weights are refitted by ridge least squares so that
   the converted layer, fed with the *converted* previous layers' output, reproduces the
   original layer's output (before its batch norm) on the kept channels
   (:mod:`orbify.calibration.equations`): with ``transformed_copies`` on the images and their
   moved copies, and layers with plain outputs — the classifier after the orbit pool — against
   the original's output averaged over the group. The constant of the fit goes into the bias,
   or into the running mean of the batch norm that follows; with ``refit_norms`` that batch
   norm's statistics are also set so its output keeps the mean and variance of the original's
   (:mod:`orbify.calibration.norms`).
   A linear layer over the last axis of a channels-last map or a token sequence takes every pixel
   or token as a sample, as a 1×1 conv does (:mod:`orbify.calibration.positions`).
4. **Fallback**: a layer that cannot be refitted (transposed convs, more than
   ``MAX_FEATURES`` inputs per output) gets the orbit average of its original weight under the
   kept channels, and the report says why (:mod:`orbify.calibration.layer_weights`).

Values of a layout calibration does not know (inside attention written out with head reshapes) are
refused before anything changes (:class:`UnsupportedOpError`, naming the node).

Both models run node by node over the batches (:mod:`orbify.calibration.paired`): every node runs
once per batch and view, values are kept only while a later node needs them, and only normal
equations are accumulated, so memory stays bounded by ``cache_bytes`` plus one layer's system.
"""

from __future__ import annotations

import time
from collections.abc import Iterable

import torch
from rich.console import Console
from rich.progress import TaskID
from torch import fx, nn
from torch.nn.utils import parametrize

from orbify.calibration.agreement import top1_agreement
from orbify.calibration.coordinates import NotRefittable
from orbify.calibration.equations import MAX_FEATURES, LayerEquations
from orbify.calibration.kept_tensors import ATTENTION_NOTE, attention_nodes, load_kept_attention, load_kept_tensors
from orbify.calibration.layer_weights import load_orbit_average, store_solution
from orbify.calibration.norms import absorb_fit, load_kept_norms
from orbify.calibration.paired import CONVERTED, ORIGINAL, PairedRun, original_graph
from orbify.calibration.positions import moved_back
from orbify.calibration.report import LEAST_SQUARES, ORBIT_AVERAGE, CalibrationReport, LayerCalibration
from orbify.calibration.selection import SELECTIONS, following_norm
from orbify.calibration.targets import RefitLayers
from orbify.common.modes import module_mode
from orbify.common.options import check_choice
from orbify.common.progress import ProgressBars
from orbify.errors import DataError, UnsupportedOpError
from orbify.graph.plan import ConversionPlan
from orbify.graph.tracing import describe
from orbify.symmetry.groups import Group, parse_group
from orbify.symmetry.layouts import Flat, Orbit, Permuted, Plain

CALIBRATED_NOTE = "calibrated"
"""How a calibrated layer's note in the plan begins."""

__all__ = ["CALIBRATED_NOTE", "CalibrationReport", "LayerCalibration", "MAX_FEATURES", "SELECTIONS",
           "calibrate_conversion"]

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
            keeps the original's mean and variance on the calibration images (off by default: it
            changed nothing beyond noise; benchmarks/README.md, "Calibrated conversion").
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
        UnsupportedOpError: a value of a layout calibration does not handle (nothing is changed).
    """
    check_choice("selection", selection, SELECTIONS)
    _require_known_layouts(converted, plan)
    device = next(iter(converted.parameters()), torch.zeros(0)).device
    batches = _batches(images, batch_size, device)
    started = time.perf_counter()
    with module_mode(converted, original, training=False), torch.no_grad():
        run = _Calibration(converted, plan, original, batches, transformed_copies, refit_norms, selection, ridge,
                           cache_bytes)
        report = run.execute(ProgressBars(progress, console=console or Console(stderr=True)))
    report.seconds = time.perf_counter() - started
    _note_in_plan(plan, report)
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


def _require_known_layouts(converted: fx.GraphModule, plan: ConversionPlan) -> None:
    """Refuse values whose layout calibration does not handle (per-head values inside attention written out)."""
    for node in converted.graph.nodes:
        layout = plan.values.get(node.name)
        if layout is not None and not isinstance(layout, (Plain, Orbit, Flat, Permuted)):
            raise UnsupportedOpError(f"Calibration does not refit the layers around values of layout {layout} yet",
                                     where=describe(node),
                                     fix="convert with init='orbit-average' (--init orbit-average) and tune, or "
                                         "convert only up to the node before it")


def _note_in_plan(plan: ConversionPlan, report: CalibrationReport) -> None:
    """The report's summary in the plan's notes, and each layer's method and error in its entry's notes."""
    plan.notes.append(report.summary())
    for layer in report.layers:
        entry = next((p for p in plan.layers if p.name == layer.name), None)
        if entry is not None:
            error = "" if layer.error is None else f", unexplained variance {layer.error:.4f}"
            entry.notes.append(f"{CALIBRATED_NOTE}: {layer.method}{error}" + (f" ({layer.note})" if layer.note else ""))


class _Calibration:
    """One calibration run: the layers refitted stage by stage on both models' values, then the agreement."""

    def __init__(self, converted: fx.GraphModule, plan: ConversionPlan, original: nn.Module,
                 batches: list[torch.Tensor], transformed_copies: bool, refit_norms: bool, selection: str,
                 ridge: float, cache_bytes: int):
        self.group: Group = parse_group(plan.group)
        self.layouts = plan.values
        self.view_graph = original_graph(converted, original)
        self.batches = batches
        self.refit_norms = refit_norms
        self.ridge = ridge
        self.report = CalibrationReport(sum(b.shape[0] for b in batches), 1, selection, ridge, transformed_copies,
                                        refit_norms)
        self.all_slots = list(range(self.group.order)) if self.group.exact else [0]
        if not self.group.exact:
            self.report.notes.append(f"{self.group.name} moves images by resampling: fitted on the images as given, "
                                     "the classifier against the original on them alone")
        self.hidden_slots = self.all_slots if transformed_copies else [0]
        self.targets = RefitLayers(converted, self.view_graph, batches, self.group, selection, self.all_slots,
                                   self.hidden_slots, self.layouts)
        self.run = PairedRun(converted, self.view_graph, batches, self.group, cache_bytes)

    def execute(self, bars: ProgressBars) -> CalibrationReport:
        converted, maps = self.targets.converted, self.targets.maps
        load_kept_norms(converted, self.view_graph, maps, self.group.order)
        load_kept_tensors(converted, self.view_graph, maps, self.layouts)
        for node in attention_nodes(converted):
            load_kept_attention(node, converted, self.view_graph, maps)
            width = converted.get_submodule(node.target).embed_dim
            self.report.layers.append(LayerCalibration(node.name, str(node.target), ORBIT_AVERAGE, width, width, 0,
                                                       maps[node].source.tolist(), None, ATTENTION_NOTE))
        with bars:
            for stage in self.targets.stages():
                self._fit(stage, bars)
        self.report.views = len(self.hidden_slots)
        self.report.agreement = top1_agreement(self.run, self.group, self.all_slots, self.layouts, self.report.notes)
        self.report.recomputed = self.run.recomputed
        for key, note in self.targets.choice.notes.items():
            self.report.notes.append(f"channel class {key}: {note}")
        return self.report

    def _fit(self, stage: list[fx.Node], bars: ProgressBars) -> None:
        """Refit the layers of one stage (those that cannot be refitted fall back to the orbit average)."""
        systems: dict[fx.Node, LayerEquations] = {}
        for node in stage:
            try:
                systems[node] = self.targets.equations(node)
            except NotRefittable as why:
                self._fall_back(node, str(why))
        task = bars.add("calibrating " + ", ".join(str(node.target) for node in stage), total=len(self.batches))
        self._accumulate(systems, bars, task)
        errors = []
        for node, system in systems.items():
            try:
                solution = system.solve(self.ridge)
            except NotRefittable as why:
                self._fall_back(node, str(why))
                continue
            folded = store_solution(self.targets.module(node), solution)
            norm = following_norm(node, self.targets.converted)
            if norm is not None and norm.track_running_stats:
                absorb_fit(norm, solution, folded, self.refit_norms)
            self.report.layers.append(LayerCalibration(node.name, str(node.target), LEAST_SQUARES,
                                                       solution.base.shape[0], solution.base.shape[1],
                                                       len(system.slots), system.targets.tolist(), solution.error))
            errors.append(f"{solution.error:.4f}")
        bars.set_status(task, "unexplained variance " + ", ".join(errors) if errors else "orbit average")

    def _accumulate(self, systems: dict[fx.Node, LayerEquations], bars: ProgressBars, task: TaskID) -> None:
        """Add every batch to the stage's equations (the converted inputs, the original's outputs per slot)."""
        slots = sorted({s for system in systems.values() for s in system.slots})
        inputs = [node.args[0].name for node in systems]
        names = [node.name for node in systems]
        with parametrize.cached():
            for b in range(len(self.batches)):
                if systems:
                    given = self.run.values(b, CONVERTED, 0, inputs)
                    outputs = {s: self.run.values(b, ORIGINAL, self.group.inverse(s), names) for s in slots}
                    for node, system in systems.items():
                        aligned = {s: moved_back(self.group, outputs[s][node.name], s, self.layouts.get(node.name))
                                   for s in system.slots}
                        system.add(given[node.args[0].name], aligned)
                bars.advance(task)

    def _fall_back(self, node: fx.Node, why: str) -> None:
        """The orbit average of the original weight under the kept channels, recorded with the reason."""
        out_source = self.targets.maps[node].source
        weight = load_orbit_average(self.targets.module(node), self.view_graph.get_submodule(node.target),
                                    self.targets.maps[node.args[0]], out_source)
        self.report.layers.append(LayerCalibration(node.name, str(node.target), ORBIT_AVERAGE, weight.shape[0],
                                                   weight[0].numel(), 0, out_source.tolist(), None, why))
