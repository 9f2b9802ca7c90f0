"""The check report: what a conversion costs, what it saves and how exact the converted model is (docs/design.md §12).

:func:`check_model` measures a converted model against its original on a batch of inputs:

* cost — parameters and multiply-accumulates before and after (:mod:`orbify.verification.measure`), the saved
  checkpoint's size;
* exactness per layer — the weight residual the conversion recorded, and the equivariance error
  ``max_g ‖f(g·x) − g·f(x)‖ / ‖f(x)‖`` at the layer's output, where ``g·f(x)`` acts with the
  output layout the plan records (forward hooks on the converted modules);
* exactness of the output — invariance error ``max_g ‖F(g·x) − F(x)‖ / ‖F(x)‖`` (for a ``map`` head
  the equivariance error ``max_g ‖F(g·x) − g·F(x)‖ / ‖F(x)‖``);
* drift from the original on the inputs as given (upright) — top-1 agreement and the mean
  KL(softmax original ‖ softmax converted), plus accuracies when the inputs carry labels; only when the
  original's trained weights are known (a plain architecture rebuilt from a converted file's recorded
  source has fresh weights: its cost and input sizes are those of the original, its outputs are not);
* input-size safety — whether every strided op samples a symmetric grid (:mod:`orbify.graph.sizes`).

Errors are measured in float64 by default: random or deep backbones amplify float32 rounding
to about 1e-5 relative even in the plain model, which would hide the structural error of the
conversion (about 1e-14). The float32 output error is reported as well. For groups that rotate
by interpolation (not multiples of 90°) spatial maps are compared on their central disk.
"""

from __future__ import annotations

import copy
import math
from dataclasses import asdict, dataclass, field

import torch
import torch.nn.functional as F
from torch import nn

from orbify.calibration.calibrate import CALIBRATED_NOTE
from orbify.data import ImageSet
from orbify.errors import InputShapeError
from orbify.graph.plan import ConversionPlan
from orbify.graph.sizes import SizeChecker
from orbify.symmetry.groups import Group, parse_group
from orbify.symmetry.layouts import Layout, Orbit, act
from orbify.symmetry.resample import central_disk_mask
from orbify.verification.approximate import SmoothPattern
from orbify.verification.measure import count_macs, count_params, state_dict_bytes
from orbify.verification.segmentation import GroupScores, dense_output, group_scores

RANDOM_SAMPLES = 4
"""Number of random normal images used when no inputs are given."""


@dataclass
class LayerCheck:
    """Exactness of one converted layer: its recorded weight residual and its measured equivariance error."""

    name: str
    target: str
    kind: str
    layout_in: str
    layout_out: str
    weight_residual: float | None
    weight_residual_identity: float | None
    equivariance_error: float          # max over the group elements
    element_errors: list[float]        # one per group element, in element order
    calibration_error: float | None = None   # unexplained variance of a calibrated layer's refit


@dataclass
class SizeSafety:
    """Whether the input size keeps every strided op exact, and the nearest sizes that do."""

    input_size: tuple[int, int]
    safe: bool
    first_violation: str | None        # graph node name of the first strided op that breaks
    first_violation_detail: str | None
    violations: list[str]              # node names of every strided op that breaks
    safe_sizes: list[int]              # the nearest safe square sizes (the size itself when safe and square)


@dataclass
class FirstLayerFilters:
    """The first converted conv's filters before (original) and after (tied), for plotting."""

    name: str
    before: torch.Tensor               # (out, in, kh, kw) original filters
    after: torch.Tensor                # (orbits, |G|, in, kh, kw) tied filters, one row per orbit


