"""The positions of a value by its layout: moving the original's values back, and positions taken as samples.

A calibration fits a layer on every position of its input as a sample of the regression: the pixels
of a channels-first or channels-last map, the tokens of a token sequence (docs/design.md §9.2). The
original model's value at a node has the axes the converted model's value has there (the same ops
permute them), so the layout the conversion recorded for the node (``plan.values``) says where its
channels, pixels and tokens are. Only its channels differ: the original's are plain, and moving a
value of the original *back* moves its positions, never its channels.
"""

from __future__ import annotations

import torch

from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Flat, Layout, Permuted, Tokens


def moved_back(group: Group, value: torch.Tensor, slot: int, layout: Layout | None) -> torch.Tensor:
    """The original's ``value`` on the images moved by slot⁻¹, its positions moved back by the slot.

    ``layout`` is the converted model's layout of the same node: a token sequence has its grid tokens
    permuted (prefix tokens stay), a channels-last map its pixel axes moved, a flattened map its
    pixels moved inside the flattening; features (B, C) stay as they are. Without a layout a
    (B, C, H, W) tensor is taken as a channels-first map.
    """
    if slot == 0:
        return value
    if isinstance(layout, Tokens):
        return value.index_select(layout.token_axis, layout.token_permutation(group)[slot].to(value.device))
    if isinstance(layout, Permuted) and value.dim() == len(layout.dims) == 4:
        back = sorted(range(4), key=layout.dims.__getitem__)
        return group.act_grid(slot, value.permute(back)).permute(layout.dims)
    if isinstance(layout, Flat) and value.dim() == 2:
        return group.act_grid(slot, value.unflatten(1, (-1, layout.height, layout.width))).flatten(1)
    if value.dim() == 4 and not isinstance(layout, Permuted):
        return group.act_grid(slot, value)
    return value


def positions_as_samples(value: torch.Tensor, channels: int, layout: Layout | None) -> torch.Tensor:
    """A value's ``channels`` channels at every position and image, as rows of a (samples, channels) matrix.

    The channels are on the axis ``layout`` says (axis 1 without one); a flattened map (B, C·H·W) has
    its pixels as positions.
    """
    if value.dim() == 2 and (isinstance(layout, Flat) or value.shape[1] != channels):
        value = value.reshape(value.shape[0], channels, -1)
    axis = layout.channel_axis if isinstance(layout, Permuted) else 1
    return value.movedim(axis, -1).reshape(-1, channels)
