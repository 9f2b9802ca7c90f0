"""How many orbits a layer's output gets where the graph cuts it, joins it with others or combines it elementwise
(docs/design.md §5, §7).

A layer of C output channels normally gets ``orbits_for(C)`` orbits (the budget). But values that
are added or multiplied must agree, and the budget of a whole is not the sum of the budgets of its
parts (two halves of 6 channels get 2 + 2 orbits under c4, 12 channels 3), so :func:`output_width`
decides, in this order:

1. **Combined with a converted value.** A layer whose output meets a value already converted in
   an elementwise op (through per-channel ops: norms, activations) takes that value's orbits where
   its own would differ: the shortcut conv added to a ghost module's concatenation of two rounded
   halves, the squeeze-excitation gate multiplied into it.
2. **A part of a concatenation.** A layer whose output is one part of a concatenation along
   channels whose every part is such a layer, when the concatenation meets a value already
   converted in an elementwise op, gets the orbits between the boundaries of its part
   (:func:`orbify.graph.orbit_cuts.orbit_boundaries`) in that value's width (mixed 1×1 convs then
   sum to the width of the shortcut they are added to).
3. **Only ever split.** A layer whose output reaches nothing but one split gets the budget per
   part (res2net's 8 parts of 14 channels become 8 × 4 orbits under c4, as wide as the 14-channel
   convs the parts are added to).
4. Otherwise the budget.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import accumulate

import torch
from torch import fx, nn

from orbify.conversion.state import ConversionState
from orbify.graph.channel_order import channel_slice
from orbify.graph.orbit_cuts import SPLITS, orbit_boundaries, part_sizes
from orbify.graph.plan import orbits_for
from orbify.graph.rules import affine_norm, batch_norm, elementwise, no_tensor, passthrough, rule_for, tied_layer
from orbify.graph.tracing import shape
from orbify.symmetry.layouts import HeadValues, Orbit, Permuted, unpermuted
from orbify.transfer.kinds import chooses_channels, is_depthwise


@dataclass(frozen=True)
class OutputWidth:
    """The orbits of a layer's output; ``partner``: the converted value whose width it took (rule 1), ``split`` and
    ``parts``: the split reading it and the (original width, orbits) of every part (rule 3)."""

    orbits: int
    partner: fx.Node | None = None
    split: fx.Node | None = None
    parts: tuple[tuple[int, int], ...] = ()


def output_width(node: fx.Node, channels: int, state: ConversionState) -> OutputWidth:
    """The orbits of the output of layer ``node`` (``channels`` original channels); see the module docstring."""
    own = orbits_for(channels, state.group, state.budget)
    partner = combined_partner(node, channels, state)
    if partner is not None and _orbits(state, partner) != own:
        return OutputWidth(_orbits(state, partner), partner=partner)
    joined = _joined_part(node, state)
    if joined is not None:
        return OutputWidth(joined)
    split = cut_widths(node, state)
    if split is not None:
        parts = tuple((width, orbits_for(width, state.group, state.budget) if width else 0) for width in split[1])
        return OutputWidth(sum(orbits for _, orbits in parts), split=split[0], parts=parts)
    return OutputWidth(own)


def part_source(parts: tuple[tuple[int, int], ...], source_of) -> torch.Tensor:
    """The original channel of every output position of a layer split into ``parts`` (original width, orbits):
    ``source_of(width, orbits)`` for each part (but empty ones), shifted to the part's original channels."""
    starts = accumulate((width for width, _ in parts), initial=0)
    return torch.cat([start + source_of(width, orbits) for start, (width, orbits) in zip(starts, parts) if orbits])


def combined_partner(value: fx.Node, channels: int, state: ConversionState) -> fx.Node | None:
    """A value of orbit layout and ``channels`` original channels that ``value`` meets in an elementwise op through
    ops keeping its channels, already converted or computed from one that is by such ops (and whole-value slices),
    else None."""
    while len(readers := tensor_users(value, state)) == 1:
        user = readers[0]
        if keeps_channels(user, value, state):
            value = user
            continue
        if _rule(user, state) is not elementwise:
            return None
        for other in user.all_input_nodes:
            converted = _converted_source(other, state) if other is not value else None
            if converted is not None and _channels(other, state.layouts[converted]) == channels:
                return converted
        return None
    return None


def keeps_channels(node: fx.Node, value: fx.Node, state: ConversionState) -> bool:
    """True for an op of the one varying tensor ``value`` (others constant, a per-channel scale, or not tensors, sizes)
    whose output holds the channels of ``value``: a norm, an activation, pooling or interpolation, a depthwise conv."""
    if value not in node.all_input_nodes or any(arg is not value and arg.op != "get_attr" and shape(arg) is not None
                                                for arg in node.all_input_nodes):
        return False
    module = state.module(node) if node.op == "call_module" else None
    rule = _rule(node, state)
    return rule in (passthrough, elementwise, batch_norm, affine_norm) or (rule is tied_layer and is_depthwise(module))


