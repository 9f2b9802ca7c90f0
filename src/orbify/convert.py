"""Whole-model conversion: trace, infer layouts, rewrite with tied modules (design.md sections 1, 5–7).

``convert(model, group, budget, head, example_input)`` traces a copy of ``model``, walks the graph
once in order applying the op rules of :mod:`orbify.rules`, replaces every conv / linear / norm
by its tied counterpart with the pretrained weights carried over, and returns the converted
``GraphModule`` with a :class:`~orbify.plan.ConversionPlan`. The original model is untouched.
"""

from __future__ import annotations

import torch
from torch import fx, nn
from torch.nn.utils import parametrize

from .channels import ChannelMap, budget_source, dense_from_groups, feed, groups_from_dense, rows
from .errors import InputShapeError, OptionError, UnsupportedOpError, WidthError
from .graph import describe, shape, trace
from .groups import Group, parse_group
from .layouts import Flat, Layout, Orbit, Plain
from .modules import OrbitBatchNorm, OrbitPool, conv_fibre, tie_affine, tie_conv, tie_linear
from .plan import BUDGETS, HEADS, INITS, ConversionPlan, LayerPlan, check_choice, orbits_for
from .rules import CONVERT_UP_TO, Step, no_tensor, rule_for

_LAYER_TYPES = (nn.Conv2d, nn.ConvTranspose2d, nn.Linear)


def convert(model: nn.Module, group: str | Group = "d4", budget: str = "channels", head: str = "invariant",
            example_input: torch.Tensor | None = None, *, init: str = "orbit-average", stop_at: str | None = None,
            leaf_types: tuple[type, ...] = ()) -> tuple[fx.GraphModule, ConversionPlan]:
    """Convert a plain model into its tied counterpart under ``group``.

    Args:
        model: the plain model (left untouched).
        group: "c4", "d4", ... (see :func:`orbify.groups.parse_group`).
        budget: "channels" (same width, ÷|G| params), "params" (≈ same params) or "fields"
            (×|G| width, the original embedded losslessly).
        head: "invariant" (the output does not change under the group) or "map" (a dense
            output, such as a mask, that moves with the input).
        example_input: a (B, C, H, W) tensor; shapes are propagated with it.
        init: "orbit-average" (project the pretrained weights) or "embed" (``fields`` budget only).
        stop_at: convert only up to this node (name or module path); its orbit is pooled there and
            everything after it stays plain.
        leaf_types: module classes to keep as single graph nodes when tracing.

    Returns:
        The converted GraphModule (in the mode of ``model``) and the conversion plan.
    """
    group = parse_group(group)
    check_choice("budget", budget, BUDGETS)
    check_choice("head", head, HEADS)
    check_choice("init", init, INITS)
    if init == "embed" and budget != "fields":
        raise OptionError("The 'embed' initialisation needs the 'fields' budget", where="option init",
                          fix="use budget='fields' with init='embed', or init='orbit-average'")
    if example_input is None or example_input.dim() != 4:
        got = "none" if example_input is None else f"shape {tuple(example_input.shape)}"
        raise InputShapeError(f"An example input of shape (batch, channels, height, width) is needed, got {got}",
                              fix="pass example_input=torch.randn(1, 3, S, S) at a safe size S (see safe_sizes)")
    gm = trace(model, example_input, leaf_types)
    converter = Converter(gm, group, budget, head, init, tuple(example_input.shape), stop_at)
    converter.run()
    gm.train(model.training)
    return gm, converter.plan


