"""Attention over channels and over positions: pooled channel vectors, a 1-D conv along the channels, weighted
pooling over positions (docs/design.md §5).

* **Pooled channel vectors.** A value whose axes other than the batch and the channels all have size one (the
  (B, C) mean of a map, its (B, C, 1, 1) or (B, 1, C) forms) is moved by a group element only through its channels.
  ``view``/``reshape``, ``unsqueeze``, ``squeeze`` and ``transpose`` that keep such a value a vector only move its
  channel axis, never reorder the channels: the layout follows the axis (a :class:`Permuted` one when the channels
  are not on axis 1). ``y.expand_as(x)`` of a vector to a map of the same channels is that map's layout.
* **A conv along the channels** (efficient channel attention: ``nn.Conv1d(1, 1, k)`` over the (B, 1, C) vector)
  mixes neighbouring channels, which a slot permutation does not respect. Its tied counterpart runs the same kernel
  along the *orbit* index, slot by slot (channel o·|G| + s mixes slot s of orbits o − p … o + p): a slot
  permutation then commutes with it (``ctx.convert_channel_conv``; :func:`orbify.layers.orbitwise.orbitwise_conv1d`).
  The kernel is carried as is, but it now reads other channels than the original's: the plan notes it
  (:data:`ORBITWISE_NOTE`).
* **Weighted pooling over positions** (global context attention: a conv to one channel, flattened to (B, 1, H·W),
  ``softmax`` over the positions, then ``x.reshape(B, C, H·W).unsqueeze(1) @ weights.unsqueeze(3)``). The conv
  writing the weights keeps one plain channel (:func:`position_weights`: one invariant weight map, as the
  reshape to one channel needs); ``unsqueeze`` of token values gives attention values
  (:class:`~orbify.symmetry.layouts.HeadValues`), whose product (:func:`orbify.graph.attention_heads.matmul`)
  sums over the positions, which the group only permutes, and leaves a (B, 1, C, 1) channel vector.

The rules here are registered in :mod:`orbify.graph.rules`; this module does not import it.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import replace
from typing import TYPE_CHECKING

import torch
import torch.nn.functional as F
from torch import fx, nn

from orbify.graph.attention_heads import softmax
from orbify.graph.tracing import shape
from orbify.symmetry.layouts import HeadValues, Layout, Orbit, Permuted, Plain, Tokens, unpermuted

if TYPE_CHECKING:
    from orbify.graph.rules import Step

    Rule = Callable[[Step], Layout | None]

_STOP_BEFORE = "or convert only up to the node before it (--stop-at)"

ORBITWISE_NOTE = ("1-D convs along the channels (efficient channel attention) run their kernels along the orbits, "
                  "slot by slot, so that they commute with the slot permutations: each channel now mixes the same "
                  "slot of the neighbouring orbits where the original mixed neighbouring channels (kernels carried as "
                  "is; tuning adapts them)")
"""The note on a converted 1-D conv along the channels (on its layer, and in the plan's notes followed by the list of
such convs): what it computes differently from the original."""

POSITION_WEIGHTS_NOTE = ("one output channel kept plain: one weight per position for every slot (the original filter "
                         "averaged over the group's motions), so with init 'embed' this block is not exactly the "
                         "original's averaged over the group")
"""The note on a conv writing the weights of a pooling over positions (:func:`position_weights`)."""


# -- pooled channel vectors ------------------------------------------------------------------------
def vector_axis(layout: Layout | None, size: tuple[int, ...] | None) -> int | None:
    """The axis holding the channels when ``layout`` and the shape ``size`` make a pooled channel vector (every axis
    but the batch and the channels of size one); None for other values."""
    if size is None or len(size) < 2:
        return None
    if isinstance(layout, (Plain, Orbit)):
        axis = 1
    elif isinstance(layout, Permuted) and not isinstance(layout, Tokens) and isinstance(layout.inner, (Plain, Orbit)):
        axis = layout.channel_axis
    elif isinstance(layout, HeadValues) and not layout.token_axes and layout.channel_axis is not None:
        axis = layout.channel_axis
    else:
        return None
    return axis if all(n == 1 for i, n in enumerate(size) if i not in (0, axis)) else None


def vector_layout(inner: Layout, rank: int, axis: int) -> Layout:
    """The layout of a pooled vector of ``rank`` axes whose channels (of layout ``inner``) are on ``axis``."""
    if axis == 1:
        return inner
    others = [a for a in range(rank) if a != 1]
    return Permuted(inner, tuple(others[:axis] + [1] + others[axis:]))


def _moved_vector(step: Step, axis: int | None) -> Layout:
    """The layout of ``step``'s output: its input's channels on ``axis``; refused when the batch axis moves."""
    out = shape(step.node)
    if axis is None or axis == 0 or out is None:
        raise step.refuse("An op that moves the batch axis of a pooled channel vector",
                          f"keep the batch axis first, {_STOP_BEFORE}")
    return vector_layout(unpermuted(step.layout), len(out), axis)


def _dims(step: Step, name: str, position: int) -> tuple[int, ...] | None:
    """The constant axis argument ``name`` (positional at ``position``) as a tuple; None when absent."""
    node = step.node
    value = node.kwargs.get(name, node.args[position] if len(node.args) > position else None)
    if value is None:
        return None
    values = (value,) if isinstance(value, int) else tuple(value)
    if not all(isinstance(v, int) for v in values):
        raise step.refuse("An axis argument that is not constant", f"use constant axes, {_STOP_BEFORE}")
    return values


def _reshapes_vector(step: Step) -> bool:
    """True when a view/reshape takes a pooled vector of C > 1 channels to a shape with one axis of C entries."""
    in_shape, out_shape = shape(step.node.args[0]), shape(step.node)
    axis = vector_axis(step.layout, in_shape)
    if axis is None or out_shape is None or in_shape[axis] == 1 or out_shape[0] != in_shape[0]:
        return False
    return sum(n != 1 for n in out_shape[1:]) == 1 and in_shape[axis] in out_shape[1:]


def vector_reshape(step: Step) -> Layout:
    """``view``/``reshape`` of a pooled vector to another vector shape: the channels go where the C entries are."""
    out_shape = shape(step.node)
    return _moved_vector(step, 1 + [n != 1 for n in out_shape[1:]].index(True))


def unsqueeze(step: Step) -> Layout | None:
    """``unsqueeze(d)``: a model tensor has no layout; a pooled vector keeps its channels; a token value or attention
    value gets one more axis (an attention value: :class:`HeadValues`)."""
    layout, in_shape = step.layout, shape(step.node.args[0])
    if layout is None:
        return None
    rank = len(in_shape or ())
    dim = _dims(step, "dim", 1)[0] % (rank + 1)

    def shifted(axis: int) -> int:
        return axis + (axis >= dim)

    if isinstance(layout, Tokens):
        channels = shifted(layout.channel_axis) if isinstance(layout.inner, Orbit) else None   # plain: not moved
        return HeadValues(layout.inner, layout.height, layout.width, layout.prefix, rank + 1,
                          (shifted(layout.token_axis),), channels)
    if isinstance(layout, HeadValues):
        return replace(layout, rank=rank + 1, token_axes=tuple(shifted(a) for a in layout.token_axes),
                       channel_axis=None if layout.channel_axis is None else shifted(layout.channel_axis))
    axis = vector_axis(layout, in_shape)
    if axis is None:
        raise step.refuse(f"An unsqueeze of a {layout} value", "unsqueeze pooled channel vectors, token values or "
                          f"attention values, {_STOP_BEFORE}")
    return _moved_vector(step, None if dim == 0 else shifted(axis))


def squeeze(step: Step) -> Layout | None:
    """``squeeze(d)`` of a pooled vector along named axes of size one (never the batch axis)."""
    layout, in_shape = step.layout, shape(step.node.args[0])
    if layout is None:
        return None
    axis, dims = vector_axis(layout, in_shape), _dims(step, "dim", 1)
    if axis is None or dims is None:
        raise step.refuse(f"A squeeze of a {layout} value, or of all its axes of size one",
                          f"squeeze named axes of a pooled channel vector, {_STOP_BEFORE}")
    gone = {d % len(in_shape) for d in dims if in_shape[d] == 1}
    return _moved_vector(step, None if 0 in gone else axis - sum(d < axis for d in gone))


def _transposes_vector(step: Step) -> bool:
    return vector_axis(step.layout, shape(step.node.args[0])) is not None


def vector_transpose(step: Step) -> Layout:
    """``transpose(a, b)`` of a pooled vector: the channels follow their axis."""
    rank = len(shape(step.node.args[0]))
    a, b = (d % rank for d in (_dims(step, "dim0", 1) + _dims(step, "dim1", 2)))
    axis = vector_axis(step.layout, shape(step.node.args[0]))
    return _moved_vector(step, None if 0 in (a, b) else {a: b, b: a}.get(axis, axis))


def expand_as(step: Step) -> Layout | None:
    """``y.expand_as(x)`` of a pooled vector to a value ``x`` whose channels lie on the same axis in the same layout:
    ``x``'s layout (a group element moves the copies as it moves ``x``); a model tensor: no layout."""
    y, x = step.node.args[:2]
    layout, target = step.arg_layout(y), step.arg_layout(x)
    if layout is None:
        return None
    axis = vector_axis(layout, shape(y))
    target_axis = target.channel_axis if isinstance(target, Permuted) else 1
    if axis is None or not isinstance(target, (Plain, Orbit, Permuted)) or isinstance(target, Tokens) or \
            axis != target_axis or unpermuted(layout) != unpermuted(target) or len(shape(y)) != len(shape(x)):
        raise step.refuse(f"Expanding a {layout} value as a {target} value",
                          f"expand a pooled channel vector over the map it was pooled from, {_STOP_BEFORE}")
    return target