@dataclass
class CheckReport:
    """Everything :func:`check_model` measured; ``to_dict()`` is the JSON form."""

    group: str
    exact_group: bool
    elements: list[str]
    budget: str
    head: str
    init: str
    inputs: str
    samples: int
    precision: str
    params_before: int
    params_after: int
    macs_before: int
    macs_after: int
    checkpoint_bytes: int
    output_property: str                # "invariance" or "equivariance" (map head)
    invariance_error: float             # of the output, in ``precision``
    output_element_errors: list[float]
    invariance_error_float32: float
    top1_agreement: float | None
    mean_kl: float | None
    accuracy_before: float | None
    accuracy_after: float | None
    size: SizeSafety
    layers: list[LayerCheck]
    roundings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    first_layer: FirstLayerFilters | None = None
    original_weights_known: bool = True   # False: drift and the original's accuracy were not measured (None)
    segmentation: dict[str, GroupScores] | None = None   # map head with masks: "original", "converted"

    @property
    def param_ratio(self) -> float:
        """Parameters after ÷ before (0.25: four times fewer)."""
        return self.params_after / self.params_before if self.params_before else math.nan

    @property
    def mac_ratio(self) -> float:
        """MACs after ÷ before."""
        return self.macs_after / self.macs_before if self.macs_before else math.nan

    @property
    def worst_layer(self) -> LayerCheck | None:
        """The layer with the largest equivariance error (the first of equals)."""
        return max(self.layers, key=lambda layer: layer.equivariance_error, default=None)

    def to_dict(self) -> dict:
        """JSON-ready figures (the plotted filters are left out)."""
        data = asdict(self)
        data.pop("first_layer")
        if self.segmentation is not None:
            data["segmentation"] = {name: scores.to_dict() for name, scores in self.segmentation.items()}
        size = data.pop("size")
        worst = self.worst_layer
        data.update(
            param_ratio=self.param_ratio, mac_ratio=self.mac_ratio,
            input_size=list(size["input_size"]), input_size_safe=size["safe"], safe_sizes=size["safe_sizes"],
            first_unsafe_layer=size["first_violation"], first_unsafe_detail=size["first_violation_detail"],
            unsafe_layers=size["violations"], worst_layer=worst.name if worst else None,
        )
        return data


def check_model(converted: nn.Module, original: nn.Module, plan: ConversionPlan,
                inputs: torch.Tensor | ImageSet | None = None, *, input_size: int | tuple[int, int] | None = None,
                checkpoint_bytes: int | None = None, float64: bool = True, batch_size: int = 8,
                seed: int = 0, safe_size_count: int = 3, original_weights_known: bool = True) -> CheckReport:
    """Measure ``converted`` (from ``convert(original, ...)``, described by ``plan``) against ``original``.

    Args:
        converted, original: the two models; neither is changed (measurements run on copies).
        plan: the conversion plan of ``converted``.
        inputs: images ``(N, C, H, W)`` or an :class:`~orbify.data.ImageSet` (labels add accuracies);
            ``None`` draws ``RANDOM_SAMPLES`` random normal images of ``input_size``.
        input_size: side (or (height, width)) of the random inputs; default the plan's example size.
        checkpoint_bytes: size of the converted model's saved file; default the size of its state dict.
        float64: measure the equivariance errors in float64 (the float32 output error is always reported).
        batch_size: images per forward pass.
        seed: seed of the random inputs.
        safe_size_count: how many safe sizes nearest to an unsafe input size to look for (each size
            tried costs one shape propagation on the meta device); a safe size lists only itself.
        original_weights_known: False when ``original`` is only the plain architecture with fresh weights
            (rebuilt from the source a converted file records). Cost, exactness and input-size safety do not
            depend on its weights and are measured as usual; the drift figures (top-1 agreement, mean KL,
            accuracy before) are ``None`` and the first-layer filters are left out. The converted model's
            accuracy is still measured when the inputs carry labels.

    Example (a tiny classifier; its converted output is invariant up to rounding):

    >>> import torch
    >>> from torch import nn
    >>> import orbify
    >>> model = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
    ...                       nn.Linear(8, 4)).eval()
    >>> converted, plan = orbify.convert(model, "c4", example_input=torch.zeros(1, 3, 9, 9))
    >>> report = orbify.check_model(converted, model, plan, torch.randn(4, 3, 9, 9))
    >>> report.group, report.samples, report.invariance_error < 1e-9
    ('c4', 4, True)
    """
    group = parse_group(plan.group)
    images, labels, described = _inputs(inputs, plan, input_size, seed)
    images = images.to(_device(converted))
    dense = plan.head == "map"
    layouts = {layer.target: layer.layout_out for layer in plan.layers}
    converted32, original32 = _copy_as(converted, torch.float32), _copy_as(original, torch.float32)
    if float64:
        layer_errors, output_errors = _equivariance(_copy_as(converted, torch.float64), layouts, group,
                                                    images.double(), batch_size, dense)
        output32 = _equivariance(converted32, {}, group, images, batch_size, dense)[1]
    else:
        layer_errors, output_errors = _equivariance(converted32, layouts, group, images, batch_size, dense)
        output32 = output_errors
    drift = _drift(original32 if original_weights_known else None, converted32, images, labels, batch_size)
    refits = {layer.name: layer.error for layer in plan.calibration.layers} if plan.calibration else {}
    return CheckReport(
        group=group.name, exact_group=group.exact, elements=[element_name(group, g) for g in range(group.order)],
        budget=plan.budget, head=plan.head, init=plan.init, inputs=described, samples=images.shape[0],
        precision="float64" if float64 else "float32",
        params_before=count_params(original), params_after=count_params(converted),
        macs_before=count_macs(original32, images[:1]), macs_after=count_macs(converted32, images[:1]),
        checkpoint_bytes=checkpoint_bytes if checkpoint_bytes is not None else state_dict_bytes(converted),
        output_property="equivariance" if dense else "invariance",
        invariance_error=max(output_errors), output_element_errors=output_errors,
        invariance_error_float32=max(output32),
        size=_size_safety(converted, original, images.shape[1], tuple(images.shape[-2:]), safe_size_count),
        layers=[_layer_check(layer, layer_errors.get(layer.target), refits.get(layer.name)) for layer in plan.layers],
        roundings=list(plan.roundings), notes=list(plan.notes) + _layer_notes(plan) + drift.pop("notes"),
        first_layer=_first_layer_filters(converted, original, plan, group) if original_weights_known else None,
        original_weights_known=original_weights_known, **drift,
        segmentation=_segmentation(converted32, original32 if original_weights_known else None, images, inputs,
                                   group, batch_size) if dense else None,
    )


