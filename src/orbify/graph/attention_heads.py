"""Attention written out with head reshapes: the layout rules of timm's ``Attention`` and its kind (docs/design.md §5).

Such attention projects the (B, N, C) tokens with one Linear to 3·C channels, reshapes them to (B, N, 3, heads,
head_dim), permutes them to (3, B, heads, N, head_dim) and unbinds the per-head queries, keys and values;
``scaled_dot_product_attention`` (or ``q @ k.transpose(-2, -1)``, ``softmax``, ``@ v``) attends, and a transpose
and a reshape give a (B, N, C) sequence back to the output projection. The values in between have the layout
:class:`~orbify.symmetry.layouts.HeadValues`: the axes that hold tokens and the one that holds a head's channels.

* The projection before the reshape keeps its width and the original's channel order (:func:`head_projection`
  tells the conversion which Linear that is), so the reshape cuts it at the original's head boundaries and the
  q, k and v of a head keep their channels. Every head must hold whole orbits (head_dim a multiple of |G|):
  a slot permutation then stays inside each head, alike in q, k and v; otherwise the reshape is refused naming
  the head widths that work.
* Reshapes, permutes, transposes and unbinds move axes; the layout follows the token and channel axes.
* q · k summed over a head's channels is unchanged when both are permuted alike, so ``q @ kᵀ`` (which contracts
  two channel axes of one layout) gives scores whose two token axes move with the grid; ``softmax`` along any
  axis commutes with permutations along each axis; ``scores @ v`` contracts two token axes, permuted alike.
  ``scaled_dot_product_attention`` is the three together. Masks are refused (one would have to move with the
  tokens); so are tensors that vary along moved axes (a relative position bias).
* ``q_norm`` / ``k_norm`` (LayerNorm over head_dim) are converted as over any channels-last value.

The rules here are registered in :mod:`orbify.graph.rules`; this module does not import it.
"""

from __future__ import annotations

import math
import operator
from dataclasses import replace
from typing import TYPE_CHECKING

import torch
import torch.nn.functional as F
from torch import fx

from orbify.errors import WidthError
from orbify.graph.channel_order import Parts
from orbify.graph.channels_last import constant_operands
from orbify.graph.tracing import describe, shape
from orbify.layers.tied import head_width_fix, head_width_refusal
from orbify.symmetry.layouts import HeadValues, Layout, Orbit, Plain, Tokens

if TYPE_CHECKING:
    from orbify.graph.rules import Step

_STOP_BEFORE = "or convert only up to the node before it (--stop-at)"


def head_projection(node: fx.Node) -> bool:
    """True for a layer writing a (B, N, F) token value that a reshape splits into heads ((B, N, ..., head_dim)):
    its output keeps its width and the original's channel order, so that the heads are the original's."""
    out = shape(node)
    return out is not None and len(out) == 3 and any(_splits_channels(user, out) for user in node.users)


def _splits_channels(node: fx.Node, in_shape: tuple[int, ...]) -> bool:
    """True when ``node`` reshapes a (B, N, F) value to (B, N, ..., head_dim), splitting its last axis only."""
    out = shape(node)
    return (node.op == "call_method" and node.target in ("reshape", "view") and out is not None and len(out) >= 4
            and tuple(out[:2]) == tuple(in_shape[:2]) and math.prod(out[2:]) == in_shape[2])


# -- into heads and back ------------------------------------------------------------------------------
def reshape_heads(step: Step) -> Layout:
    """A reshape that changes the shape of a token sequence (splitting its channels into heads) or of per-head
    values (merging the heads back into a (B, N, C) sequence); other reshapes of them are refused."""
    in_shape, out_shape = tuple(shape(step.node.args[0])), tuple(shape(step.node))
    layout = step.layout
    if isinstance(layout, Tokens) and layout.dims == (0, 2, 1) and _splits_channels(step.node, in_shape):
        return _split(step, layout, out_shape)
    if isinstance(layout, HeadValues) and layout.rank == 4 and layout.token_axes == (1,) and \
            layout.channel_axis == 3 and out_shape == (*in_shape[:2], in_shape[2] * in_shape[3]):
        heads = in_shape[2]
        inner = Orbit(heads * layout.inner.orbits) if isinstance(layout.inner, Orbit) else Plain(heads * in_shape[3])
        step.ctx.keep_original_channels(step, heads * in_shape[3])
        return Tokens(inner, (0, 2, 1), layout.height, layout.width, layout.prefix)
    raise step.refuse(f"A reshape from {in_shape} to {out_shape} of a token sequence or of attention heads",
                      "keep token sequences (B, N, C) whole but for splitting the channels into heads "
                      f"(B, N, ..., heads, head_dim) and merging (B, N, heads, head_dim) back, {_STOP_BEFORE}")


