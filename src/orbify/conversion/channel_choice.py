"""Which original channels feed each output channel of a conv / linear layer (its output channel map).

Under the identity assignment the budget decides (:func:`orbify.transfer.channels.budget_source`).
With channel matching on, the channels of a whole channel class (the layers whose outputs are
added together) are chosen once, jointly, by :func:`orbify.transfer.matching.match_channels`.
"""

from __future__ import annotations

import torch
from torch import fx
from torch.nn.utils import parametrize

from orbify.conversion.layer_builder import FedWeight, LayerBuilder, MatchedWeight, TiedLayer, channels_of
from orbify.conversion.output_widths import output_width, part_source
from orbify.conversion.state import ConversionState
from orbify.errors import OrbifyError
from orbify.graph.attention_heads import head_projection
from orbify.graph.orbit_cuts import PART_ORBITS
from orbify.symmetry.layouts import Layout, Orbit, Plain
from orbify.transfer.channels import ChannelMap, budget_source
from orbify.transfer.kinds import chooses_channels
from orbify.transfer.matching import ChannelClasses, MatchTerm, match_channels


class ChannelChooser:
    """The output channel maps of one conversion's layers, chosen once per channel class under matching."""

    def __init__(self, state: ConversionState, builder: LayerBuilder):
        self.state = state
        self.builder = builder
        self.classes = ChannelClasses(state.gm) if state.matching else None
        self.class_maps: dict[int, ChannelMap] = {}

    def output_maps(self, node: fx.Node, layer: TiedLayer) -> tuple[ChannelMap, ChannelMap]:
        """The maps of ``node``'s output: the one in use (chosen by matching, if on) and the identity one."""
        state = self.state
        in_node = node.all_input_nodes[0]
        if layer.depthwise:   # channels follow the input channels
            return state.maps[in_node], state.identity_maps[in_node]
        channels = channels_of(layer.old)[1]
        if head_projection(node) and layer.lout.size(state.group) == channels:   # the original's heads, in order
            return ChannelMap.identity(channels), ChannelMap.identity(channels)
        identity_map = self._map(layer.lout, self._identity_source(node, layer.lout, channels), channels)
        chosen = self._chosen_map(node, layer, identity_map) if state.matching else identity_map
        return chosen, identity_map

    def _identity_source(self, node: fx.Node, layout: Layout, channels: int) -> torch.Tensor:
        """The original channel of every output position of ``node`` under the budget. Where the output width was
        decided by the graph around it (:func:`orbify.conversion.output_widths.output_width`): a split output holds
        the budget's positions part by part (and the split is told their orbits, :data:`PART_ORBITS`); an output
        as wide as a value it is combined with holds that value's channels in its positions."""
        if isinstance(layout, Plain):
            return torch.arange(channels)
        state = self.state
        order, budget = state.group.order, state.budget
        width = output_width(node, channels, state)
        if width.orbits == layout.orbits and width.split is not None:
            width.split.meta[PART_ORBITS] = [orbits for _, orbits in width.parts]
            return part_source(width.parts, lambda part, orbits: budget_source(part, orbits, order, budget))
        if width.orbits == layout.orbits and width.partner is not None:
            return state.identity_maps[width.partner].source
        return budget_source(channels, layout.orbits, order, budget)

    def _map(self, layout: Layout, source: torch.Tensor, channels: int) -> ChannelMap:
        """The map of a layer output: embedded (slot 0 feeds on) for ``embed`` orbits, else copies share."""
        if self.state.init == "embed" and isinstance(layout, Orbit):
            return ChannelMap.embedded(source, channels, self.state.group.order)
        return ChannelMap.from_source(source, channels)

    def _chosen_map(self, node: fx.Node, layer: TiedLayer, identity_map: ChannelMap) -> ChannelMap:
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
            matched = [(self.builder.layers[other], term) for other in self.classes.producers(node)
                       if (term := self._match_term(other, layer.lout))]
            if matched:
                result = match_channels([term for _, term in matched], identity_map.source, blocks)
                layer.notes.extend(result.notes)
                chosen = self._map(layer.lout, result.source, channels_of(layer.old)[1])
                if result.bases is not None:
                    for (other, _), base, residual in zip(matched, result.bases, result.residuals):
                        other.matched = MatchedWeight(result.source, base, residual)
        self.class_maps[key] = chosen
        return chosen

    def _match_term(self, node: fx.Node, lout: Layout) -> MatchTerm | None:
        """What matching needs from a layer of the class: None if its input is not converted yet."""
        in_node = node.all_input_nodes[0]
        if in_node not in self.state.maps or not chooses_channels(self.state.module(node)):
            return None
        try:
            layer = self.builder.layer(node, None)
        except OrbifyError:   # reported at the layer's own turn
            return None
        if layer.lout != lout or not parametrize.is_parametrized(layer.new, "weight"):
            return None
        tying = layer.new.parametrizations.weight[0]
        in_map = self.state.maps[in_node]
        layer.fed = FedWeight(in_map, layer.weight(in_map, None))
        return MatchTerm(layer.fed.weight, tying, layer.transposed)