def _layer_notes(plan: ConversionPlan) -> list[str]:
    """The plan's notes on single layers (a kernel grown to a square, a conv run along the orbits), each led by the
    layer's module; a calibrated layer's own note is left out (its refit error has a column of the layer table)."""
    return [f"'{layer.target}': {note}" for layer in plan.layers for note in layer.notes
            if not note.startswith(CALIBRATED_NOTE)]


def element_name(group: Group, g: int) -> str:
    """A short name of element g: ``rot90``, ``flip+rot90`` (mirror first, then rotate)."""
    k, m = group.elements[g]
    angle = f"rot{k * 360 / group.rotations:g}"
    return f"flip+{angle}" if m else angle


# -- inputs ----------------------------------------------------------------------------------------
def _inputs(inputs, plan: ConversionPlan, input_size, seed: int) -> tuple[torch.Tensor, torch.Tensor | None, str]:
    if isinstance(inputs, ImageSet):
        return inputs.images.float(), inputs.labels, f"{len(inputs)} given images"
    if inputs is not None:
        if inputs.dim() != 4:
            raise InputShapeError(f"Check inputs must be images (N, C, H, W), got shape {tuple(inputs.shape)}",
                                  where="check_model(inputs=...)", fix="stack the images into one 4-d tensor")
        return inputs.float(), None, f"{inputs.shape[0]} given images"
    size = (input_size, input_size) if isinstance(input_size, int) else tuple(input_size or plan.input_shape[-2:])
    images, described = random_inputs(parse_group(plan.group), RANDOM_SAMPLES, plan.input_shape[1], size, seed)
    return images, None, described


def random_inputs(group: Group, count: int, channels: int, size: tuple[int, int], seed: int) -> tuple[torch.Tensor, str]:
    """Seeded random check images and their description.

    Exact groups: standard normal pixels (quarter turns and mirrors move them exactly). Approximate
    groups: smooth random fields windowed to the central disk (:class:`orbify.verification.approximate.SmoothPattern`),
    because interpolating white noise by a non-quarter turn does not give the same image turned.
    """
    if group.exact:
        images = torch.randn(count, channels, *size, generator=torch.Generator().manual_seed(seed))
        return images, f"{count} random normal images (seed {seed})"
    images = SmoothPattern(count, channels, size, seed=seed).sample()
    return images, f"{count} smooth random images windowed to the central disk (seed {seed})"


def _copy_as(model: nn.Module, dtype: torch.dtype) -> nn.Module:
    return copy.deepcopy(model).to(dtype).eval()


def _device(model: nn.Module) -> torch.device:
    return next(iter(model.parameters()), torch.empty(0)).device