# -- efficient channel attention: a 1-D conv along the channels ---------------------------------
def channel_conv(step: Step) -> Layout:
    """``nn.Conv1d(1, 1, k)`` along the channels of a (B, 1, C) pooled vector, keeping its length: unchanged on plain
    channels, run along the orbits slot by slot on orbit channels (``ctx.convert_channel_conv``)."""
    node, layout = step.node, step.layout
    conv = node.graph.owning_module.get_submodule(node.target)
    in_shape = shape(node.args[0])
    if vector_axis(layout, in_shape) != 2 or len(in_shape) != 3:
        raise step.refuse("A 1-D conv over a value other than a pooled channel vector (B, 1, C)",
                          f"run 1-D convs along pooled channels only, {_STOP_BEFORE}")
    if (conv.in_channels, conv.out_channels, conv.groups, conv.stride) != (1, 1, 1, (1,)) or \
            tuple(shape(node)) != tuple(in_shape):
        raise step.refuse("A 1-D conv along the channels with more than one conv channel, or one that changes the "
                          "number of channels", f"use nn.Conv1d(1, 1, k, padding=k // 2), {_STOP_BEFORE}")
    if isinstance(unpermuted(layout), Plain):
        return layout
    return step.ctx.convert_channel_conv(step)


# -- weighted pooling over positions ----------------------------------------------------------------
_FLATTENS = {("call_method", "view"), ("call_method", "reshape"), ("call_function", torch.reshape),
             ("call_method", "flatten"), ("call_function", torch.flatten)}