def cut_widths(layer: fx.Node, state: ConversionState) -> tuple[fx.Node, list[int]] | None:
    """The split reading ``layer``'s output and the original widths of its parts, when that value reaches nothing
    but one split (or chunk) along its channels through ops keeping them; else None (rule 3)."""
    value = layer
    while len(readers := tensor_users(value, state)) == 1:
        user = readers[0]
        if user.target in SPLITS:
            return _split_widths(layer, user, state)
        if not keeps_channels(user, value, state):
            return None
        value = user
    return None


def _split_widths(layer: fx.Node, split: fx.Node, state: ConversionState) -> tuple[fx.Node, list[int]] | None:
    """The split and its parts' widths when it cuts along the axis of ``layer``'s channels (the last for a Linear,
    else 1), else None."""
    in_shape = shape(split.args[0])
    dim = split.kwargs.get("dim", split.args[2] if len(split.args) > 2 else 0)
    if in_shape is None or len(in_shape) < 2 or not isinstance(dim, int):
        return None
    axis = len(in_shape) - 1 if isinstance(state.module(layer), nn.Linear) else 1
    return (split, part_sizes(split, in_shape[axis])) if dim % len(in_shape) == axis else None


def _converted_source(value: fx.Node, state: ConversionState) -> fx.Node | None:
    """``value`` if converted with an orbit layout; else the converted value it is computed from by ops keeping the
    channels and slices of the whole channel range (not walked yet); else None."""
    while value not in state.layouts:
        inputs = value.all_input_nodes
        if not inputs or not (_whole_slice(value) or keeps_channels(value, inputs[0], state)):
            return None
        value = inputs[0]
    return value if _is_orbits(state.layouts[value]) else None


def _whole_slice(node: fx.Node) -> bool:
    cut = channel_slice(node)
    return cut is not None and cut == (0, shape(node.args[0])[1])


def _joined_part(node: fx.Node, state: ConversionState) -> int | None:
    """The orbits of ``node``'s part of a concatenation of layers (rule 2), else None."""
    value = node
    while len(readers := tensor_users(value, state)) == 1 and keeps_channels(readers[0], value, state):
        value = readers[0]
    joins = [user for user in tensor_users(value, state) if user.target is torch.cat]
    if len(tensor_users(value, state)) != 1 or not joins or _cat_axis(joins[0]) != 1:
        return None
    join = joins[0]
    parts = list(join.args[0])
    if not all(_written_by_layer(part, state) for part in parts):
        return None
    cuts = list(accumulate((shape(part)[1] for part in parts), initial=0))
    partner = combined_partner(join, cuts[-1], state)
    bounds = orbit_boundaries(cuts, _orbits(state, partner)) if partner is not None else None
    if bounds is None:
        return None
    index = parts.index(value)
    return bounds[index + 1] - bounds[index]


def _written_by_layer(value: fx.Node, state: ConversionState) -> bool:
    """True when ``value`` is a channel-choosing layer's output, through ops keeping its channels read by nothing
    else."""
    while value.op != "call_module" or not chooses_channels(state.module(value)):
        tensors = [node for node in value.all_input_nodes if shape(node) is not None and node.op != "get_attr"]
        if len(tensors) != 1 or len(tensor_users(tensors[0], state)) != 1:
            return False
        if not keeps_channels(value, tensors[0], state):
            return False
        value = tensors[0]
    return len(tensor_users(value, state)) == 1


def tensor_users(value: fx.Node, state: ConversionState) -> list[fx.Node]:
    """The users of ``value`` but those reading its size or shape."""
    return [user for user in value.users if _rule(user, state) is not no_tensor]


def _rule(node: fx.Node, state: ConversionState):
    return rule_for(node, state.module(node) if node.op == "call_module" else None)


def _cat_axis(join: fx.Node) -> int | None:
    dim = join.kwargs.get("dim", join.args[1] if len(join.args) > 1 else 0)
    rank = len(shape(join) or ())
    return dim % rank if isinstance(dim, int) and rank else None


def _is_orbits(layout) -> bool:
    return isinstance(unpermuted(layout), Orbit) and not isinstance(layout, HeadValues)


def _channels(value: fx.Node, layout) -> int | None:
    """The original channel count of a value (along the channel axis of ``layout``)."""
    axis = layout.channel_axis if isinstance(layout, Permuted) else 1
    value_shape = shape(value)
    return value_shape[axis] if value_shape is not None and len(value_shape) > axis else None


def _orbits(state: ConversionState, value: fx.Node) -> int:
    return unpermuted(state.layouts[value]).orbits