# -- equivariance ------------------------------------------------------------------------------------
def _equivariance(model: nn.Module, layouts: dict[str, Layout], group: Group, images: torch.Tensor,
                  batch_size: int, dense_output: bool) -> tuple[dict[str, list[float]], list[float]]:
    """Relative errors for every element, per hooked layer (module path → its output layout) and of the output.

    Each error is ``sqrt(Σ‖f(g·x) − g·f(x)‖²) / sqrt(Σ‖f(x)‖²)`` summed over the batches, so it does not
    depend on the batch size; the identity (element 0) is not run and counts as 0. A dense output moves with
    the input (``map`` head); otherwise it should not change at all. Every tensor of a tuple, list or dict
    output is measured (a segmentation model's ``out`` and ``aux``), each against its own norm, and the
    output's error of an element is the largest of them.
    """
    order = group.order
    layer_diff = {target: [0.0] * order for target in layouts}
    layer_norm = dict.fromkeys(layouts, 0.0)
    out_diff: list[list[float]] = []   # per output tensor, per element
    out_norm: list[float] = []
    reference: dict[str, torch.Tensor] = {}
    current = {"g": None}

    def hook(target: str):
        def record(module, args, output):
            if isinstance(output, (tuple, list)):   # attention returns (values, weights or None)
                output = next((item for item in output if isinstance(item, torch.Tensor)), None)
            if not isinstance(output, torch.Tensor):
                return
            if current["g"] is None:
                reference[target] = output.clone()   # a later in-place op (ReLU) may overwrite it
                layer_norm[target] += _masked_norm(output, group) ** 2
            else:
                g = current["g"]
                expected = act(group, layouts[target], g, reference[target])
                layer_diff[target][g] += _masked_norm(output - expected, group) ** 2
        return record

    handles = [model.get_submodule(target).register_forward_hook(hook(target)) for target in layouts]
    try:
        with torch.no_grad():
            for batch in images.split(batch_size):
                current["g"] = None
                outputs = _output_tensors(model(batch))
                if not out_norm:
                    out_diff, out_norm = [[0.0] * order for _ in outputs], [0.0] * len(outputs)
                for i, y in enumerate(outputs):
                    out_norm[i] += _masked_norm(y, group) ** 2
                for g in range(1, order):   # element 0 is the identity: its error is 0 by definition
                    current["g"] = g
                    for i, (y, yg) in enumerate(zip(outputs, _output_tensors(model(group.act_grid(g, batch))))):
                        expected = group.act_grid(g, y) if dense_output else y
                        out_diff[i][g] += _masked_norm(yg - expected, group) ** 2
                reference.clear()
    finally:
        for handle in handles:
            handle.remove()
    layer_errors = {t: [_ratio(d, layer_norm[t]) for d in diffs] for t, diffs in layer_diff.items()}
    output_errors = [max(_ratio(diffs[g], norm) for diffs, norm in zip(out_diff, out_norm)) for g in range(order)]
    return layer_errors, output_errors


def _masked_norm(x: torch.Tensor, group: Group) -> float:
    """‖x‖, over the central disk of spatial maps when the group rotates by interpolation."""
    if group.exact or x.dim() < 4:
        return float(x.norm())
    mask = central_disk_mask(*x.shape[-2:]).to(x.device)
    return float(x[..., mask].norm())


def _ratio(diff_squared: float, norm_squared: float) -> float:
    if norm_squared == 0.0:
        return 0.0 if diff_squared == 0.0 else math.inf
    return math.sqrt(diff_squared / norm_squared)


def _first_tensor(output) -> torch.Tensor:
    """The model output, or the first tensor of a tuple/list/dict output."""
    return _output_tensors(output)[0]


def _output_tensors(output) -> list[torch.Tensor]:
    """Every tensor of a model output, in order: the output itself, or those of a (nested) tuple/list/dict."""
    tensors = _tensors_in(output)
    if not tensors:
        raise InputShapeError("The model returns no tensor", where="check_model",
                              fix="check a model whose forward returns a tensor (or a tuple/dict holding one)")
    return tensors


def _tensors_in(value) -> list[torch.Tensor]:
    if isinstance(value, torch.Tensor):
        return [value]
    if isinstance(value, dict):
        value = list(value.values())
    return [tensor for item in value for tensor in _tensors_in(item)] if isinstance(value, (list, tuple)) else []


