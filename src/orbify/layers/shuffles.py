"""The channel shuffle of a converted model: blocks of channels, whole orbits, moved between groups (docs/design.md §5).

ShuffleNet's channel shuffle views C channels as (groups, C / groups) and transposes, interleaving single channels,
which would tear orbits apart. The converted model shuffles blocks of |G| channels (whole orbits) the same way, with
the block count read from the input at run time, so it serves any number of orbits the conversion gives the value.
"""

from __future__ import annotations

import torch


def shuffle_blocks(x: torch.Tensor, groups: int, width: int) -> torch.Tensor:
    """The channel shuffle of ``x`` (B, C, H, W) in ``groups`` groups, moving blocks of ``width`` channels: block b of
    group g goes to position b·groups + g. ``width`` 1 is ShuffleNet's shuffle; C must be a multiple of
    groups·width."""
    batch, channels, height, breadth = x.shape
    blocks = x.view(batch, groups, channels // (groups * width), width, height, breadth)
    return blocks.transpose(1, 2).reshape(batch, channels, height, breadth)
