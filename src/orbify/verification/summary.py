"""Layer-by-layer summaries of a model (plain or converted) and the diff of two summaries.

:func:`summarize` runs one inference on an example input and lists every conv, linear and norm
layer (the layers a conversion converts) with its graph node name, op, layouts (from the
conversion plan; ``-`` for a plain model), channels, kernel, stride, stored parameters,
multiply-accumulates and output shape. MACs come from ``torch.utils.flop_counter`` per module,
counted as for :func:`orbify.verification.measure.count_macs` (tied weights expanded once beforehand), so the
totals agree with it. :func:`diff_summaries` aligns two summaries by node name.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import torch
from torch import fx, nn
from torch.nn.utils import parametrize

from orbify.errors import OrbifyError
from orbify.graph.plan import ConversionPlan
from orbify.graph.tracing import trace
from orbify.verification.measure import count_params, inference_flops

LAYER_TYPES = (nn.Conv1d, nn.Conv2d, nn.Conv3d, nn.ConvTranspose1d, nn.ConvTranspose2d, nn.ConvTranspose3d,
               nn.Linear, nn.modules.batchnorm._BatchNorm, nn.GroupNorm, nn.LayerNorm)
"""Module types a summary lists (conv, linear and norm layers; tied versions are subclasses)."""

COLUMNS = ("op", "layout_in", "layout_out", "channels", "kernel", "stride", "params", "macs", "output_shape")
"""The compared cells of a row, in display order (after the node name)."""


@dataclass(frozen=True)
class LayerRow:
    """One conv / linear / norm layer of a model."""

    name: str                 # graph node name ('layer1_0_conv1'), the module path when untraceable
    target: str               # module path ('layer1.0.conv1')
    op: str
    layout_in: str
    layout_out: str
    channels: str             # "in→out"
    kernel: str
    stride: str
    params: int
    macs: int
    output_shape: str

    def cell(self, column: str) -> str | int:
        return getattr(self, column)


@dataclass
class ModelSummary:
    """The rows of one model, its totals and what it was measured on."""

    title: str
    input_shape: tuple[int, ...]
    rows: list[LayerRow]
    params: int               # whole model, shared parameters once
    macs: int                 # whole model, one inference on ``input_shape``
    group: str | None = None
    budget: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class DiffRow:
    """A node in one or both summaries; ``changed`` names the columns that differ."""

    name: str
    a: LayerRow | None
    b: LayerRow | None
    changed: tuple[str, ...]

    @property
    def status(self) -> str:
        if self.a is None:
            return "only in B"
        if self.b is None:
            return "only in A"
        return "changed" if self.changed else "same"


@dataclass
class SummaryDiff:
    """Two summaries aligned by node name, with the totals of both and their ratios (B ÷ A)."""

    a: ModelSummary
    b: ModelSummary
    rows: list[DiffRow] = field(default_factory=list)

    @property
    def param_ratio(self) -> float:
        return self.b.params / self.a.params if self.a.params else math.nan

    @property
    def mac_ratio(self) -> float:
        return self.b.macs / self.a.macs if self.a.macs else math.nan

    def to_dict(self) -> dict:
        return {
            "a": {"title": self.a.title, "params": self.a.params, "macs": self.a.macs, "group": self.a.group,
                  "budget": self.a.budget},
            "b": {"title": self.b.title, "params": self.b.params, "macs": self.b.macs, "group": self.b.group,
                  "budget": self.b.budget},
            "param_ratio": self.param_ratio, "mac_ratio": self.mac_ratio,
            "rows": [{"name": r.name, "status": r.status, "changed": list(r.changed),
                      "a": asdict(r.a) if r.a else None, "b": asdict(r.b) if r.b else None} for r in self.rows],
        }


def summarize(model: nn.Module, example_input: torch.Tensor, plan: ConversionPlan | None = None,
              title: str = "model") -> ModelSummary:
    """Summarise ``model`` on one inference of ``example_input`` (the model is not changed).

    ``plan`` (the conversion plan of a converted model) supplies the layouts; without it they are ``-``.
    Node names come from the model's graph (its own graph for a converted ``GraphModule``, a trace of a
    copy otherwise); a model that cannot be traced is listed by module path.
    """
    names = _node_names(model)
    layers = [(path, module) for path, module in model.named_modules() if isinstance(module, LAYER_TYPES)]
    seen: dict[str, tuple] = {}

    def record(path: str):
        def hook(module, args, output):
            if path not in seen and args and isinstance(args[0], torch.Tensor) and isinstance(output, torch.Tensor):
                seen[path] = (args[0].shape, output.shape)
        return hook

    handles = [module.register_forward_hook(record(path)) for path, module in layers]
    try:
        with inference_flops(model) as counter:
            model(example_input)
    finally:
        for handle in handles:
            handle.remove()
    flops = _flops_by_path(counter.get_flop_counts())
    plan_layers = {layer.target: layer for layer in plan.layers} if plan else {}
    modules = dict(layers)
    rows = [_row(path, modules[path], names.get(path, path), shapes, flops.get(path, 0) // 2, plan_layers.get(path))
            for path, shapes in seen.items()]   # in the order the layers ran
    return ModelSummary(title, tuple(example_input.shape), rows, count_params(model),
                        counter.get_total_flops() // 2, plan.group if plan else None, plan.budget if plan else None)


def diff_summaries(a: ModelSummary, b: ModelSummary) -> SummaryDiff:
    """Align the rows of ``a`` and ``b`` by node name, in A's order with B-only rows after their predecessor."""
    rows_a = {row.name: row for row in a.rows}
    rows_b = {row.name: row for row in b.rows}
    order = [row.name for row in a.rows]
    previous = None
    for row in b.rows:
        if row.name not in rows_a:
            order.insert(order.index(previous) + 1 if previous is not None else 0, row.name)
        previous = row.name
    diff = SummaryDiff(a, b)
    for name in order:
        left, right = rows_a.get(name), rows_b.get(name)
        changed = tuple(c for c in COLUMNS if left and right and left.cell(c) != right.cell(c))
        diff.rows.append(DiffRow(name, left, right, changed))
    return diff