def _layer_check(layer, errors: list[float] | None, calibration_error: float | None) -> LayerCheck:
    errors = errors or []
    return LayerCheck(layer.name, layer.target, layer.op, str(layer.layout_in), str(layer.layout_out),
                      layer.weight_residual, layer.weight_residual_identity, max(errors, default=math.nan), errors,
                      calibration_error)


# -- drift -------------------------------------------------------------------------------------------
def _drift(original: nn.Module | None, converted: nn.Module, images: torch.Tensor, labels: torch.Tensor | None,
           batch_size: int) -> dict:
    """Top-1 agreement, mean KL(softmax original ‖ softmax converted) and accuracies on upright inputs.

    The class axis is dim 1; for dense outputs every pixel counts as one prediction. Without an
    ``original`` (its trained weights unknown) only the converted model's accuracy is measured.
    """
    with torch.no_grad():
        after = torch.cat([_first_tensor(converted(b)) for b in images.split(batch_size)])
        before = None if original is None else torch.cat([_first_tensor(original(b)) for b in images.split(batch_size)])
    result = dict(top1_agreement=None, mean_kl=None, accuracy_before=None, accuracy_after=None, notes=[])
    if before is None:
        result["accuracy_after"] = _accuracy(after, labels)
        return result
    if before.shape != after.shape or before.dim() < 2:
        result["notes"].append(f"no drift figures: the outputs differ in shape ({tuple(before.shape)} before, "
                               f"{tuple(after.shape)} after) or have no class axis")
        return result
    log_p = F.log_softmax(before.double(), dim=1)
    log_q = F.log_softmax(after.double(), dim=1)
    result["top1_agreement"] = float((before.argmax(1) == after.argmax(1)).double().mean())
    result["mean_kl"] = float((log_p.exp() * (log_p - log_q)).sum(1).mean())
    result["accuracy_before"] = _accuracy(before, labels)
    result["accuracy_after"] = _accuracy(after, labels)
    return result


def _accuracy(logits: torch.Tensor, labels: torch.Tensor | None) -> float | None:
    """Top-1 accuracy of class scores ``(N, classes)``; None without labels, or labels outside the classes."""
    if labels is None or logits.dim() != 2 or int(labels.max()) >= logits.shape[1]:
        return None
    return float((logits.argmax(1) == labels.to(logits.device)).double().mean())


def _segmentation(converted: nn.Module, original: nn.Module | None, images: torch.Tensor, inputs, group: Group,
                  batch_size: int) -> dict[str, GroupScores] | None:
    """Per-pixel accuracy and IoU of each model against the masks of an ImageSet (None without masks), the images
    and masks moved by every element (:mod:`orbify.verification.segmentation`)."""
    masks = inputs.masks if isinstance(inputs, ImageSet) else None
    if masks is None:
        return None
    models = {"original": original, "converted": converted}
    batches = list(zip(images.split(batch_size), masks.split(batch_size)))
    with torch.no_grad():
        classes = dense_output(converted(images[:1])).shape[1]
    return {name: group_scores(model, batches, group, classes) for name, model in models.items() if model is not None}


# -- sizes and filters -------------------------------------------------------------------------------
def _size_safety(converted: nn.Module, original: nn.Module, channels: int, size: tuple[int, int],
                 count: int) -> SizeSafety:
    """Strided-op safety of ``size``, checked on the meta device (no arithmetic)."""
    checker = SizeChecker(converted if isinstance(converted, torch.fx.GraphModule) else original, channels)
    broken = checker.violations(size)
    return SizeSafety(
        input_size=size, safe=not broken,
        first_violation=broken[0].node if broken else None,
        first_violation_detail=str(broken[0]) if broken else None,
        violations=[v.node for v in broken],
        safe_sizes=checker.safe_sizes(size[0], count) if broken else [size[0]] if size[0] == size[1] else [],
    )


def _first_layer_filters(converted: nn.Module, original: nn.Module, plan: ConversionPlan,
                         group: Group) -> FirstLayerFilters | None:
    """The first 2-d conv of the plan with an orbit output: the original filters and the tied ones."""
    for layer in plan.layers:
        if layer.op != "Conv2d" or not isinstance(layer.layout_out, Orbit):
            continue
        before = original.get_submodule(layer.target).weight.detach().cpu().clone()
        after = converted.get_submodule(layer.target).weight.detach().cpu().clone()
        if after.shape[0] % group.order:
            return None
        return FirstLayerFilters(layer.name, before, after.view(-1, group.order, *after.shape[1:]))
    return None
