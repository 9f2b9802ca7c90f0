"""A 1-D conv along the channels made to run along the orbits, slot by slot (docs/design.md §5).

Efficient channel attention convolves a (B, 1, C) vector of pooled channels with ``nn.Conv1d(1, 1, k)``. On
orbit channels (channel o·|G| + s is slot s of orbit o) the tied counterpart views the vector as a (B, 1, orbits,
|G|) grid and convolves it with the same kernel along the orbit axis only (a (k, 1) kernel): a group element,
which permutes the slot axis, commutes with it. Built from plain torch modules, so baking and export need nothing.
"""

from __future__ import annotations

import torch
from torch import nn


def orbitwise_conv1d(conv: nn.Conv1d, order: int) -> nn.Sequential:
    """``conv`` (one channel in and out) run along the orbits of |G| = ``order`` slots, slot by slot: the same
    kernel, bias, padding and dilation along the orbit axis, none along the slots; the weights are copied."""
    padding = conv.padding if isinstance(conv.padding, str) else (conv.padding[0], 0)
    grid_conv = nn.Conv2d(1, 1, (conv.kernel_size[0], 1), padding=padding, dilation=(conv.dilation[0], 1),
                          bias=conv.bias is not None, padding_mode=conv.padding_mode,
                          device=conv.weight.device, dtype=conv.weight.dtype)
    with torch.no_grad():
        grid_conv.weight.copy_(conv.weight.unsqueeze(-1))
        if conv.bias is not None:
            grid_conv.bias.copy_(conv.bias)
    return nn.Sequential(nn.Unflatten(2, (-1, order)), grid_conv, nn.Flatten(2)).train(conv.training)