# -- helpers -------------------------------------------------------------------------------------------
def _node_names(model: nn.Module) -> dict[str, str]:
    """Module path → graph node name of its (first) call."""
    try:
        graph = model.graph if isinstance(model, fx.GraphModule) else trace(model).graph
    except OrbifyError:
        return {}
    names: dict[str, str] = {}
    for node in graph.nodes:
        if node.op == "call_module":
            names.setdefault(str(node.target), node.name)
    return names


def _flops_by_path(counts: dict[str, dict]) -> dict[str, int]:
    """FLOPs per module path from ``FlopCounterMode.get_flop_counts()`` (keys 'Root.path.to.module')."""
    flops: dict[str, int] = {}
    for key, per_op in counts.items():
        if "." in key:
            flops[key.split(".", 1)[1]] = sum(per_op.values())
    return flops


def _row(path: str, module: nn.Module, name: str, shapes: tuple, macs: int, layer) -> LayerRow:
    input_shape, output_shape = shapes
    axis = -1 if isinstance(module, nn.Linear) else 1
    kernel = getattr(module, "kernel_size", None)
    stride = getattr(module, "stride", None)
    # a layer norm's channels are its normalized axis, wherever the input holds it (channels last, or a subclass
    # that permutes them there itself)
    channels = (f"{module.normalized_shape[-1]}→{module.normalized_shape[-1]}" if isinstance(module, nn.LayerNorm)
                else f"{input_shape[axis]}→{output_shape[axis]}")
    return LayerRow(
        name=name, target=path, op=_op_name(module),
        layout_in=str(layer.layout_in) if layer else "-", layout_out=str(layer.layout_out) if layer else "-",
        channels=channels,
        kernel="×".join(map(str, kernel)) if kernel else "-", stride="×".join(map(str, stride)) if stride else "-",
        params=count_params(module), macs=macs, output_shape="×".join(map(str, output_shape[1:])),
    )


def _op_name(module: nn.Module) -> str:
    """The class name, looking through the subclass ``torch.nn.utils.parametrize`` creates."""
    cls = type(module)
    if parametrize.is_parametrized(module):
        cls = cls.__bases__[0]
    return cls.__name__
