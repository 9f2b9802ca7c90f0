"""Reductions: means, sums, variances, norms and extremes over axes of a value (docs/design.md §5).

A reduction is a symmetric function of the entries it reduces, so it commutes with every group
element that permutes those entries among themselves and leaves the other axes' positions alone:

* over **all spatial axes** (a global pool, the L2 norm over the map of a global response norm) a
  group element only moves pixels among the reduced ones: the channels keep their layout;
* over the **channel axis** (the statistics of a norm written out by hand, ``torch.var(x, dim=-1,
  keepdim=True)`` of a channels-last map, or a mean over channels) a group element only permutes the
  reduced channels: the result is one plain channel (:class:`~orbify.symmetry.layouts.Plain` of 1,
  at the position of the channel axis) that multiplies or divides the value by broadcasting;
* over both, one plain channel of one pixel.

Over one spatial axis but not the other (a quarter turn swaps them), or over the batch, nothing
keeps; those are refused, as is a channel reduction without ``keepdim`` (the channel axis would be
gone, and with it where the value broadcasts). A mean over the tokens of a token sequence is
:func:`orbify.graph.tokens.token_mean`'s; other reductions of token sequences are refused.

The rules here are registered in :mod:`orbify.graph.rules` (:data:`REDUCTION_FUNCTIONS`,
:data:`REDUCTION_METHODS`); this module does not import it.
"""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING

import torch
from torch import fx

from orbify.graph.tokens import token_mean
from orbify.graph.tracing import shape
from orbify.symmetry.layouts import Flat, Layout, Orbit, Permuted, Plain, Tokens, unpermuted

if TYPE_CHECKING:
    from orbify.graph.rules import Step

_STOP = "convert only up to the node before it (--stop-at)"

CHANNEL_STATISTIC = "orbify_channel_statistic"
"""The node meta key marking a reduction over the channel axis: its one channel stands for the original's one channel
(:func:`is_channel_statistic`), whatever channels it was computed from."""

#: Positions of the ``dim`` and ``keepdim`` arguments, by op (the functions take the input first as well).
_POSITIONS = {
    **{name: (1, 2) for name in ("mean", "sum", "amax", "amin", "logsumexp", "nansum", "nanmean")},
    **{name: (1, 3) for name in ("var", "std")},   # var(input, dim, unbiased, keepdim)
    "norm": (2, 3),                                  # norm(input, p, dim, keepdim)
    "vector_norm": (2, 3),                           # linalg.vector_norm(input, ord, dim, keepdim)
}


def reduction(step: Step) -> Layout | None:
    """A reduction over some axes of ``step``'s input: the layout of its result (see the module docstring)."""
    layout, node = step.layout, step.node
    if layout is None:   # a reduction of a model tensor
        return None
    name = node.target if isinstance(node.target, str) else _FUNCTION_NAMES[node.target]
    if isinstance(layout, Tokens):
        if name == "mean":
            return token_mean(step)
        raise step.refuse(f"A {name} over a token sequence", f"average over the tokens, or {_STOP}")
    dims, keepdim = _reduced_axes(step, name)
    logical = _logical_axes(step, layout)
    reduced = {logical[d] for d in dims}
    spatial = set(logical) - {0, 1}
    if 0 in reduced:
        raise step.refuse(f"A {name} over dims {tuple(dims)} reduces the batch axis, mixing the samples",
                          f"reduce each sample by itself, or {_STOP}")
    if reduced & spatial and not spatial <= reduced:
        raise step.refuse(f"A {name} over dims {tuple(dims)} reduces one spatial axis without the other, which a "
                          "quarter turn swaps", f"reduce over the channels or over all spatial axes, or {_STOP}")
    if 1 not in reduced:
        return layout if keepdim or not isinstance(layout, Permuted) else unpermuted(layout)
    if not keepdim:
        raise step.refuse(f"A {name} over the channel axis without keepdim", f"keep the axis (keepdim=True), or {_STOP}")
    node.meta[CHANNEL_STATISTIC] = True
    return replace(layout, inner=Plain(1)) if isinstance(layout, Permuted) else Plain(1)


def is_channel_statistic(node: fx.Node) -> bool:
    """True for a node the rules found to reduce over the channel axis (its value is one plain channel)."""
    return bool(node.meta.get(CHANNEL_STATISTIC))


def _reduced_axes(step: Step, name: str) -> tuple[list[int], bool]:
    """The (non-negative) axes ``step`` reduces and whether it keeps them."""
    node = step.node
    dim_at, keep_at = _POSITIONS[name]
    dims = node.kwargs.get("dim", node.args[dim_at] if len(node.args) > dim_at else None)
    keepdim = node.kwargs.get("keepdim", node.args[keep_at] if len(node.args) > keep_at else False)
    rank = len(shape(node.args[0]) or ())
    if dims is None or dims == ():
        dims = range(rank)   # every axis, the batch among them
    dims = [dims] if isinstance(dims, int) else list(dims)
    if not rank or not all(isinstance(d, int) for d in dims) or not isinstance(keepdim, bool):
        raise step.refuse(f"A {name} whose axes are not constant", f"reduce over constant axes, or {_STOP}")
    return [d % rank for d in dims], keepdim


def _logical_axes(step: Step, layout: Layout) -> list[int]:
    """For every axis of the input: 0 batch, 1 channels, 2 and up the pixels (or tokens) in the usual order."""
    rank = len(shape(step.node.args[0]))
    if isinstance(layout, Permuted):
        return list(layout.dims)
    if isinstance(layout, (Plain, Orbit, Flat)):
        return list(range(rank))
    raise step.refuse(f"A reduction of a {layout} value", _STOP)


_FUNCTION_NAMES = {**{getattr(torch, name): name for name in _POSITIONS if name != "vector_norm"},
                   torch.linalg.vector_norm: "vector_norm"}
REDUCTION_FUNCTIONS = {function: reduction for function in _FUNCTION_NAMES}
"""Function rules of this module, added to :data:`orbify.graph.rules.FUNCTION_RULES`."""
REDUCTION_METHODS = {name: reduction for name in _POSITIONS if name != "vector_norm"}
"""Tensor method rules of this module, added to :data:`orbify.graph.rules.METHOD_RULES`."""