class Converter:
    """One conversion: walks the graph, keeps each value's layout and channel map, rewrites modules."""

    def __init__(self, gm: fx.GraphModule, group: Group, budget: str, head: str, init: str,
                 input_shape: tuple[int, ...], stop_at: str | None):
        self.gm = gm
        self.group = group
        self.budget = budget
        self.head = head
        self.init = init
        self.layouts: dict[fx.Node, Layout | None] = {}
        self.maps: dict[fx.Node, ChannelMap] = {}
        self.replaced: set[str] = set()
        self.plan = ConversionPlan(group.name, budget, head, init, input_shape, stop_at)
        self.plain_after: set[fx.Node] = set()
        if stop_at is not None:
            pool = self._insert_pool(self._find(stop_at), "orbit_pool")
            self.plain_after = _descendants(pool)
        self.head_layers = set() if stop_at is not None else _head_layers(gm)

    # -- the walk --------------------------------------------------------------------------
    def run(self) -> None:
        for node in list(self.gm.graph.nodes):
            if node.op == "placeholder":
                s = shape(node)
                self.layouts[node] = Plain(s[1])
                self.maps[node] = ChannelMap.identity(s[1])
            elif node.op == "get_attr":
                self.layouts[node] = None
            elif node.op == "output":
                self._finish(node)
            else:
                self._visit(node)
            layout = self.layouts.get(node)
            self.plan.values[node.name] = str(layout) if layout is not None else "-"
        self.gm.graph.lint()
        self.gm.recompile()

    def _visit(self, node: fx.Node) -> None:
        module = self.gm.get_submodule(node.target) if node.op == "call_module" else None
        rule = rule_for(node, module)
        inputs = [self.layouts.get(arg) for arg in node.all_input_nodes]
        step = Step(node, inputs, self)
        if rule is None and shape(node) is None and all(layout is None for layout in inputs):
            rule = no_tensor   # arithmetic on sizes and other non-tensor values
        if rule is None:
            raise step.refuse("No layout rule for this op", CONVERT_UP_TO)
        layout = rule(step)
        self.layouts[node] = layout
        if node not in self.maps:
            self.maps[node] = self._carried_map(node, layout)

    def _carried_map(self, node: fx.Node, layout: Layout | None) -> ChannelMap | None:
        sources = [self.maps.get(arg) for arg in node.all_input_nodes if self.layouts.get(arg) is not None]
        if layout is None or not sources:
            return None
        if node.target is torch.cat:
            return ChannelMap.concat([self.maps[a] for a in node.args[0]])
        if node.op == "call_module" and isinstance(self.gm.get_submodule(node.target), OrbitPool):
            return sources[0].pooled(self.group.order)
        first = self.layouts[node.all_input_nodes[0]]
        if isinstance(layout, Flat) and not isinstance(first, Flat):
            return sources[0].flattened(layout.height * layout.width)
        return sources[0]

    def _finish(self, output: fx.Node) -> None:
        results = [a for a in output.all_input_nodes]
        for result in results:
            layout = self.layouts.get(result)
            if isinstance(layout, Orbit):
                pool = self._insert_pool(result, "output_orbit_pool")
                self.layouts[pool] = Plain(layout.orbits)
                self.maps[pool] = self.maps[result].pooled(self.group.order)
                self.plan.notes.append(f"the output of '{result.name}' is orbit-pooled to make it invariant")
                result = pool
            spatial = len(shape(result) or ()) > 2
            if self.head == "invariant" and spatial:
                raise OptionError(f"The model's output '{result.name}' is a spatial map, so it can be equivariant "
                                  "but not invariant", where="option head",
                                  fix="use head='map' (--head map) for dense outputs such as masks")
            if self.head == "map" and not spatial:
                raise OptionError(f"The model's output '{result.name}' has no spatial axes", where="option head",
                                  fix="use head='invariant' for classifiers")

    # -- helpers -----------------------------------------------------------------------------
    def _find(self, name: str) -> fx.Node:
        """The node of that name or module path; for a container path, the last node inside it."""
        inside = None
        for node in self.gm.graph.nodes:
            if node.name == name or node.target == name:
                return node
            if node.op == "call_module" and node.target.startswith(name + "."):
                inside = node
        if inside is not None:
            return inside
        names = ", ".join(n.name for n in self.gm.graph.nodes if n.op == "call_module")
        raise OptionError(f"No graph node named {name!r} to stop at", where="option stop_at",
                          fix=f"use a node name or module path, e.g. one of: {names[:300]}")

    def _insert_pool(self, node: fx.Node, name: str) -> fx.Node:
        self.gm.add_submodule(name, OrbitPool(self.group.order))
        with self.gm.graph.inserting_after(node):
            pool = self.gm.graph.call_module(name, (node,))
        node.replace_all_uses_with(pool, delete_user_cb=lambda user: user is not pool)
        return pool

    def _replace(self, node: fx.Node, module: nn.Module) -> None:
        if node.target in self.replaced:
            raise UnsupportedOpError("A layer module is called more than once in the graph", where=describe(node),
                                     fix="give every call its own module instance before converting")
        self.replaced.add(node.target)
        parent, _, name = node.target.rpartition(".")
        setattr(self.gm.get_submodule(parent) if parent else self.gm, name, module)

    def _output_layout(self, node: fx.Node, channels: int) -> Layout:
        if node in self.head_layers or node in self.plain_after:
            return Plain(channels)
        return Orbit(orbits_for(channels, self.group, self.budget))

    def _out_map(self, layout: Layout, channels: int) -> ChannelMap:
        if isinstance(layout, Plain):
            return ChannelMap.identity(channels)
        return ChannelMap.from_source(budget_source(channels, layout.orbits, self.group.order, self.budget), channels)

    def _record(self, step: Step, old: nn.Module, lin: Layout, lout: Layout, new: nn.Module, notes: list[str],
                residual: float | None, groups: tuple[int, int] = (1, 1)) -> None:
        before = _channels(old)
        after = _channels(new)
        if isinstance(lout, Orbit) and before[1] != after[1] and self.budget == "channels":
            notes.append(f"rounded {before[1]} channels to {lout.orbits} whole orbits ({after[1]} channels)")
        self.plan.layers.append(LayerPlan(
            name=step.node.name, target=str(step.node.target), op=type(old).__name__, layout_in=str(lin),
            layout_out=str(lout), channels_before=before, channels_after=after,
            kernel=tuple(getattr(old, "kernel_size", ())), stride=tuple(getattr(old, "stride", ())),
            groups=groups, notes=notes, weight_residual=residual))

    # -- layers -------------------------------------------------------------------------------
    def convert_conv(self, step: Step) -> Layout:
        node, old = step.node, self.gm.get_submodule(step.node.target)
        lin = step.layout
        if not isinstance(lin, (Plain, Orbit)):
            raise step.refuse("A conv reads a flattened tensor", CONVERT_UP_TO)
        transposed = isinstance(old, nn.ConvTranspose2d)
        notes: list[str] = []
        depthwise = old.groups > 1 and old.groups == old.in_channels == old.out_channels
        in_map = self.maps[step.node.all_input_nodes[0]]
        if depthwise:
            lout, out_map, groups = lin, in_map, lin.size(self.group)
        else:
            lout = self._output_layout(node, old.out_channels)
            out_map = self._out_map(lout, old.out_channels)
            groups = self._groups(step, old.groups, lin, lout, notes)
        new = _conv_like(old, lin.size(self.group), lout.size(self.group), groups)
        weight = old.weight.detach()
        if transposed:
            weight = weight.transpose(0, 1)
        if depthwise:
            weight = rows(weight, in_map.source)
        else:
            weight = groups_from_dense(feed(rows(dense_from_groups(weight, old.groups), out_map.source), in_map), groups)
        if transposed:
            weight = weight.transpose(0, 1)
        tie_conv(new, self.group, lin, lout, where=describe(node))
        residual = self._load(new, weight, old.bias, out_map)
        self._replace(node, new)
        self.maps[node] = out_map
        self._record(step, old, lin, lout, new, notes, residual, (old.groups, groups))
        return lout

    def convert_linear(self, step: Step) -> Layout:
        node, old = step.node, self.gm.get_submodule(step.node.target)
        lin = step.layout
        lout = self._output_layout(node, old.out_features)
        out_map = self._out_map(lout, old.out_features)
        new = nn.Linear(lin.size(self.group), lout.size(self.group), bias=old.bias is not None)
        weight = feed(rows(old.weight.detach(), out_map.source), self.maps[node.all_input_nodes[0]])
        tie_linear(new, self.group, lin, lout, where=describe(node))
        residual = self._load(new, weight, old.bias, out_map)
        self._replace(node, new)
        self.maps[node] = out_map
        self._record(step, old, lin, lout, new, [], residual)
        return lout

    def _load(self, new: nn.Module, weight: torch.Tensor, bias: torch.Tensor | None, out_map: ChannelMap) -> float:
        """Assign the carried-over weight (projected by the tying) and return its weight residual."""
        with torch.no_grad():
            _assign(new, "weight", weight)
            if bias is not None:
                _assign(new, "bias", rows(bias.detach(), out_map.source))
            tied = new.weight
        norm = weight.norm()
        return float((weight - tied).norm() / norm) if norm > 0 else 0.0

    def _groups(self, step: Step, groups: int, lin: Layout, lout: Layout, notes: list[str]) -> int:
        """The largest divisor of the original group count that keeps whole orbits per group."""
        for candidate in sorted((d for d in range(1, groups + 1) if groups % d == 0), reverse=True):
            if lin.size(self.group) % candidate or lout.size(self.group) % candidate:
                continue
            try:
                conv_fibre(self.group, lin, lout, candidate)
            except WidthError:
                continue
            if candidate != groups:
                notes.append(f"merged {groups} conv groups into {candidate} so each holds whole orbits")
            return candidate
        raise step.refuse("No grouping of this conv keeps whole orbits", "use a group whose order divides the widths")

    def convert_batch_norm(self, step: Step) -> Layout:
        node, old = step.node, self.gm.get_submodule(step.node.target)
        layout = step.layout
        source = self.maps[node.all_input_nodes[0]].source
        plain = _copy_norm_rows(old, source)
        new = OrbitBatchNorm.from_plain(plain, self.group) if isinstance(layout, Orbit) else plain
        self._replace(node, new)
        self._record(step, old, layout, layout, new, [], None)
        return layout

    def convert_affine_norm(self, step: Step) -> Layout:
        node, old = step.node, self.gm.get_submodule(step.node.target)
        layout = step.layout
        channels = layout.size(self.group) if layout is not None else 0
        if isinstance(old, nn.GroupNorm):
            per_group = channels // old.num_groups if channels % old.num_groups == 0 else 0
            if isinstance(layout, Orbit) and (per_group == 0 or per_group % self.group.order):
                raise step.refuse(f"GroupNorm with {old.num_groups} groups does not hold whole orbits of "
                                  f"{self.group.order} channels", "use a group count that divides the orbits")
            new = nn.GroupNorm(old.num_groups, channels, old.eps, old.affine)
        else:
            if len(old.normalized_shape) != 1 or shape(node.all_input_nodes[0])[-1] != old.normalized_shape[0] \
                    or len(shape(node.all_input_nodes[0])) != 2:
                raise step.refuse("LayerNorm is supported over the channel axis of (B, C) features only", CONVERT_UP_TO)
            new = nn.LayerNorm(channels, old.eps, old.elementwise_affine)
        source = self.maps[node.all_input_nodes[0]].source
        with torch.no_grad():
            if getattr(old, "weight", None) is not None:
                new.weight.copy_(rows(old.weight - 1, source) + 1)
                new.bias.copy_(rows(old.bias, source))
        tie_affine(new, self.group, layout)
        self._replace(node, new)
        self._record(step, old, layout, layout, new, [], None)
        return layout


