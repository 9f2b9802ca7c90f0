"""The walk over the graph: each node in order gets its layout from its op rule and its channel maps carried on."""

from __future__ import annotations

import operator

from torch import fx

from orbify.conversion.graph_edits import insert_pool
from orbify.conversion.state import ConversionState
from orbify.errors import OptionError
from orbify.graph.channel_order import Parts, part_bounds, shuffle_orders
from orbify.graph.rules import CONVERT_UP_TO, ConversionContext, Step, no_tensor, rule_for
from orbify.graph.tracing import shape
from orbify.layers.tied import OrbitPool
from orbify.symmetry.layouts import Flat, Layout, Orbit, Plain
from orbify.transfer.channels import ChannelMap, carried_map


class GraphWalk:
    """One pass over ``state.gm``'s graph; the rules replace layers through ``ctx``; ``head`` is the option."""

    def __init__(self, state: ConversionState, ctx: ConversionContext, head: str):
        self.state = state
        self.ctx = ctx
        self.head = head

    def run(self) -> None:
        """Walk every node, record its layout in the plan, then recompile the rewritten module."""
        state = self.state
        for node in list(state.gm.graph.nodes):
            if node.op == "placeholder" and shape(node) is None:   # an argument kept at its default (no tensor)
                state.layouts[node] = None
            elif node.op == "placeholder":
                channels = shape(node)[1]
                state.layouts[node] = Plain(channels)
                state.maps[node] = state.identity_maps[node] = ChannelMap.identity(channels)
            elif node.op == "get_attr":
                state.layouts[node] = None
            elif node.op == "output":
                self._finish(node)
            else:
                self._visit(node)
            value = state.layouts.get(node)
            state.plan.values[node.name] = None if isinstance(value, Parts) else value   # a tuple, not a tensor
        state.gm.graph.lint()
        state.gm.recompile()

    def _visit(self, node: fx.Node) -> None:
        state = self.state
        rule = rule_for(node, state.module(node) if node.op == "call_module" else None)
        inputs = [state.layouts.get(arg) for arg in node.all_input_nodes]
        step = Step(node, inputs, self.ctx)
        if rule is None and shape(node) is None and all(layout is None for layout in inputs):
            rule = no_tensor   # arithmetic on sizes and other non-tensor values
        if rule is None:
            raise step.refuse("No layout rule for this op", CONVERT_UP_TO)
        layout = rule(step)
        state.layouts[node] = layout
        if node not in state.maps:
            state.maps[node] = self._carried_map(node, layout, state.maps)
            self._note_unfed(node)
        if node not in state.identity_maps:
            state.identity_maps[node] = self._carried_map(node, layout, state.identity_maps)

    def _note_unfed(self, node: fx.Node) -> None:
        """Say when taking a part of a value left some of its channels standing for no original channel."""
        taken, whole = self.state.maps.get(node), self.state.maps.get(node.args[0]) if node.args else None
        if node.target is operator.getitem and taken is not None and isinstance(whole, ChannelMap):
            bounds = part_bounds(node, self.state.layouts)
            lost = taken.unfed - (whole.source[bounds[0]:bounds[1]] < 0).sum().item() if bounds else 0
            if lost > 0:
                self.state.plan.notes.append(
                    f"{lost} of the {taken.new} channels of '{node.name}' stand for original channels of the other "
                    "part (a channel shuffle, or a cut moved to an orbit boundary, moved them across the cut): weights "
                    "read from them start at zero")

    def _carried_map(self, node: fx.Node, layout: Layout | None, maps: dict[fx.Node, ChannelMap]) -> ChannelMap | None:
        """The channel map of a node that does not choose channels: carried from its inputs'."""
        state = self.state
        sources = [maps.get(arg) for arg in node.all_input_nodes if state.layouts.get(arg) is not None]
        if layout is None or not sources:
            return None
        pools = node.op == "call_module" and isinstance(state.module(node), OrbitPool)
        flattens = isinstance(layout, Flat) and not isinstance(state.layouts[node.all_input_nodes[0]], Flat)
        part = part_bounds(node, state.layouts) if node.target is operator.getitem else None
        reorder = shuffle_orders(node, sources[0].new)
        return carried_map(node, sources, maps, pool_order=state.group.order if pools else None,
                           positions=layout.height * layout.width if flattens else None, part=part, reorder=reorder)

    def _finish(self, output: fx.Node) -> None:
        """Pool orbit outputs so they are invariant, and check each output suits the ``head`` option."""
        state, order = self.state, self.state.group.order
        for result in output.all_input_nodes:
            layout = state.layouts.get(result)
            if isinstance(layout, Orbit):
                pool = insert_pool(state.gm, result, "output_orbit_pool", order)
                state.layouts[pool] = Plain(layout.orbits)
                state.maps[pool] = state.maps[result].pooled(order)
                state.identity_maps[pool] = state.identity_maps[result].pooled(order)
                state.plan.notes.append(f"the output of '{result.name}' is orbit-pooled to make it invariant")
                result = pool
            self._check_head(result)

    def _check_head(self, result: fx.Node) -> None:
        spatial = len(shape(result) or ()) > 2
        if self.head == "invariant" and spatial:
            raise OptionError(f"The model's output '{result.name}' is a spatial map, so it can be equivariant "
                              "but not invariant", where="option head",
                              fix="use head='map' (--head map) for dense outputs such as masks")
        if self.head == "map" and not spatial:
            raise OptionError(f"The model's output '{result.name}' has no spatial axes", where="option head",
                              fix="use head='invariant' for classifiers")