def position_weights(node: fx.Node) -> bool:
    """True for a layer writing one channel (B, 1, H, W) that a reshape flattens into one value per position
    (B, 1, H·W): the weights of a pooling over positions, kept as one plain (invariant) channel."""
    out = shape(node)
    if out is None or len(out) != 4 or out[1] != 1:
        return False
    return any((user.op, user.target) in _FLATTENS and tuple(shape(user) or ()) == (out[0], 1, out[2] * out[3])
               for user in node.users)


def _first(applies: Callable[[Step], bool], rule: Rule, fallback: Rule) -> Rule:
    """A rule that applies ``rule`` where ``applies`` holds and ``fallback`` elsewhere."""
    return lambda step: rule(step) if applies(step) else fallback(step)


def channel_attention_methods(before: Mapping[str, Rule]) -> dict[str, Rule]:
    """The tensor method rules of this module, added to :data:`orbify.graph.rules.METHOD_RULES`: ``view``,
    ``reshape`` and ``transpose`` of pooled vectors are taken here, of other values left to the rules ``before``."""
    return {"view": _first(_reshapes_vector, vector_reshape, before["view"]),
            "reshape": _first(_reshapes_vector, vector_reshape, before["reshape"]),
            "transpose": _first(_transposes_vector, vector_transpose, before["transpose"]),
            "unsqueeze": unsqueeze, "squeeze": squeeze, "expand_as": expand_as, "log_softmax": softmax}


def channel_attention_functions(before: Mapping[object, Rule]) -> dict[object, Rule]:
    """The function rules of this module, added to :data:`orbify.graph.rules.FUNCTION_RULES` (``torch.transpose``
    of pooled vectors taken here, of other values left to the rule ``before``)."""
    return {torch.transpose: _first(_transposes_vector, vector_transpose, before[torch.transpose]),
            torch.unsqueeze: unsqueeze, torch.squeeze: squeeze, F.log_softmax: softmax, torch.log_softmax: softmax}


CHANNEL_ATTENTION_MODULES = {nn.Conv1d: channel_conv}
"""Module rules of this module, added to :data:`orbify.graph.rules.MODULE_RULES`."""