def _assign(module: nn.Module, name: str, value: torch.Tensor) -> None:
    if parametrize.is_parametrized(module, name):
        setattr(module, name, value)   # right_inverse stores the orbit average
    else:
        getattr(module, name).copy_(value)


def _copy_norm_rows(old: nn.modules.batchnorm._BatchNorm, source: torch.Tensor) -> nn.modules.batchnorm._BatchNorm:
    """A plain batch norm over the new channels whose statistics and affine copy the source channels."""
    new = type(old)(source.numel(), eps=old.eps, momentum=old.momentum, affine=old.affine,
                    track_running_stats=old.track_running_stats)
    with torch.no_grad():
        if old.affine:
            new.weight.copy_(rows(old.weight - 1, source) + 1)
            new.bias.copy_(rows(old.bias, source))
        if old.track_running_stats:
            new.running_mean.copy_(rows(old.running_mean, source))
            new.running_var.copy_(rows(old.running_var - 1, source) + 1)
            new.num_batches_tracked.copy_(old.num_batches_tracked)
    return new.train(old.training)


def _conv_like(old: nn.Module, in_channels: int, out_channels: int, groups: int) -> nn.Module:
    """A fresh conv of the same type and geometry as ``old`` with new widths and group count."""
    kwargs = dict(kernel_size=old.kernel_size, stride=old.stride, padding=old.padding, dilation=old.dilation,
                  groups=groups, bias=old.bias is not None, padding_mode=old.padding_mode)
    if isinstance(old, nn.ConvTranspose2d):
        kwargs["output_padding"] = old.output_padding
    return type(old)(in_channels, out_channels, **kwargs)


