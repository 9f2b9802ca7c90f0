"""The norm layers that replace the original ones: orbit batch norms on orbit channels, tied affine norms."""

from __future__ import annotations

import torch
from torch import nn

from orbify.graph.rules import CONVERT_UP_TO, Step
from orbify.graph.tracing import shape
from orbify.layers.tied import OrbitBatchNorm
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Flat, HeadValues, Layout, Orbit, Permuted
from orbify.transfer.loading import factory_kwargs
from orbify.transfer.norms import batch_norm_rows, fresh_batch_norm


def batch_norm_for(old: nn.modules.batchnorm._BatchNorm, layout: Layout | None, source: torch.Tensor, group: Group,
                   carry: bool) -> nn.Module:
    """The batch norm over the channels ``source`` names: an orbit batch norm on orbit channels.

    With ``carry`` it takes the statistics and affine parameters of those channels, otherwise it is fresh;
    either way on the device and in the dtype of ``old``.
    """
    plain = batch_norm_rows(old, source) if carry else fresh_batch_norm(old, source.numel())
    return OrbitBatchNorm.from_plain(plain, group) if isinstance(layout, Orbit) else plain


def affine_norm_for(step: Step, old: nn.GroupNorm | nn.LayerNorm, group: Group) -> nn.GroupNorm | nn.LayerNorm:
    """A fresh group / layer norm like ``old`` over the channels of ``step``'s input layout (on ``old``'s device
    and in its dtype).

    A layer norm normalises the channel axis: of (B, C) features, or the last axis of a channels-last
    value. Its statistics do not change when a group element permutes the channels; its affine
    parameters are tied per orbit by the caller. Refuses a group norm whose groups split orbits or that
    reads a channels-last value, and a layer norm over more than the channel axis or over a flattened map.
    """
    layout = step.layout
    channels = layout.size(group) if layout is not None else 0
    like = next((t for t in (old.weight, old.bias) if t is not None), None)
    factory = factory_kwargs(like) if like is not None else {}
    if isinstance(old, nn.GroupNorm):
        per_group = channels // old.num_groups if channels % old.num_groups == 0 else 0
        if isinstance(layout, (Permuted, HeadValues)):
            raise step.refuse("GroupNorm over a value whose channels are not on axis 1", CONVERT_UP_TO)
        if isinstance(layout, Orbit) and (per_group == 0 or per_group % group.order):
            raise step.refuse(f"GroupNorm with {old.num_groups} groups does not hold whole orbits of "
                              f"{group.order} channels", "use a group count that divides the orbits")
        return nn.GroupNorm(old.num_groups, channels, old.eps, old.affine, **factory)
    in_shape = shape(step.node.all_input_nodes[0])
    over_channels = (layout.channel_axis == len(in_shape) - 1 if isinstance(layout, (Permuted, HeadValues))
                     else len(in_shape) == 2 and not (isinstance(layout, Flat) and old.elementwise_affine))
    if len(old.normalized_shape) != 1 or in_shape[-1] != old.normalized_shape[0] or not over_channels:
        raise step.refuse("LayerNorm is supported over the channel axis only: of (B, C) features or the last axis "
                          "of a channels-last map", CONVERT_UP_TO)
    return nn.LayerNorm(channels, old.eps, old.elementwise_affine, bias=old.bias is not None, **factory)
