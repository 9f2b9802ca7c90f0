"""Channels-last blocks: permuted axes and per-channel parameters (docs/design.md §5).

Some blocks move the channels to the last axis (``x.permute(0, 2, 3, 1)``), apply a LayerNorm and
Linear layers over that axis and move them back. A group element permutes channels and moves pixels
wherever those axes are, so the value keeps its layout with the axes recorded
(:class:`~orbify.symmetry.layouts.Permuted`); permuting back gives the layout itself again. The
norm and linear layers over the last axis are converted like their channels-first forms
(:mod:`orbify.conversion.norms`, :mod:`orbify.conversion.layer_builder`).

Such blocks often multiply their output by a *per-channel parameter* (a layer scale of shape (C, 1, 1)
or (C,)) that reaches the graph as a ``get_attr`` operand of ``mul``. A tensor that is not computed
from the input has no layout, and multiplying or adding it keeps the op equivariant only when it is
the same on every slot of an orbit: :func:`tie_constant_operands` (called by the elementwise rule)
has such a parameter tied per orbit through the conversion context, lets tensors that broadcast over
channels and pixels pass, and refuses the rest.

The rules here are registered in :mod:`orbify.graph.rules` (:data:`FUNCTION_RULES`, :data:`METHOD_RULES`);
this module does not import it.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import torch
from torch import fx

from orbify.graph.tracing import shape
from orbify.symmetry.layouts import Flat, Layout, Orbit, Permuted, Plain, unpermuted

if TYPE_CHECKING:
    from orbify.graph.rules import Step

_STOP_BEFORE = "or convert only up to the node before it (--stop-at)"

#: Ops that reshape a parameter without reordering its entries (the path from a ``get_attr`` to its use).
_SHAPING = {
    *(("call_method", name) for name in ("reshape", "view", "unsqueeze", "squeeze", "flatten", "permute", "movedim",
                                         "contiguous", "float", "double", "half", "to", "type")),
    *(("call_function", fn) for fn in (torch.reshape, torch.unsqueeze, torch.squeeze, torch.flatten, torch.permute,
                                       torch.movedim)),
}


TENSOR_HOLDER = "channel_tensors"
"""The child module that takes the top module's tensors (per-channel and token tensors) when they are tied: a
``get_attr`` of tensor ``name`` of the top module then reads ``TENSOR_HOLDER.name``."""


@dataclass(frozen=True)
class ChannelParameter:
    """A model tensor multiplied or added into a value per channel: the ``get_attr`` node ``attribute`` (its
    tensor has size 1 on every axis but one), the ops ``shaping`` it on the way (reshape, view, ...) and the
    ``layout`` of the value's channels (an orbit layout, axes in the usual order)."""

    attribute: fx.Node
    shaping: tuple[fx.Node, ...]
    layout: Orbit


# -- permute / movedim -----------------------------------------------------------------------------
def permute(step: Step) -> Layout | None:
    """``x.permute(dims)`` / ``torch.permute(x, dims)``: the layout follows the channel axis."""
    node = step.node
    dims = node.kwargs.get("dims", node.args[1:])
    if len(dims) == 1 and isinstance(dims[0], Sequence):
        dims = dims[0]
    return _reordered(step, dims)


def movedim(step: Step) -> Layout | None:
    """``x.movedim(source, destination)`` (and ``moveaxis``): the layout follows the channel axis."""
    node = step.node
    source = node.kwargs.get("source", node.args[1] if len(node.args) > 1 else None)
    destination = node.kwargs.get("destination", node.args[2] if len(node.args) > 2 else None)
    rank = len(shape(node.args[0]) or ())
    source, destination = ([d] if isinstance(d, int) else list(d or ()) for d in (source, destination))
    if not rank or not all(isinstance(d, int) for d in source + destination) or len(source) != len(destination):
        raise step.refuse("A movedim whose axes are not constant", f"move constant axes, {_STOP_BEFORE}")
    moved = {d % rank: s % rank for s, d in zip(source, destination)}
    rest = iter(axis for axis in range(rank) if axis not in moved.values())
    return _reordered(step, [moved[axis] if axis in moved else next(rest) for axis in range(rank)])