def _channels(module: nn.Module) -> tuple[int, int]:
    if isinstance(module, nn.Linear):
        return (module.in_features, module.out_features)
    if isinstance(module, (nn.Conv2d, nn.ConvTranspose2d)):
        return (module.in_channels, module.out_channels)
    if isinstance(module, OrbitBatchNorm):
        return (module.num_features * module.order,) * 2
    if isinstance(module, nn.modules.batchnorm._BatchNorm):
        return (module.num_features,) * 2
    if isinstance(module, nn.GroupNorm):
        return (module.num_channels,) * 2
    if isinstance(module, nn.LayerNorm):
        return (module.normalized_shape[0],) * 2
    return (0, 0)


def _head_layers(gm: fx.GraphModule) -> set[fx.Node]:
    """The conv/linear nodes that produce the output through layout-keeping ops only: they map to plain."""
    heads: set[fx.Node] = set()
    seen: set[fx.Node] = set()
    stack = [n for n in gm.graph.nodes if n.op == "output"]
    while stack:
        node = stack.pop()
        for arg in node.all_input_nodes:
            if arg in seen:
                continue
            seen.add(arg)
            if arg.op == "call_module" and isinstance(gm.get_submodule(arg.target), _LAYER_TYPES):
                module = gm.get_submodule(arg.target)
                depthwise = isinstance(module, nn.Conv2d) and module.groups == module.in_channels == module.out_channels > 1
                if not depthwise:
                    heads.add(arg)
                    continue
            stack.append(arg)
    return heads


def _descendants(node: fx.Node) -> set[fx.Node]:
    out, stack = set(), [node]
    while stack:
        for user in stack.pop().users:
            if user not in out:
                out.add(user)
                stack.append(user)
    return out
