"""What a calibrated conversion refits: its layers, in stages, and the original channels every value carries.

Orbit o of a layer with orbit outputs stands for one kept original channel
(:mod:`orbify.calibration.selection`), so the channel map of every value follows from the kept
channels: a layer's output carries its kept channels (every slot of an orbit the same one), and
other ops carry their inputs' maps on (:func:`orbify.transfer.channels.carried_map`). From the maps
come each layer's refit targets: the original output channel every fitted row must reproduce.
"""

from __future__ import annotations

import operator
from collections.abc import Mapping

import torch
from torch import fx, nn
from torch.nn.utils import parametrize

from orbify.calibration.equations import LayerEquations
from orbify.calibration.selection import ChannelChoice, following_norm, out_channels
from orbify.graph.tracing import shape
from orbify.layers.tied import OrbitPool
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Flat, Layout
from orbify.transfer.channels import ChannelMap, carried_map
from orbify.transfer.kinds import LAYER_TYPES, chooses_channels


class RefitLayers:
    """The conv and linear layers of a converted model and the channels they keep.

    Args:
        converted: the converted model.
        view_graph: the original model as a graph with the converted graph's node names.
        batches: the calibration images (the kept-channel choice reads the first ones).
        group: the conversion's group.
        selection: how the kept channels are chosen ("reconstruction" or "importance").
        all_slots: the slots that plain-output layers (and the kept-channel choice) see.
        hidden_slots: the slots that layers with orbit outputs are fitted on.
        layouts: the layout of every value by node name (the plan's ``values``).

    ``layers`` are the layer nodes in graph order; ``choice`` the kept channels; ``maps`` the
    channel map of every value under them.
    """

    def __init__(self, converted: fx.GraphModule, view_graph: fx.GraphModule, batches: list[torch.Tensor],
                 group: Group, selection: str, all_slots: list[int], hidden_slots: list[int],
                 layouts: Mapping[str, Layout | None]):
        self.converted = converted
        self.view_graph = view_graph
        self.group = group
        self.all_slots = all_slots
        self.hidden_slots = hidden_slots
        self.layouts = layouts
        self.layers = [node for node in converted.graph.nodes
                       if node.op == "call_module" and isinstance(converted.get_submodule(node.target), LAYER_TYPES)]
        self.choice = ChannelChoice(converted, view_graph, self.layers, self.orbits, selection, batches, group,
                                    all_slots, layouts)
        self.maps = self._maps()

    def module(self, node: fx.Node) -> nn.Module:
        return self.converted.get_submodule(node.target)

    def orbits(self, node: fx.Node) -> int | None:
        """Output orbits of a layer node, None for plain outputs."""
        module = self.module(node)
        if parametrize.is_parametrized(module, "weight"):
            tying = module.parametrizations.weight[0]
            if tying.out_is_orbit:
                return tying.out_count
        return None

    def _maps(self) -> dict[fx.Node, ChannelMap | None]:
        """The channel map of every value under the kept channels (which original channel each converted one carries)."""
        maps: dict[fx.Node, ChannelMap | None] = {}
        order = self.group.order
        for node in self.converted.graph.nodes:
            module = self.module(node) if node.op == "call_module" else None
            if node.op == "placeholder":
                maps[node] = ChannelMap.identity(shape(node)[1])
            elif node.op in ("get_attr", "output") or not self._carries_channels(node):
                maps[node] = None
            elif chooses_channels(module):
                channels = out_channels(self.view_graph.get_submodule(node.target))
                maps[node] = (ChannelMap.identity(channels) if self.orbits(node) is None else
                              ChannelMap.from_source(self.choice.keep(node).repeat_interleave(order), channels))
            else:
                sources = [maps[arg] for arg in node.all_input_nodes if maps.get(arg) is not None]
                maps[node] = carried_map(node, sources, maps, pool_order=order if isinstance(module, OrbitPool) else None,
                                         positions=self._flattened_positions(node))
        return maps

    def _carries_channels(self, node: fx.Node) -> bool:
        """Whether a value carries channels, as the conversion found: it has a layout, it is a tuple whose parts have
        one (a split, an attention's outputs), or the conversion inserted it (an orbit pool)."""
        return (node.name not in self.layouts or self.layouts[node.name] is not None
                or any(user.target is operator.getitem and self.layouts.get(user.name) is not None
                       for user in node.users))

    def _flattened_positions(self, node: fx.Node) -> int | None:
        """Positions per channel when ``node`` flattens a spatial map (its layout flat, its input's not)."""
        layout = self.layouts.get(node.name)
        before = self.layouts.get(node.all_input_nodes[0].name) if node.all_input_nodes else None
        if isinstance(layout, Flat) and not isinstance(before, Flat):
            return layout.height * layout.width
        return None

    def stages(self) -> list[list[fx.Node]]:
        """Layers in graph order, grouped so that no layer of a stage reads a value computed after its first layer."""
        position = {node: i for i, node in enumerate(self.converted.graph.nodes)}
        stages: list[list[fx.Node]] = []
        for node in self.layers:
            if stages and position[node.args[0]] < position[stages[-1][0]]:
                stages[-1].append(node)
            else:
                stages.append([node])
        return stages

    def equations(self, node: fx.Node) -> LayerEquations:
        """The empty normal equations of a layer's refit (raises NotRefittable for layers that cannot be refitted)."""
        module = self.module(node)
        orbits = self.orbits(node)
        source = self.maps[node].source
        targets = source[::self.group.order] if orbits is not None else source
        slots = self.hidden_slots if orbits is not None else self.all_slots
        intercept = getattr(module, "bias", None) is not None or following_norm(node, self.converted) is not None
        return LayerEquations(module, self.group, targets, slots, intercept)
