"""Token sequences: the layout rules of vision transformers (docs/design.md §5).

A quarter turn or a mirror of an image whose sides are multiples of the patch size only *permutes the
patches*. After the patch embedding (a conv with kernel = stride = patch, tied like any lifting conv)
the (B, C, h, w) map is flattened to (B, C, h·w) and moved to (B, h·w, C): the token axis then carries
the grid's permutation action (:class:`~orbify.symmetry.layouts.Tokens`), the last axis the channels.

* **Class and register tokens** concatenated in front stay in place; each is a model tensor, tied
  to be the same on every slot of an orbit (through ``ctx.tie_token_parameter``).
* **Position embeddings** added to the tokens are projected onto the tensors that the joint action
  (grid permutation of tokens, slot permutation of channels) leaves unchanged: one value per orbit
  of (token, channel) entries.
* **LayerNorm and Linear layers** over the last axis are converted as over any channels-last value.
* **Attention** (``nn.MultiheadAttention``, self-attention, batch first): q, k, v and the output
  projection are tied orbit → orbit and every head holds whole orbits, so a slot permutation stays
  inside each head, q·k per head is unchanged by it and the attention matrix moves with the token
  permutation (``ctx.convert_attention``).
* **Reading out**: ``x[:, i]`` of a prefix token is a (B, C) value of the channels' layout; ``x[:, p:]``
  keeps the patch grid; the mean over tokens is a (B, C) value.

The rules here are registered in :mod:`orbify.graph.rules` (which calls :func:`tokens_from_grid`,
:func:`concatenate_tokens` and :func:`tie_token_operands` from its own rules); this module does not import it.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import torch
from torch import fx, nn

from orbify.errors import UnsupportedOpError
from orbify.graph.attention_heads import permute_heads, transpose_heads
from orbify.graph.channel_order import Parts, take_part
from orbify.graph.channels_last import constant_operands, tie_constant_operands
from orbify.graph.channels_last import movedim as channels_last_movedim
from orbify.graph.channels_last import permute as channels_last_permute
from orbify.graph.tracing import describe, shape
from orbify.symmetry.layouts import HeadValues, Layout, Orbit, Plain, Tokens

if TYPE_CHECKING:
    from orbify.graph.rules import Step

_STOP_BEFORE = "or convert only up to the node before it (--stop-at)"
#: Ops that pass a model tensor on without moving its entries (the path from a ``get_attr`` to its use).
_PASSING = {"expand", "contiguous", "float", "double", "half", "to", "type"}


@dataclass(frozen=True)
class TokenParameter:
    """A model tensor that meets token values: the ``get_attr`` node ``attribute``, the ops ``shaping`` it on the way
    (expand, casts: none moves its entries; or a resampling to the input's patch grid, ``resampling``) and the
    :class:`Tokens` ``layout`` of its own tokens (its axes aligned from the right with the tensor's): those of the
    tokens it meets, or, resampled, of the grid it was made for."""

    attribute: fx.Node
    shaping: tuple[fx.Node, ...]
    layout: Tokens
    resampling: fx.Node | None = None


# -- from a patch grid to tokens ---------------------------------------------------------------------
def tokens_from_grid(step: Step) -> Layout:
    """``x.reshape(B, C, h·w)`` / ``x.flatten(2)`` of a (B, C, h, w) map: a (B, C, N) token value."""
    in_shape, layout = shape(step.node.args[0]), step.layout
    if not isinstance(layout, (Plain, Orbit)):
        raise step.refuse(f"Flattening the grid of a {layout} value into tokens",
                          f"flatten a channels-first patch map, {_STOP_BEFORE}")
    height, width = in_shape[2], in_shape[3]
    if height != width:
        raise step.refuse(f"A {height}×{width} patch grid is not square, so a quarter turn does not permute it",
                          f"use a square input whose side is a multiple of the patch size, {_STOP_BEFORE}")
    return Tokens(layout, (0, 1, 2), height, width, 0)


def permute(step: Step) -> Layout | None:
    """``permute`` of a token value keeps its tokens, of attention heads their token and channel axes; other values
    follow the channels-last rule."""
    if not isinstance(step.layout, (Tokens, HeadValues)):
        return channels_last_permute(step)
    dims = step.node.kwargs.get("dims", step.node.args[1:])
    if len(dims) == 1 and isinstance(dims[0], Sequence):
        dims = dims[0]
    if isinstance(step.layout, HeadValues):
        return permute_heads(step, tuple(dims))
    return _reordered(step, tuple(dims))


def movedim(step: Step) -> Layout | None:
    """``movedim`` of a token value or attention heads: refused (permute or transpose it); other values: the
    channels-last rule."""
    if isinstance(step.layout, (Tokens, HeadValues)):
        raise step.refuse("A movedim of a token sequence", f"use permute or transpose, {_STOP_BEFORE}")
    return channels_last_movedim(step)


def transpose(step: Step) -> Layout | None:
    """``x.transpose(a, b)`` of a token value (B, C, N) ↔ (B, N, C), or of attention heads."""
    layout = step.layout
    if not isinstance(layout, (Tokens, HeadValues)):
        raise step.refuse("A transpose of a value that is not a token sequence",
                          f"use permute for channels-last maps, {_STOP_BEFORE}")
    node = step.node
    a, b = (node.args[1:3] if len(node.args) >= 3 else (node.kwargs.get("dim0"), node.kwargs.get("dim1")))
    dims = [0, 1, 2]
    if not isinstance(a, int) or not isinstance(b, int):
        raise step.refuse("A transpose whose axes are not constant", f"transpose constant axes, {_STOP_BEFORE}")
    if isinstance(layout, HeadValues):
        return transpose_heads(step, a, b)
    dims[a % 3], dims[b % 3] = dims[b % 3], dims[a % 3]
    return _reordered(step, tuple(dims))


def _reordered(step: Step, dims: tuple) -> Tokens:
    layout = step.layout
    if len(dims) != 3 or not all(isinstance(d, int) for d in dims) or dims[0] % 3 != 0:
        raise step.refuse(f"A permute {dims} of a token sequence that moves the batch axis or is not constant",
                          f"keep the batch axis first, {_STOP_BEFORE}")
    return replace(layout, dims=tuple(layout.dims[d % 3] for d in dims))


def tokens_from_channels_last(step: Step) -> Tokens:
    """``x.view(B, -1, C)`` of a channels-last patch map (B, h, w, C) (timm's ``dynamic_img_size``): a (B, N, C)
    token sequence."""
    layout, in_shape, out_shape = step.layout, shape(step.node.args[0]), shape(step.node)
    if layout.dims != (0, 2, 3, 1) or tuple(out_shape) != (in_shape[0], in_shape[1] * in_shape[2], in_shape[3]):
        raise step.refuse(f"A reshape from {tuple(in_shape)} to {tuple(out_shape)} of a channels-last map",
                          f"flatten a (B, h, w, C) patch map to (B, h·w, C) tokens, {_STOP_BEFORE}")
    if in_shape[1] != in_shape[2]:
        raise step.refuse(f"A {in_shape[1]}×{in_shape[2]} patch grid is not square, so a quarter turn does not "
                          "permute it", f"use a square input whose side is a multiple of the patch size, {_STOP_BEFORE}")
    return Tokens(layout.inner, (0, 2, 1), in_shape[1], in_shape[2], 0)


def expand(step: Step) -> Layout | None:
    """``expand`` of a model tensor (a class token over the batch) has no layout; of a value, refused."""
    if step.layout is not None:
        raise step.refuse("Expanding a value computed from the input", f"expand model tensors only, {_STOP_BEFORE}")
    return None


# -- class tokens and position embeddings ------------------------------------------------------------
def concatenate_tokens(step: Step) -> Tokens:
    """``torch.cat([class_token, tokens], dim=1)``: model tensors in front of one token value become fixed tokens.

    Each tensor in front is tied to be the same on every slot of an orbit (per token). A tensor after the
    grid, two token values, or a concatenation along another axis than the tokens is refused.
    """
    node = step.node
    parts = list(node.args[0])
    layouts = [step.arg_layout(part) for part in parts]
    values = [i for i, layout in enumerate(layouts) if layout is not None]
    layout = layouts[values[0]]
    rank = len(shape(node) or ())
    dim = node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else 0) % max(rank, 1)
    if len(values) != 1 or not isinstance(layout, Tokens) or dim != layout.token_axis:
        raise step.refuse("Only model tensors (a class token) can be concatenated to a token sequence, in front of "
                          "it along the token axis", f"concatenate class or register tokens in front, {_STOP_BEFORE}")
    if values[0] != len(parts) - 1:
        raise step.refuse("Tokens concatenated after the patch grid", f"put fixed tokens in front, {_STOP_BEFORE}")
    added = 0
    for part in parts[:-1]:
        count = shape(part)[dim]
        _tie(step, part, Tokens(layout.inner, layout.dims, 0, 0, count))
        added += count
    return replace(layout, prefix=layout.prefix + added)


def tie_token_operands(step: Step, layout: Tokens) -> None:
    """Tie the model tensors that an elementwise op adds or multiplies into a token value of ``layout``.

    A tensor that varies along the tokens (and channels) is tied over the joint orbits of the token and channel
    permutations (a position embedding); one that varies along the channels only (a layer scale) is tied per orbit
    as on any channels-last value; one that varies along the batch is refused; one of a single value passes.
    """
    out = shape(step.node)
    for operand, operand_shape, varying in constant_operands(step):
        if not varying:
            continue
        offset = len(out) - len(operand_shape)
        if varying == {layout.channel_axis}:   # a per-channel tensor (binary ops: the only operand without layout)
            tie_constant_operands(step, layout)
            continue
        if not varying <= {layout.channel_axis, layout.token_axis} or \
                (layout.token_axis in varying and out[layout.token_axis] != operand_shape[layout.token_axis - offset]):
            raise step.refuse(f"'{operand.name}' (shape {operand_shape}), a tensor not computed from the input, varies "
                              "along an axis other than the tokens and channels",
                              f"use a tensor of one value per token and channel, {_STOP_BEFORE}")
        _tie(step, operand, layout)


def _tie(step: Step, operand: fx.Node, layout: Tokens) -> None:
    """Have the context tie the model tensor behind ``operand`` over the orbits of ``layout``'s action."""
    node, shaping, resampling = operand, [], None
    while node.op != "get_attr":
        if resampling is None and is_resampling(node):
            resampling = node
        elif node.op != "call_method" or node.target not in _PASSING or not isinstance(node.args[0], fx.Node):
            raise step.refuse(f"'{operand.name}' meets a token sequence but is not a model parameter or buffer (or "
                              "one expanded)", f"add a parameter of shape (1, N, C) or (1, 1, C), {_STOP_BEFORE}")
        shaping.append(node)
        node = node.args[0]   # the tensor; the other arguments are sizes, dtypes or devices
    own = tuple(shape(node))
    used = tuple(shape(operand))
    if resampling is not None:   # the tensor is made for its own grid: tied there
        layout = _embedding_grid(step, resampling, own, layout)
        used = (*used[:-2], layout.tokens, used[-1])
    if any(size != 1 and size != used[len(used) - len(own) + axis] for axis, size in enumerate(own)):
        raise step.refuse(f"The tensor '{node.target}' (shape {own}) is reshaped on its way to the tokens",
                          f"use a tensor shaped like the tokens it meets, {_STOP_BEFORE}")
    step.ctx.tie_token_parameter(step, TokenParameter(node, tuple(shaping), layout, resampling))


# -- position embeddings resampled to the input's grid ------------------------------------------------
def is_resampling(node: fx.Node) -> bool:
    """True for timm's ``resample_abs_pos_embed`` (kept whole by the tracer): a position embedding made for one
    patch grid, resampled to the input's (``dynamic_img_size=True``)."""
    target = node.target if node.op == "call_function" else None
    return (getattr(target, "__module__", None), getattr(target, "__name__", None)) == _RESAMPLING


_RESAMPLING = ("timm.layers.pos_embed", "resample_abs_pos_embed")


def resampled_embedding(step: Step) -> None:
    """The resampling of a model tensor (a position embedding) to the input's patch grid: a model tensor still, tied
    over its own grid where it meets the tokens (:func:`tie_token_operands`)."""
    if step.layout is not None:
        raise step.refuse("Resampling a value computed from the input as a position embedding",
                          f"resample model tensors only, {_STOP_BEFORE}")
    return None


def _embedding_grid(step: Step, resampling: fx.Node, own: tuple[int, ...], layout: Tokens) -> Tokens:
    """The tokens of a resampled embedding's own square grid (``old_size``), its fixed tokens those it meets."""
    kwargs = dict(zip(("posemb", "new_size", "old_size", "num_prefix_tokens"), resampling.args), **resampling.kwargs)
    prefix = kwargs.get("num_prefix_tokens", 1)
    old = kwargs.get("old_size") or (math.isqrt(own[-2] - prefix),) * 2
    if layout.dims != (0, 2, 1) or len(old) != 2 or old[0] != old[1] or prefix != layout.prefix or \
            own[-2] != prefix + old[0] * old[1]:
        raise step.refuse(f"A position embedding of shape {own} resampled from a {'×'.join(map(str, old))} grid "
                          f"with {prefix} fixed tokens to a sequence of {layout}",
                          f"resample a square grid's embedding to a (B, N, C) sequence, {_STOP_BEFORE}")
    return replace(layout, height=old[0], width=old[1])


# -- reading tokens out ------------------------------------------------------------------------------
def take_tokens(step: Step) -> Layout | None:
    """``x[:, i]`` of a fixed token: a (B, C) value; ``x[:, p:]`` past the fixed tokens: the grid; other values
    follow :func:`orbify.graph.channel_order.take_part`."""
    layout = step.layout
    if not isinstance(layout, Tokens) or isinstance(step.arg_layout(step.node.args[0]), Parts):
        return take_part(step)
    index = step.node.args[1]
    whole = slice(None, None, None)
    if layout.dims != (0, 2, 1) or not isinstance(index, tuple) or index[0] != whole or \
            any(item not in (whole, Ellipsis) for item in index[2:]) or len(index) < 2:
        raise step.refuse("Indexing a token sequence other than x[:, i] or x[:, p:]",
                          f"take a class token or the patch tokens from a (B, N, C) sequence, {_STOP_BEFORE}")
    taken = index[1]
    if isinstance(taken, int) and taken % layout.tokens < layout.prefix:
        return layout.inner
    if isinstance(taken, slice) and taken.step in (None, 1) and taken.start == layout.prefix and taken.stop is None:
        return replace(layout, prefix=0)
    raise step.refuse(f"Taking tokens {taken} moves with the patch grid",
                      f"take a fixed token (index below {layout.prefix}) or all patch tokens, {_STOP_BEFORE}")


def token_mean(step: Step) -> Layout:
    """``x.mean(dim=1)`` of a (B, N, C) sequence: a (B, C) value (the mean over all tokens is invariant); with
    ``keepdim`` a (B, 1, C) sequence of one fixed token."""
    layout, node = step.layout, step.node
    dims = node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else None)
    dims = (dims,) if isinstance(dims, int) else tuple(dims or ())
    if tuple(d % 3 for d in dims) != (layout.token_axis,):
        raise step.refuse(f"A mean over dims {dims} of a token sequence", f"average over the tokens, {_STOP_BEFORE}")
    keepdim = node.kwargs.get("keepdim", node.args[2] if len(node.args) > 2 else False)
    if keepdim and layout.dims == (0, 2, 1):
        return Tokens(layout.inner, layout.dims, 0, 0, 1)
    return layout.inner   # (B, C) or, kept, (B, C, 1): a channel value, as a pooled map is


# -- attention ---------------------------------------------------------------------------------------
def attention(step: Step) -> Parts:
    """``nn.MultiheadAttention`` as self-attention over a (B, N, C) sequence: tied by the context; its output is the
    pair (attention output, weights), of which only the output may be used."""
    node, layout = step.node, step.layout
    query = node.args[0] if node.args else node.kwargs.get("query")
    names = ("query", "key", "value")
    inputs = [node.args[i] if len(node.args) > i else node.kwargs.get(name) for i, name in enumerate(names)]
    if not isinstance(layout, Tokens) or layout.dims != (0, 2, 1) or any(item is not query for item in inputs):
        raise step.refuse("Attention other than self-attention over a (B, N, C) token sequence",
                          f"attend from the tokens to themselves, {_STOP_BEFORE}")
    if any(node.kwargs.get(name) is not None for name in ("key_padding_mask", "attn_mask")):
        raise step.refuse("Attention with a mask (the mask would have to move with the tokens)",
                          f"attend without a mask, {_STOP_BEFORE}")
    if any(user.target is operator.getitem and user.args[1] != 0 and user.users for user in node.users):
        raise step.refuse("The attention weights are used", f"use the attention output only, {_STOP_BEFORE}")
    out = step.ctx.convert_attention(step)
    return Parts((out, None), ((0, out.size(step.ctx.group)), (0, 0)))


# -- windowed attention -----------------------------------------------------------------------------
WINDOWED_ATTENTION = {
    "torchvision.models.swin_transformer": {"ShiftedWindowAttention", "ShiftedWindowAttentionV2",
                                            "shifted_window_attention", "_get_relative_position_bias"},
    "torchvision.models.maxvit": {"PartitionAttentionLayer", "WindowPartition", "WindowDepartition",
                                  "RelativePositionalMultiHeadAttention"},
    "timm.models.swin_transformer": {"WindowAttention", "SwinTransformerBlock"},
    "timm.models.swin_transformer_v2": {"WindowAttention", "SwinTransformerV2Block"},
    "timm.models.maxxvit": {"PartitionAttentionCl", "PartitionAttention2d", "ParallelPartitionAttention"},
}
"""Modules and functions of windowed attention (Swin's shifted windows, MaxViT's block and grid partitions), by the
module that defines them and their name: recognised without importing the libraries."""

_WINDOWS_WHY = ("it attends within windows laid out from the patch grid's top-left corner (Swin shifts them by half a "
                "window on alternate blocks) and adds a learned bias for each direction between two tokens of a "
                "window, so a quarter turn or a mirror moves windows and directions onto ones the model treats "
                "differently: it does not just permute the tokens")


def windowed_attention_refusal(node: fx.Node) -> UnsupportedOpError | None:
    """The refusal for a node inside windowed attention (:data:`WINDOWED_ATTENTION`), saying why; None elsewhere.

    The node is recognised by its own target (a function of such a module, or a module kept whole) or by the
    modules it was traced inside (``node.meta["nn_module_stack"]``, recorded by ``torch.fx``).
    """
    stack = node.meta.get("nn_module_stack") or {}
    inside = next((f"'{path}' ({cls.__name__})" for path, cls in stack.values() if _windowed(cls)), None)
    if inside is None and _windowed(node.target):
        inside = getattr(node.target, "__name__", str(node.target))
    if inside is None:
        return None
    return UnsupportedOpError(f"Windowed attention ({inside}) cannot be made exactly invariant: {_WINDOWS_WHY}",
                              where=describe(node),
                              fix="use a vision transformer with global attention over a square patch grid (e.g. "
                                  f"torchvision's vit_b_16) or a CNN, {_STOP_BEFORE} (e.g. the patch embedding)")


def _windowed(target: object) -> bool:
    return getattr(target, "__name__", None) in WINDOWED_ATTENTION.get(getattr(target, "__module__", None), ())


def timm_token_functions() -> dict:
    """Rules for timm's token functions (called once timm is in use)."""
    from timm.layers.pos_embed import resample_abs_pos_embed

    return {resample_abs_pos_embed: resampled_embedding}


TOKEN_MODULES = {nn.MultiheadAttention: attention}
"""Module rules of this module, added to :data:`orbify.graph.rules.MODULE_RULES`."""
TOKEN_FUNCTIONS = {torch.permute: permute, torch.movedim: movedim, torch.moveaxis: movedim, torch.transpose: transpose,
                   operator.getitem: take_tokens}
"""Function rules of this module, added to :data:`orbify.graph.rules.FUNCTION_RULES`."""
TOKEN_METHODS = {"permute": permute, "movedim": movedim, "moveaxis": movedim, "transpose": transpose,
                 "expand": expand}
"""Tensor method rules of this module, added to :data:`orbify.graph.rules.METHOD_RULES`."""
