"""Writing a calibrated layer's weights: the refit's solution, or the orbit-average fallback."""

from __future__ import annotations

import torch
from torch import nn
from torch.nn.utils import parametrize

from orbify.calibration.equations import Solution
from orbify.graph.square_kernels import centred_in
from orbify.transfer.channels import ChannelMap
from orbify.transfer.loading import carried_weight, load_bias, load_weight


def store_solution(module: nn.Module, solution: Solution) -> torch.Tensor | None:
    """Write refitted base rows into ``module`` (its base when tied, else its weight) and the intercept into its bias.

    Values are cast to the module's weight dtype. Returns the intercept when the module has no
    bias to hold it (the batch norm that follows absorbs it), else None.
    """
    tied = parametrize.is_parametrized(module, "weight")
    stored = module.parametrizations.weight.original if tied else module.weight
    dtype = stored.dtype
    stored.copy_(solution.base.to(dtype).reshape(stored.shape))
    if solution.intercept is None:
        return None
    if module.bias is None:
        return solution.intercept
    bias = module.parametrizations.bias.original if parametrize.is_parametrized(module, "bias") else module.bias
    bias.copy_(solution.intercept.to(dtype))
    return None


def load_orbit_average(module: nn.Module, old: nn.Module, in_map: ChannelMap, out_source: torch.Tensor) -> torch.Tensor:
    """Load the orbit average of ``old``'s weight and bias under the kept channels into ``module``.

    ``in_map`` is the channel map of the layer's input, ``out_source`` the original channel of every
    output channel. A kernel grown to a square under quarter turns takes the original in its middle.
    Returns the out-first weight that was loaded (before its projection).
    """
    weight = carried_weight(old, in_map, out_source, getattr(module, "groups", 1))
    if isinstance(module, nn.Conv2d):
        weight = centred_in(weight, module.kernel_size)
    load_weight(module, weight, isinstance(old, nn.ConvTranspose2d))
    load_bias(module, old, out_source)
    return weight
