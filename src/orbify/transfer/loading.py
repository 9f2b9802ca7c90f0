"""Loading carried-over weights into tied layers (docs/design.md §4, §7).

The original weight of a conv or linear layer is first brought into the converted layer's terms
(:func:`carried_weight`: output channels first, rows picked by the output channel map, inputs fed
through the input channel map, grouped like the new layer), then stored (:func:`load_weight`): the
parametrization's ``right_inverse`` keeps its orbit average Π, or, for the lossless ``embed``
initialisation, the slot-0 rows become the base as they are. The weight residual
‖W − Π(W)‖ / ‖W‖ says how much of the weight the tying lost (:func:`loaded_residual` for a weight
just loaded, :func:`tied_residual` for one that is not).
"""

from __future__ import annotations

import torch
from torch import nn
from torch.nn.utils import parametrize

from orbify.symmetry.tying import relative_residual
from orbify.transfer.channels import ChannelMap, dense_from_groups, feed, groups_from_dense, rows
from orbify.transfer.kinds import is_depthwise


def factory_kwargs(like: torch.Tensor) -> dict:
    """Keyword arguments that build new parameters on the device and in the dtype of ``like``."""
    return {"device": like.device, "dtype": like.dtype}


def orient(weight: torch.Tensor, transposed: bool) -> torch.Tensor:
    """Swap between the out-first and the stored orientation of a weight: (in, out, ...) for transposed convs.

    Its own inverse; a no-op for other layers.
    """
    return weight.transpose(0, 1) if transposed else weight


def out_first_weight(module: nn.Module) -> torch.Tensor:
    """A conv/linear weight with output channels first, groups made dense: (out, in, *kernel)."""
    weight = orient(module.weight.detach(), isinstance(module, nn.ConvTranspose2d))
    return dense_from_groups(weight, getattr(module, "groups", 1))


def carried_weight(old: nn.Module, in_map: ChannelMap, source: torch.Tensor | None, groups: int) -> torch.Tensor:
    """The weight of original layer ``old`` in the converted layer's terms, out-first.

    Output rows are picked by ``source`` (original channel of every new output channel; None keeps
    the original order), the inputs are fed through ``in_map`` (:func:`~orbify.transfer.channels.feed`)
    and the result is cut into ``groups`` conv groups. A depthwise conv (never transposed: grouped
    transposed convs are not tied) keeps one input per output, so only its rows are picked.
    """
    if is_depthwise(old):   # one input channel per output channel: rows follow the input
        weight = old.weight.detach()
        return weight if source is None else rows(weight, source)
    dense = out_first_weight(old)
    if source is not None:
        dense = rows(dense, source)
    return groups_from_dense(feed(dense, in_map), groups)


def assign(module: nn.Module, name: str, value: torch.Tensor) -> None:
    """Store ``value`` as parameter ``name`` of ``module``; a tied one keeps its orbit average (``right_inverse``)."""
    if parametrize.is_parametrized(module, name):
        setattr(module, name, value)
    else:
        getattr(module, name).copy_(value)


@torch.no_grad()
def load_bias(module: nn.Module, old: nn.Module, source: torch.Tensor) -> None:
    """Give ``module`` the bias entries of ``old``'s output channels ``source`` (nothing when ``old`` has no bias)."""
    if old.bias is not None:
        assign(module, "bias", rows(old.bias.detach(), source))


@torch.no_grad()
def load_weight(module: nn.Module, weight: torch.Tensor, transposed: bool = False, slot_zero: bool = False) -> None:
    """Store an out-first ``weight`` in ``module`` (a tied conv or linear).

    By default ``weight`` is full-size and the parametrization's ``right_inverse`` stores its orbit
    average Π(weight). With ``slot_zero`` (orbit outputs only) ``weight`` holds the rows of slot 0
    of every output orbit and becomes the base as it is: the lossless ``embed`` initialisation,
    where slot g then holds the same filters moved by g.
    """
    if not parametrize.is_parametrized(module, "weight"):
        module.weight.copy_(orient(weight, transposed))
    elif slot_zero:
        base = module.parametrizations.weight.original
        base.copy_(weight.reshape(base.shape))
    else:
        module.weight = orient(weight, transposed)


@torch.no_grad()
def loaded_residual(module: nn.Module, weight: torch.Tensor, transposed: bool = False) -> float:
    """‖W − Π(W)‖ / ‖W‖ of an out-first full ``weight`` just stored in ``module`` by :func:`load_weight`.

    Π(W) is read back from the module (its tied weight), so nothing is projected again.
    """
    tied = orient(module.weight, transposed).detach()
    return relative_residual(weight.detach(), tied)


@torch.no_grad()
def tied_residual(module: nn.Module, weight: torch.Tensor, transposed: bool = False) -> float:
    """‖W − Π(W)‖ / ‖W‖ of an out-first full weight under ``module``'s tying (0 when untied or zero).

    The module is left as it is: Π(W) is computed, not stored.
    """
    if not parametrize.is_parametrized(module, "weight"):
        return 0.0
    tying = module.parametrizations.weight[0]
    stored = orient(weight, transposed)
    return relative_residual(stored, tying(tying.right_inverse(stored)))