def _split(step: Step, layout: Tokens, out_shape: tuple[int, ...]) -> HeadValues:
    """(B, N, F) tokens reshaped to (B, N, ..., heads, head_dim): each head must hold whole orbits."""
    order, heads, head_dim = step.ctx.group.order, out_shape[-2], out_shape[-1]
    inner = layout.inner
    if isinstance(inner, Orbit) and head_dim % order:
        stack = list((step.node.meta.get("nn_module_stack") or {}).values())
        inside = f"In '{stack[-1][0]}': " if stack else ""   # the attention module the reshape is traced in
        raise WidthError(inside + head_width_refusal(heads * head_dim, heads, order), where=describe(step.node),
                         fix=head_width_fix(heads * head_dim, heads, order))
    if not isinstance(inner, (Orbit, Plain)):
        raise step.refuse(f"Splitting the channels of a {layout} value into heads", f"split token channels, {_STOP_BEFORE}")
    step.ctx.keep_original_channels(step, head_dim)
    head = Orbit(head_dim // order) if isinstance(inner, Orbit) else Plain(head_dim)
    rank = len(out_shape)
    return HeadValues(head, layout.height, layout.width, layout.prefix, rank, (1,), rank - 1)


# -- moving axes ------------------------------------------------------------------------------------------
def permute_heads(step: Step, dims: tuple) -> HeadValues:
    """``permute`` of per-head values: output axis i is input axis ``dims[i]``."""
    layout = step.layout
    if len(dims) != layout.rank or not all(isinstance(d, int) for d in dims):
        raise step.refuse(f"A permute {dims} of attention heads that is not constant",
                          f"permute by constant axes, {_STOP_BEFORE}")
    return _moved(layout, [d % layout.rank for d in dims])


def transpose_heads(step: Step, a: int, b: int) -> HeadValues:
    """``transpose(a, b)`` of per-head values."""
    layout = step.layout
    dims = list(range(layout.rank))
    dims[a % layout.rank], dims[b % layout.rank] = dims[b % layout.rank], dims[a % layout.rank]
    return _moved(layout, dims)


def _moved(layout: HeadValues, dims: list[int]) -> HeadValues:
    tokens = tuple(sorted(dims.index(axis) for axis in layout.token_axes))
    channels = None if layout.channel_axis is None else dims.index(layout.channel_axis)
    return replace(layout, token_axes=tokens, channel_axis=channels)


def unbind_heads(step: Step) -> Parts:
    """``x.unbind(dim)`` of per-head values along an axis no group element moves (the q/k/v index): the parts."""
    node, layout = step.node, step.layout
    if not isinstance(layout, HeadValues) or layout.channel_axis is None:
        raise step.refuse("Unbinding a value other than per-head queries, keys and values",
                          f"unbind the q/k/v axis of the reshaped projection, {_STOP_BEFORE}")
    dim = node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else 0) % layout.rank
    if dim in layout.moved_axes:
        raise step.refuse(f"Unbinding axis {dim}, which holds tokens or channels", f"unbind another axis, {_STOP_BEFORE}")
    dims = [axis for axis in range(layout.rank) if axis != dim]
    part = replace(_moved(layout, dims + [dim]), rank=layout.rank - 1)
    width = shape(node.args[0])[layout.channel_axis]
    count = shape(node.args[0])[dim]
    return Parts((part,) * count, ((0, width),) * count)   # every part holds the head's channels 0..head_dim


# -- attending --------------------------------------------------------------------------------------------
def attend(step: Step) -> HeadValues:
    """``scaled_dot_product_attention(q, k, v)`` of per-head values (B, ..., N, head_dim), without a mask."""
    node = step.node
    names = ("query", "key", "value", "attn_mask", "dropout_p", "is_causal")
    args = {name: node.args[i] if len(node.args) > i else node.kwargs.get(name) for i, name in enumerate(names)}
    q, k, v = (step.arg_layout(args[name]) for name in names[:3])
    if not all(isinstance(x, HeadValues) and x.token_axes == (x.rank - 2,) and x.channel_axis == x.rank - 1 and
               _grid(x) == _grid(q) for x in (q, k, v)):
        raise step.refuse("Attention over values other than per-head queries, keys and values (B, heads, N, head_dim) "
                          "of one token sequence", f"attend over the heads of one sequence, {_STOP_BEFORE}")
    if not _unmasked(args["attn_mask"], args["is_causal"]):
        raise step.refuse("Attention with a mask (the mask would have to move with the tokens)",
                          f"attend without a mask (attn_mask=None, is_causal=False), {_STOP_BEFORE}")
    if q.inner != k.inner:
        raise step.refuse(f"Queries ({q.inner}) and keys ({k.inner}) of different channel layouts",
                          f"project queries and keys alike, {_STOP_BEFORE}")
    return v


