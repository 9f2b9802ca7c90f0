"""Carrying the original's weights into tied attention modules and token tensors (docs/design.md §5, §8).

Attention keeps the identity channel assignment inside it: q, k and v channel p stands for the
original's channel p, so every head holds the original head's channels and q·k pairs the same channels
as before (channel matching, which would have to move q, k and v of a head alike, does not reach inside
attention). Its inputs are fed through the input value's channel map and its output rows are picked by
that same map, so the output stands for the channels of the residual stream it is added to.

A token tensor (a class token, a position embedding) takes the entries of the channels its value
carries along its channel axis; its token axis is unchanged by the conversion.

The conversion (:mod:`orbify.conversion.layer_converter`) and calibration (:mod:`orbify.calibration.kept_tensors`,
under the kept channels' maps) both carry them with these functions.
"""

from __future__ import annotations

import torch
from torch import nn

from orbify.symmetry.layouts import Tokens
from orbify.symmetry.tying import relative_residual
from orbify.transfer.channels import ChannelMap, feed, rows
from orbify.transfer.loading import assign


def attention_weights(old: nn.MultiheadAttention, in_map: ChannelMap) -> dict[str, torch.Tensor | None]:
    """The original's projections in the converted terms: inputs fed through ``in_map``, output rows picked by it."""
    source = in_map.source
    return {
        "in_proj_weight": feed(old.in_proj_weight.detach(), in_map),
        "in_proj_bias": None if old.in_proj_bias is None else old.in_proj_bias.detach(),
        "out_proj.weight": rows(old.out_proj.weight.detach(), source),
        "out_proj.bias": None if old.out_proj.bias is None else rows(old.out_proj.bias.detach(), source),
    }


@torch.no_grad()
def carry_attention(new: nn.MultiheadAttention, old: nn.MultiheadAttention, in_map: ChannelMap) -> float:
    """Load ``new`` (tied) with ``old``'s weights read through ``in_map``; return the weight residual
    ‖W − Π(W)‖ / ‖W‖ of the two projections together."""
    weights = attention_weights(old, in_map)
    for name, value in weights.items():
        if value is not None:
            owner, _, attribute = name.rpartition(".")
            assign(new.get_submodule(owner), attribute, value)
    return attention_residual(new, weights)


@torch.no_grad()
def attention_residual(new: nn.MultiheadAttention, weights: dict[str, torch.Tensor | None]) -> float:
    """‖W − Π(W)‖ / ‖W‖ of the projection ``weights`` under ``new``'s tying (Π computed, nothing stored)."""
    full, tied = [], []
    for module, name in ((new, "in_proj_weight"), (new.out_proj, "weight")):
        value = weights["in_proj_weight" if module is new else "out_proj.weight"]
        parametrizations = getattr(module, "parametrizations", {})
        if name in parametrizations:
            tying = parametrizations[name][0]
            tied.append(tying(tying.right_inverse(value)).flatten())
        else:
            tied.append(value.flatten())
        full.append(value.flatten())
    return relative_residual(torch.cat(full), torch.cat(tied))


def token_tensor_rows(tensor: torch.Tensor, source: torch.Tensor, layout: Tokens) -> torch.Tensor:
    """The entries of a token tensor (its axes aligned from the right with ``layout``'s value) for the converted
    channels ``source`` along its channel axis (an axis of size one stays)."""
    axis = layout.channel_axis - (len(layout.dims) - tensor.dim())
    if axis < 0 or tensor.shape[axis] == 1:
        return tensor.clone()
    return rows(tensor.movedim(axis, 0), source).movedim(0, axis).contiguous()