def _reordered(step: Step, dims: Sequence) -> Layout | None:
    """The layout of ``step``'s input with its axes reordered by ``dims`` (output axis i ← input axis dims[i])."""
    layout = step.layout
    if layout is None:   # a parameter or constant being reshaped
        return None
    rank = len(shape(step.node.args[0]) or ())
    if not rank or len(dims) != rank or not all(isinstance(d, int) for d in dims):
        raise step.refuse("A permute whose axes are not constant", f"permute by constant axes, {_STOP_BEFORE}")
    dims = tuple(d % rank for d in dims)
    if not isinstance(unpermuted(layout), (Plain, Orbit)):
        raise step.refuse(f"Permuting the axes of a {layout} value", f"permute channel maps only, {_STOP_BEFORE}")
    if dims[0] != 0:
        raise step.refuse(f"A permute {dims} that moves the batch axis", f"keep the batch axis first, {_STOP_BEFORE}")
    before = layout.dims if isinstance(layout, Permuted) else tuple(range(rank))
    after = tuple(before[d] for d in dims)
    inner = unpermuted(layout)
    return inner if after == tuple(range(rank)) else Permuted(inner, after)


# -- tensors that are not computed from the input --------------------------------------------------
def constant_operands(step: Step) -> Iterator[tuple[fx.Node, tuple[int, ...], set[int]]]:
    """The operands of ``step``'s op not computed from the input (parameters, buffers, constants: no layout) with
    their shapes and the axes of the op's output along which each varies (size > 1, broadcasting aligned right)."""
    out = shape(step.node)
    for operand in step.node.args:
        if not isinstance(operand, fx.Node) or step.arg_layout(operand) is not None or shape(operand) is None:
            continue
        operand_shape = tuple(shape(operand))
        offset = len(out) - len(operand_shape)
        yield operand, operand_shape, {offset + axis for axis, size in enumerate(operand_shape) if size > 1}


def tie_constant_operands(step: Step, layout: Layout | None) -> None:
    """Check the operands without a layout of an elementwise op whose output has ``layout``.

    Such an operand (a parameter, buffer or constant) that broadcasts over channels and pixels passes.
    One that varies along the channel axis only is a per-channel parameter: on plain channels it needs
    nothing, on orbit channels the context ties it per orbit (``step.ctx.tie_channel_parameter``). One
    that varies over pixels, or over the features of a flattened map, is refused.
    """
    if layout is None or shape(step.node) is None:
        return
    channel_axis = layout.channel_axis if isinstance(layout, Permuted) else 1
    for operand, operand_shape, varying in constant_operands(step):
        if not varying:
            continue
        if varying != {channel_axis} or isinstance(layout, Flat):
            where = "per feature of a flattened map" if isinstance(layout, Flat) else "over pixels or the batch"
            raise step.refuse(f"'{operand.name}' (shape {operand_shape}), a tensor not computed from the input, "
                              f"varies {where}, which no group element leaves in place",
                              f"use a tensor of one value per channel (or one value), {_STOP_BEFORE}")
        inner = unpermuted(layout)
        if isinstance(inner, Orbit):
            step.ctx.tie_channel_parameter(step, _channel_parameter(step, operand, inner))


def _channel_parameter(step: Step, operand: fx.Node, layout: Orbit) -> ChannelParameter:
    """The model tensor behind a per-channel operand, found through the ops that only reshape it."""
    node, shaping = operand, []
    while node.op != "get_attr":
        if (node.op, node.target) not in _SHAPING or len(node.all_input_nodes) != 1:
            raise step.refuse(f"'{operand.name}' varies per channel but is not a model parameter or buffer (or one "
                              "reshaped), so it cannot be tied per orbit",
                              f"multiply by a parameter (reshaped with view/reshape/unsqueeze), {_STOP_BEFORE}")
        shaping.append(node)
        node = node.all_input_nodes[0]
    if sum(size > 1 for size in shape(node)) != 1:
        raise step.refuse(f"The parameter '{node.target}' (shape {tuple(shape(node))}) has more than one axis of "
                          "more than one entry", f"use a parameter of one value per channel, {_STOP_BEFORE}")
    return ChannelParameter(node, tuple(shaping), layout)


CHANNELS_LAST_FUNCTIONS = {torch.permute: permute, torch.movedim: movedim, torch.moveaxis: movedim}
"""Function rules of this module, added to :data:`orbify.graph.rules.FUNCTION_RULES`."""
CHANNELS_LAST_METHODS = {"permute": permute, "movedim": movedim, "moveaxis": movedim}
"""Tensor method rules of this module, added to :data:`orbify.graph.rules.METHOD_RULES`."""
