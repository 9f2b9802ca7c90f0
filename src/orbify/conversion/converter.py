"""Whole-model conversion: trace, infer layouts, rewrite with tied modules (design.md sections 1, 5–7).

``convert(model, group, budget, head, example_input)`` traces a copy of ``model``, walks the graph
once in order applying the op rules of :mod:`orbify.graph.rules`, replaces every conv / linear / norm
by its tied counterpart with the pretrained weights carried over (:mod:`orbify.transfer.matching`:
orbit averaging with channel matching, or the lossless embedding), and returns the converted
``GraphModule`` with a :class:`~orbify.graph.plan.ConversionPlan`. The original model is untouched.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

import torch
from torch import fx, nn
from torch.nn.utils import parametrize

from orbify.symmetry.groups import approximate_note
from orbify.calibration.calibrate import calibrate_conversion
from orbify.transfer.channels import ChannelMap, budget_source, dense_from_groups, feed, groups_from_dense, rows
from orbify.errors import InputShapeError, OptionError, OrbifyError, UnsupportedOpError, WidthError
from orbify.graph.tracing import describe, shape, trace
from orbify.symmetry.groups import Group, parse_group
from orbify.symmetry.layouts import Flat, Layout, Orbit, Plain
from orbify.layers.tied import OrbitBatchNorm, OrbitPool, conv_fibre, tie_affine, tie_conv, tie_linear
from orbify.graph.plan import BUDGETS, HEADS, INITS, ConversionPlan, LayerPlan, orbits_for
from orbify.common.options import check_choice
from orbify.transfer.recalibrate import recalibrate_batch_norm
from orbify.graph.rules import CONVERT_UP_TO, Step, no_tensor, rule_for
from orbify.transfer.matching import (ChannelClasses,
    MatchTerm,
    chooses_channels,
    is_depthwise,
    load_weight,
    match_channels,
    tied_residual)

#: Images per batch when calibration images come as one tensor.
CALIBRATION_BATCH = 32

#: Channel matching is on unless ``match=False`` (see DEVELOPERS.md, "Weight transfer", for the measurement).
MATCH_DEFAULT = True


def convert(model: nn.Module, group: str | Group = "d4", budget: str = "channels", head: str = "invariant",
            example_input: torch.Tensor | None = None, *, init: str = "orbit-average", match: bool = MATCH_DEFAULT,
            carry_weights: bool = True, calibration: torch.Tensor | Iterable[torch.Tensor] | None = None,
            stop_at: str | None = None, leaf_types: tuple[type, ...] = (),
            progress: bool = False) -> tuple[fx.GraphModule, ConversionPlan]:
    """Convert a plain model into its tied counterpart under ``group``.

    Args:
        model: the plain model (left untouched).
        group: "c4", "d4", ... (see :func:`orbify.symmetry.groups.parse_group`).
        budget: "channels" (same width, ÷|G| params), "params" (≈ same params) or "fields"
            (×|G| width, the original embedded losslessly).
        head: "invariant" (the output does not change under the group) or "map" (a dense
            output, such as a mask, that moves with the input).
        example_input: a (B, C, H, W) tensor; shapes are propagated with it.
        init: "orbit-average" (project the pretrained weights), "embed" (``fields`` budget only:
            slot 0 of every orbit copies the original, and the converted model equals the original
            averaged over the group) or "calibrated" (orbit average, then every layer refitted on the
            ``calibration`` images so that the model keeps the original's behaviour averaged over
            the group: :func:`orbify.calibration.calibrate.calibrate_conversion` with its defaults; the report
            goes into ``plan.calibration`` and each layer's notes).
        match: with "orbit-average", choose which original channels share an orbit (and in which
            slot) to minimise the weight residual, layer by layer; False keeps the identity order.
            The plan records each layer's residual with the chosen and with the identity assignment.
        carry_weights: False leaves the new layers at their fresh initialisation (no transfer, no
            matching): the structure only, for loading a saved state dict.
        calibration: unlabeled images, one (N, C, H, W) tensor or batches of them, prepared like the
            original's inputs. With ``init="calibrated"`` (where they are required) every layer is
            refitted on them; otherwise the converted model's batch-norm statistics are re-estimated
            on them. Recorded in the plan either way.
        stop_at: convert only up to this node (name or module path); its orbit is pooled there and
            everything after it stays plain.
        leaf_types: module classes to keep as single graph nodes when tracing.
        progress: show a progress bar per layer while calibrating (rich, on stderr).

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
    if init == "calibrated" and carry_weights and calibration is None:
        raise OptionError("The 'calibrated' initialisation needs calibration images", where="option init",
                          fix="pass calibration= a few hundred unlabeled images (N, C, H, W) prepared like the "
                              "original's inputs (orbify.data.read_images reads a folder or an .npz file), "
                              "or use init='orbit-average'")
    if example_input is None or example_input.dim() != 4:
        got = "none" if example_input is None else f"shape {tuple(example_input.shape)}"
        raise InputShapeError(f"An example input of shape (batch, channels, height, width) is needed, got {got}",
                              fix="pass example_input=torch.randn(1, 3, S, S) at a safe size S (see safe_sizes)")
    gm = trace(model, example_input, leaf_types)
    converter = Converter(gm, group, budget, head, init, tuple(example_input.shape), stop_at, match, carry_weights)
    converter.run()
    if not group.exact:
        converter.plan.notes.append(approximate_note(group))
    gm.train(model.training)
    if calibration is not None and carry_weights:
        if init == "calibrated":
            report = calibrate_conversion(gm, converter.plan, model, calibration, progress=progress)
            converter.plan.calibration = report.to_dict()
        else:
            _recalibrate(gm, calibration, converter.plan)
    return gm, converter.plan


def _recalibrate(gm: fx.GraphModule, batches: torch.Tensor | Iterable[torch.Tensor], plan: ConversionPlan) -> None:
    if isinstance(batches, torch.Tensor):
        batches = batches.split(CALIBRATION_BATCH)
    seen = recalibrate_batch_norm(gm, batches)
    norms = sum(isinstance(m, nn.modules.batchnorm._BatchNorm) for m in gm.modules())
    if norms:
        plan.notes.append(f"batch-norm statistics of {norms} layers re-estimated on {seen} calibration images")
    else:
        plan.notes.append("calibration images given, but the model has no batch norm to recalibrate")


@dataclass
class _Layer:
    """A conv or linear being converted: its new tied module and what carrying weights into it needs."""

    old: nn.Module
    new: nn.Module
    lin: Layout
    lout: Layout
    groups: int = 1
    notes: list[str] = field(default_factory=list)
    fed: tuple[ChannelMap, torch.Tensor] | None = None   # (input map, weight in original row order), kept for reuse
    matched: tuple[torch.Tensor, torch.Tensor, float] | None = None   # (source, base, residual) found by matching

    @property
    def transposed(self) -> bool:
        return isinstance(self.old, nn.ConvTranspose2d)

    @property
    def depthwise(self) -> bool:
        return is_depthwise(self.old)

    def weight(self, in_map: ChannelMap, source: torch.Tensor | None) -> torch.Tensor:
        """The original weight, out-first, output rows picked by ``source`` (None: original order), inputs fed."""
        if self.fed is not None and self.fed[0] is in_map and source is not None and \
                (self.groups == 1 or source.numel() == self.fed[1].shape[0]):
            return rows(self.fed[1], source)   # rows and inputs commute; grouped blocks agree at equal widths
        weight = self.old.weight.detach()
        if self.transposed:
            weight = weight.transpose(0, 1)
        if self.depthwise:   # one input channel per output channel: rows follow the input
            return weight if source is None else rows(weight, source)
        dense = dense_from_groups(weight, getattr(self.old, "groups", 1))
        if source is not None:
            dense = rows(dense, source)
        return groups_from_dense(feed(dense, in_map), self.groups)


class Converter:
    """One conversion: walks the graph, keeps each value's layout and channel map, rewrites modules."""

    def __init__(self, gm: fx.GraphModule, group: Group, budget: str, head: str, init: str,
                 input_shape: tuple[int, ...], stop_at: str | None, match: bool = MATCH_DEFAULT,
                 carry_weights: bool = True):
        self.gm = gm
        self.group = group
        self.budget = budget
        self.head = head
        self.init = init
        self.carry = carry_weights
        self.layouts: dict[fx.Node, Layout | None] = {}
        self.maps: dict[fx.Node, ChannelMap] = {}
        self.replaced: set[str] = set()
        self.plan = ConversionPlan(group.name, budget, head, init, input_shape, stop_at)
        self.plain_after: set[fx.Node] = set()
        if stop_at is not None:
            pool = self._insert_pool(self._find(stop_at), "orbit_pool")
            self.plain_after = _descendants(pool)
        self.head_layers = set() if stop_at is not None else _head_layers(gm)
        self.matching = self._matching(match)
        self.plan.match = self.matching
        # without matching, the identity assignment is the one in use: one set of maps serves both
        self.identity_maps: dict[fx.Node, ChannelMap] = {} if self.matching else self.maps
        self.classes = ChannelClasses(gm) if self.matching else None
        self.class_maps: dict[int, ChannelMap] = {}
        self.layers: dict[fx.Node, _Layer] = {}

    def _matching(self, match: bool) -> bool:
        """Whether channel matching applies; a note says why not when it was asked for."""
        if not (match and self.carry):
            return False
        if self.init == "embed" or self.budget == "fields":
            self.plan.notes.append("channel matching does not apply to the 'fields' budget (every orbit copies "
                                   "one original channel); the identity assignment is used")
            return False
        return True

    # -- the walk --------------------------------------------------------------------------
    def run(self) -> None:
        for node in list(self.gm.graph.nodes):
            if node.op == "placeholder":
                s = shape(node)
                self.layouts[node] = Plain(s[1])
                self.maps[node] = self.identity_maps[node] = ChannelMap.identity(s[1])
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
            self.maps[node] = self._carried_map(node, layout, self.maps)
        if node not in self.identity_maps:
            self.identity_maps[node] = self._carried_map(node, layout, self.identity_maps)

    def _carried_map(self, node: fx.Node, layout: Layout | None, maps: dict[fx.Node, ChannelMap]) -> ChannelMap | None:
        sources = [maps.get(arg) for arg in node.all_input_nodes if self.layouts.get(arg) is not None]
        if layout is None or not sources:
            return None
        if node.target is torch.cat:
            return ChannelMap.concat([maps[a] for a in node.args[0]])
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
                self.identity_maps[pool] = self.identity_maps[result].pooled(self.group.order)
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

    def _identity_source(self, layout: Layout, channels: int) -> torch.Tensor:
        if isinstance(layout, Plain):
            return torch.arange(channels)
        return budget_source(channels, layout.orbits, self.group.order, self.budget)

    def _map(self, layout: Layout, source: torch.Tensor, channels: int) -> ChannelMap:
        """The map of a layer output: embedded (slot 0 feeds on) for ``embed`` orbits, else copies share."""
        if self.init == "embed" and isinstance(layout, Orbit):
            return ChannelMap.embedded(source, channels, self.group.order)
        return ChannelMap.from_source(source, channels)

    def _record(self, step: Step, old: nn.Module, lin: Layout, lout: Layout, new: nn.Module, notes: list[str],
                residual: float | None, groups: tuple[int, int] = (1, 1), identity: float | None = None) -> None:
        before = _channels(old)
        after = _channels(new)
        if isinstance(lout, Orbit) and before[1] != after[1] and self.budget == "channels":
            notes.append(f"rounded {before[1]} channels to {lout.orbits} whole orbits ({after[1]} channels)")
        self.plan.layers.append(LayerPlan(
            name=step.node.name, target=str(step.node.target), op=type(old).__name__, layout_in=str(lin),
            layout_out=str(lout), channels_before=before, channels_after=after,
            kernel=tuple(getattr(old, "kernel_size", ())), stride=tuple(getattr(old, "stride", ())),
            groups=groups, notes=notes, weight_residual=residual,
            weight_residual_identity=residual if identity is None and not self.matching else identity))

    # -- layers -------------------------------------------------------------------------------
    def convert_conv(self, step: Step) -> Layout:
        return self._convert_layer(step)

    def convert_linear(self, step: Step) -> Layout:
        return self._convert_layer(step)

    def _convert_layer(self, step: Step) -> Layout:
        node = step.node
        layer = self._layer(node, step)
        in_node = node.all_input_nodes[0]
        if layer.depthwise:   # channels follow the input channels
            out_map, identity_map = self.maps[in_node], self.identity_maps[in_node]
        else:
            channels = _channels(layer.old)[1]
            identity_map = self._map(layer.lout, self._identity_source(layer.lout, channels), channels)
            out_map = self._chosen_map(node, layer, identity_map) if self.matching else identity_map
        residual = identity = None
        if self.carry:
            residual = self._load(layer, self.maps[in_node], out_map)
            if self.matching and self.init != "embed":
                identity = residual if _same(self.maps[in_node], self.identity_maps[in_node]) and \
                    _same(out_map, identity_map) else \
                    tied_residual(layer.new, layer.weight(self.identity_maps[in_node], identity_map.source),
                                  layer.transposed)
        self._replace(node, layer.new)
        self.layers.pop(node)   # done: drop the weights kept for matching
        self.maps[node], self.identity_maps[node] = out_map, identity_map
        self._record(step, layer.old, layer.lin, layer.lout, layer.new, layer.notes, residual,
                     (getattr(layer.old, "groups", 1), layer.groups), identity)
        return layer.lout

    def _layer(self, node: fx.Node, step: Step | None) -> _Layer:
        """The new tied module of a conv/linear node, built once (matching may build it before its turn).

        With ``step`` None (built for matching ahead of its turn) errors name the node without a step.
        """
        if node in self.layers:
            return self.layers[node]
        old = self.gm.get_submodule(node.target)
        lin = self.layouts[node.all_input_nodes[0]]
        notes: list[str] = []
        if isinstance(old, nn.Linear):
            lout = self._output_layout(node, old.out_features)
            new = self._new(nn.Linear, lin.size(self.group), lout.size(self.group), bias=old.bias is not None,
                            **_factory(old.weight))
            tie_linear(new, self.group, lin, lout, where=describe(node))
            layer = _Layer(old, new, lin, lout)
        else:
            if not isinstance(lin, (Plain, Orbit)):
                raise (step or Step(node, [lin], self)).refuse("A conv reads a flattened tensor", CONVERT_UP_TO)
            if is_depthwise(old):
                lout, groups = lin, lin.size(self.group)
            else:
                lout = self._output_layout(node, old.out_channels)
                groups = self._groups(step or Step(node, [lin], self), old.groups, lin, lout, notes)
            new = self._new(type(old), lin.size(self.group), lout.size(self.group),
                            **_conv_geometry(old, groups))
            tie_conv(new, self.group, lin, lout, where=describe(node))
            layer = _Layer(old, new, lin, lout, groups, notes)
        self.layers[node] = layer
        return layer

    def _new(self, kind: type, *args, **kwargs) -> nn.Module:
        """A new layer; its parameters are left uninitialised when the original weights overwrite them."""
        if self.carry:
            return nn.utils.skip_init(kind, *args, **kwargs)
        return kind(*args, **kwargs)

    def _chosen_map(self, node: fx.Node, layer: _Layer, identity_map: ChannelMap) -> ChannelMap:
        """The output map of a channel-choosing layer under matching: its class's, chosen once for the class.

        The class's map is chosen when its first layer is reached, jointly for every layer of the
        class whose input is already converted; later layers of the class follow it.
        """
        if not isinstance(layer.lout, Orbit):
            return identity_map
        key = self.classes.key(node)
        if key in self.class_maps:
            return self.class_maps[key]
        blocks = self.classes.blocks(node)
        chosen = identity_map
        if blocks is not None:
            matched = [(self.layers[other], term) for other in self.classes.producers(node)
                       if (term := self._match_term(other, layer.lout))]
            if matched:
                result = match_channels([term for _, term in matched], identity_map.source, blocks)
                layer.notes.extend(result.notes)
                chosen = self._map(layer.lout, result.source, _channels(layer.old)[1])
                if result.bases is not None:
                    for (other, _), base, residual in zip(matched, result.bases, result.residuals):
                        other.matched = (result.source, base, residual)
        self.class_maps[key] = chosen
        return chosen

    def _match_term(self, node: fx.Node, lout: Layout) -> MatchTerm | None:
        """What matching needs from a layer of the class: None if its input is not converted yet."""
        in_node = node.all_input_nodes[0]
        if in_node not in self.maps or not chooses_channels(self.gm.get_submodule(node.target)):
            return None
        try:
            layer = self._layer(node, None)
        except OrbifyError:   # reported at the layer's own turn
            return None
        if layer.lout != lout or not parametrize.is_parametrized(layer.new, "weight"):
            return None
        tying = layer.new.parametrizations.weight[0]
        layer.fed = (self.maps[in_node], layer.weight(self.maps[in_node], None))
        return MatchTerm(layer.fed[1], tying, layer.transposed)

    def _load(self, layer: _Layer, in_map: ChannelMap, out_map: ChannelMap) -> float | None:
        """Carry the original weight and bias into ``layer.new``; return the weight residual (None for embed)."""
        with torch.no_grad():
            if layer.old.bias is not None:
                _assign(layer.new, "bias", rows(layer.old.bias.detach(), out_map.source))
            if layer.matched is not None and layer.fed[0] is in_map and torch.equal(layer.matched[0], out_map.source):
                layer.new.parametrizations.weight.original.copy_(layer.matched[1])   # Π found while matching
                return layer.matched[2]
        embed = self.init == "embed" and isinstance(layer.lout, Orbit)
        weight = layer.weight(in_map, out_map.source[::self.group.order] if embed else out_map.source)
        with torch.no_grad():
            load_weight(layer.new, weight, layer.transposed, slot_zero=embed)
        if self.init == "embed":
            return None
        with torch.no_grad():
            tied = (layer.new.weight.transpose(0, 1) if layer.transposed else layer.new.weight).detach()
            weight = weight.detach()
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
        plain = _copy_norm_rows(old, source) if self.carry else _fresh_norm(old, source.numel())
        if isinstance(layout, Orbit):
            like = next((t for t in (plain.weight, plain.running_mean) if t is not None), None)
            new = OrbitBatchNorm.from_plain(plain, self.group)
            new = new.to(**_factory(like)) if like is not None else new
        else:
            new = plain
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
            if self.carry and getattr(old, "weight", None) is not None:
                new.weight.copy_(rows(old.weight, source, fill=1.0))
                new.bias.copy_(rows(old.bias, source))
        tie_affine(new, self.group, layout)
        self._replace(node, new)
        self._record(step, old, layout, layout, new, [], None)
        return layout


def _same(a: ChannelMap, b: ChannelMap) -> bool:
    """True when two maps carry the same original channels to the same positions."""
    return a is b or (a.spatial == b.spatial and torch.equal(a.source, b.source) and a.inflow.shape == b.inflow.shape
                      and torch.equal(a.inflow.indices(), b.inflow.indices())
                      and torch.equal(a.inflow.values(), b.inflow.values()))


def _assign(module: nn.Module, name: str, value: torch.Tensor) -> None:
    if parametrize.is_parametrized(module, name):
        setattr(module, name, value)   # right_inverse stores the orbit average
    else:
        getattr(module, name).copy_(value)


def _fresh_norm(old: nn.modules.batchnorm._BatchNorm, channels: int) -> nn.modules.batchnorm._BatchNorm:
    """A freshly initialised batch norm like ``old`` over ``channels`` channels."""
    like = next((t for t in (old.weight, old.running_mean) if t is not None), None)
    return type(old)(channels, eps=old.eps, momentum=old.momentum, affine=old.affine,
                     track_running_stats=old.track_running_stats,
                     **(_factory(like) if like is not None else {})).train(old.training)


def _factory(like: torch.Tensor) -> dict:
    """Keyword arguments that build new parameters on the device and in the dtype of ``like``."""
    return {"device": like.device, "dtype": like.dtype}


def _copy_norm_rows(old: nn.modules.batchnorm._BatchNorm, source: torch.Tensor) -> nn.modules.batchnorm._BatchNorm:
    """A plain batch norm over the new channels whose statistics and affine copy the source channels."""
    new = _fresh_norm(old, source.numel())
    with torch.no_grad():
        if old.affine:
            new.weight.copy_(rows(old.weight, source, fill=1.0))
            new.bias.copy_(rows(old.bias, source))
        if old.track_running_stats:
            new.running_mean.copy_(rows(old.running_mean, source))
            new.running_var.copy_(rows(old.running_var, source, fill=1.0))
            new.num_batches_tracked.copy_(old.num_batches_tracked)
    return new


def _conv_geometry(old: nn.Module, groups: int) -> dict:
    """Keyword arguments for a conv of the same type and geometry as ``old`` with a new group count."""
    kwargs = dict(kernel_size=old.kernel_size, stride=old.stride, padding=old.padding, dilation=old.dilation,
                  groups=groups, bias=old.bias is not None, padding_mode=old.padding_mode, **_factory(old.weight))
    if isinstance(old, nn.ConvTranspose2d):
        kwargs["output_padding"] = old.output_padding
    return kwargs


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
            if arg.op == "call_module" and chooses_channels(gm.get_submodule(arg.target)):
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
