"""Carrying the original weights into the new layers, and the weight residual it leaves.

A conv / linear gets the original weight with its rows picked by its output channel map and its
inputs fed through its input map, orbit-averaged by the tying (or, for ``embed``, copied into slot 0
of every orbit); its residual ``‖W − Π(W)‖ / ‖W‖`` is recorded, with the chosen and with the
identity assignment (the loading itself is :mod:`orbify.transfer.loading`'s).
"""

from __future__ import annotations

import torch
from torch import fx

from orbify.conversion.layer_builder import TiedLayer
from orbify.conversion.state import ConversionState
from orbify.graph.standardized_convs import load_gain
from orbify.symmetry.layouts import Orbit
from orbify.transfer.channels import ChannelMap
from orbify.transfer.loading import load_bias, load_weight, loaded_residual, tied_residual


def carry_layer_weights(state: ConversionState, layer: TiedLayer, in_node: fx.Node, out_map: ChannelMap,
                        identity_map: ChannelMap) -> tuple[float | None, float | None]:
    """Load ``layer.new``; return its weight residual as loaded and with the identity assignment."""
    in_map = state.maps[in_node]
    residual = _load(state, layer, in_map, out_map)
    if not state.matching:   # the identity assignment is the one loaded
        return residual, residual
    identity_in = state.identity_maps[in_node]
    if _same(in_map, identity_in) and _same(out_map, identity_map):
        return residual, residual
    return residual, tied_residual(layer.new, layer.weight(identity_in, identity_map.source), layer.transposed)


def _load(state: ConversionState, layer: TiedLayer, in_map: ChannelMap, out_map: ChannelMap) -> float | None:
    """Carry the original weight and bias into ``layer.new``; return the weight residual (None for embed)."""
    load_bias(layer.new, layer.old, out_map.source)
    load_gain(layer.new, layer.old, out_map.source)   # a scaled weight-standardized conv's gain
    matched = layer.matched
    if matched is not None and layer.fed.in_map is in_map and torch.equal(matched.source, out_map.source):
        with torch.no_grad():
            layer.new.parametrizations.weight.original.copy_(matched.base)   # Π found while matching
        return matched.residual
    embed = state.init == "embed" and isinstance(layer.lout, Orbit)
    weight = layer.weight(in_map, out_map.source[::state.group.order] if embed else out_map.source)
    load_weight(layer.new, weight, layer.transposed, slot_zero=embed)
    if state.init == "embed":
        return None
    return loaded_residual(layer.new, weight, layer.transposed)


def _same(a: ChannelMap, b: ChannelMap) -> bool:
    """True when two maps carry the same original channels to the same positions."""
    return a is b or (a.spatial == b.spatial and torch.equal(a.source, b.source) and a.inflow.shape == b.inflow.shape
                      and torch.equal(a.inflow.indices(), b.inflow.indices())
                      and torch.equal(a.inflow.values(), b.inflow.values()))