def matmul(step: Step) -> HeadValues:
    """``a @ b`` of attention values: contracts a's last axis with b's second last, both token axes or both channel
    axes of one layout (q @ kᵀ, scores @ v); the result keeps a's second last axis and b's last."""
    a, b = (step.arg_layout(arg) for arg in step.node.args[:2])
    if not isinstance(a, HeadValues) or not isinstance(b, HeadValues) or _grid(a) != _grid(b):
        raise step.refuse("A matrix product of values other than attention heads of one token sequence",
                          f"multiply queries by keys and scores by values, {_STOP_BEFORE}")
    rank = a.rank
    leading = set(range(rank - 2))
    contracted = (_kind(a, rank - 1), _kind(b, rank - 2))
    if leading & (set(a.moved_axes) | set(b.moved_axes)) or contracted[0] != contracted[1] or \
            (contracted[0] == "channels" and a.inner != b.inner):
        raise step.refuse("A matrix product that does not contract two token axes or two channel axes of one layout",
                          f"multiply q @ kᵀ and scores @ v, {_STOP_BEFORE}")
    kept = (_kind(a, rank - 2), _kind(b, rank - 1))
    if kept == ("channels", "channels"):
        raise step.refuse("A matrix product with two channel axes", f"multiply q @ kᵀ and scores @ v, {_STOP_BEFORE}")
    tokens = tuple(axis for axis, kind in zip((rank - 2, rank - 1), kept) if kind == "tokens")
    channel = next((axis for axis, kind in zip((rank - 2, rank - 1), kept) if kind == "channels"), None)
    inner = b.inner if kept[1] == "channels" else a.inner
    return replace(a, inner=inner, token_axes=tokens, channel_axis=channel)


def _kind(layout: HeadValues, axis: int) -> str | None:
    return "tokens" if axis in layout.token_axes else "channels" if axis == layout.channel_axis else None


def _grid(layout: HeadValues) -> tuple[int, int, int, int]:
    return layout.height, layout.width, layout.prefix, layout.rank


def softmax(step: Step) -> Layout:
    """``softmax`` along one axis of attention values or tokens: it commutes with a permutation along any axis."""
    if not isinstance(step.layout, (HeadValues, Tokens)):
        raise step.refuse("A softmax of a value other than attention scores or tokens",
                          f"take the softmax of attention scores, {_STOP_BEFORE}")
    return step.layout


def check_head_operands(step: Step, layout: HeadValues) -> None:
    """Refuse a tensor not computed from the input that an elementwise op combines with attention values and that
    varies along an axis the group moves (a relative position bias); a scale per head passes."""
    for operand, operand_shape, varying in constant_operands(step):
        if varying & set(layout.moved_axes):
            raise step.refuse(f"'{operand.name}' (shape {operand_shape}), a tensor not computed from the input, varies "
                              "along the tokens or a head's channels (a position bias would have to move with them)",
                              f"use a tensor of one value per head, {_STOP_BEFORE}")


# -- timm's mask helpers ----------------------------------------------------------------------------------
def no_mask(step: Step) -> None:
    """timm's ``resolve_self_attn_mask(N, scores, attn_mask, is_causal)``: without a mask it gives None."""
    node = step.node
    mask = node.args[2] if len(node.args) > 2 else node.kwargs.get("attn_mask")
    causal = node.args[3] if len(node.args) > 3 else node.kwargs.get("is_causal", False)
    if not _unmasked(mask, causal):
        raise step.refuse("Attention with a mask (the mask would have to move with the tokens)",
                          f"attend without a mask (attn_mask=None, is_causal=False), {_STOP_BEFORE}")
    return None


def _unmasked(mask: object, causal: object) -> bool:
    """True for no mask and no causal mask: constants, or arguments of the model's forward left at such defaults."""
    return _default(mask) is None and _default(causal) in (None, False)


def _default(arg: object) -> object:
    """The value of an argument: a constant, or the default of a forward argument the model is traced without
    (a ``placeholder`` with no tensor, as timm's ``attn_mask=None`` and ``is_causal=False``); other nodes stay."""
    if isinstance(arg, fx.Node) and arg.op == "placeholder" and shape(arg) is None and arg.args:
        return arg.args[0]
    return arg


def unmasked(step: Step) -> Layout | None:
    """timm's ``maybe_add_mask(scores, mask)`` with no mask (None, or a value that is not a tensor): the scores."""
    mask = step.node.args[1] if len(step.node.args) > 1 else step.node.kwargs.get("attn_mask")
    if isinstance(mask, fx.Node) and shape(mask) is not None:
        raise step.refuse("Attention with a mask (the mask would have to move with the tokens)",
                          f"attend without a mask, {_STOP_BEFORE}")
    return step.arg_layout(step.node.args[0])


def timm_attention_functions() -> dict:
    """Rules for timm's attention helpers (called once timm is in use)."""
    from timm.layers import attention

    return {attention.resolve_self_attn_mask: no_mask, attention.maybe_add_mask: unmasked}


HEAD_FUNCTIONS = {F.scaled_dot_product_attention: attend, torch.matmul: matmul, operator.matmul: matmul,
                  torch.unbind: unbind_heads, F.softmax: softmax, torch.softmax: softmax}
"""Function rules of this module, added to :data:`orbify.graph.rules.FUNCTION_RULES`."""
HEAD_METHODS = {"unbind": unbind_heads, "softmax": softmax, "matmul": matmul}
"""Tensor method rules of this module, added to :data:`orbify.graph.rules.METHOD_RULES`."""
