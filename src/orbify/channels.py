"""Which original channels each converted channel stands for (used to carry weights over).

A :class:`ChannelMap` belongs to a value in the converted graph. ``source[p]`` is the original
channel that new channel p copies (−1: none); ``inflow`` (original × new) is how a layer that
reads the value turns its original input weights into new ones: ``W_new = W_orig @ inflow``
along the input-channel axis. Replicated channels split their weight, pooled orbits sum it, so a
layer fed with copies of its original inputs computes what it computed before.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch


@dataclass
class ChannelMap:
    source: torch.Tensor    # (new,) long
    inflow: torch.Tensor    # (original, new) float
    spatial: int = 1        # flat values: each channel spans this many consecutive positions

    @property
    def new(self) -> int:
        return self.source.numel()

    @property
    def original(self) -> int:
        return self.inflow.shape[0]

    @classmethod
    def identity(cls, channels: int) -> "ChannelMap":
        return cls(torch.arange(channels), torch.eye(channels))

    @classmethod
    def from_source(cls, source: torch.Tensor, original: int) -> "ChannelMap":
        """Each new channel p copies original channel source[p]; copies share its outgoing weight."""
        source = source.long()
        inflow = torch.zeros(original, source.numel())
        valid = source >= 0
        inflow[source[valid], torch.nonzero(valid).flatten()] = 1.0
        counts = inflow.sum(1, keepdim=True).clamp_min(1.0)
        return cls(source, inflow / counts)

    def pooled(self, order: int) -> "ChannelMap":
        """The map after an orbit pool: orbit o stands for what its slots stood for."""
        inflow = self.inflow.reshape(self.original, -1, order).sum(2)
        return ChannelMap(self.source.reshape(-1, order)[:, 0].clone(), inflow)

    def flattened(self, positions: int) -> "ChannelMap":
        return ChannelMap(self.source, self.inflow, self.spatial * positions)

    @classmethod
    def concat(cls, maps: list["ChannelMap"]) -> "ChannelMap":
        offsets, sources, total = 0, [], 0
        for m in maps:
            sources.append(torch.where(m.source >= 0, m.source + offsets, m.source))
            offsets += m.original
        inflow = torch.block_diag(*[m.inflow for m in maps])
        return cls(torch.cat(sources), inflow)


def budget_source(original: int, orbits: int, order: int, budget: str) -> torch.Tensor:
    """Default assignment of original channels to the (orbit, slot) positions of a new layer.

    ``fields``: every slot of orbit o copies channel o; otherwise position p copies channel
    p mod C (identity when the widths agree; cyclic repetition when the new layer is wider).
    """
    if budget == "fields":
        return torch.arange(orbits).repeat_interleave(order) % original
    return torch.arange(orbits * order) % original


def rows(tensor: torch.Tensor, source: torch.Tensor) -> torch.Tensor:
    """Rows of ``tensor`` picked by ``source`` along axis 0, zero where source is −1."""
    picked = tensor[source.clamp_min(0)]
    mask = (source >= 0).to(tensor.dtype).reshape(-1, *([1] * (tensor.dim() - 1)))
    return picked * mask


def feed(weight: torch.Tensor, inflow: ChannelMap) -> torch.Tensor:
    """Apply an input map to a dense weight (out, in_original·spatial, *kernel) → (out, in_new·spatial, *kernel)."""
    out = weight.shape[0]
    kernel = weight.shape[2:]
    w = weight.reshape(out, inflow.original, inflow.spatial, *kernel)
    mixed = torch.einsum("oi...,in->on...", w.movedim(2, -1), inflow.inflow.to(weight.dtype))
    # movedim put 'spatial' last; the einsum keeps it last; move it back after the channel axis
    mixed = mixed.movedim(-1, 2)
    return mixed.reshape(out, inflow.new * inflow.spatial, *kernel)


def dense_from_groups(weight: torch.Tensor, groups: int) -> torch.Tensor:
    """Block-diagonal dense weight (out, in, *k) of a grouped conv weight (out, in/groups, *k)."""
    if groups == 1:
        return weight
    out, per, *kernel = weight.shape
    dense = weight.new_zeros(out, per * groups, *kernel)
    out_per = out // groups
    for g in range(groups):
        dense[g * out_per:(g + 1) * out_per, g * per:(g + 1) * per] = weight[g * out_per:(g + 1) * out_per]
    return dense


def groups_from_dense(dense: torch.Tensor, groups: int) -> torch.Tensor:
    """The grouped weight (out, in/groups, *k) holding the diagonal blocks of a dense weight."""
    if groups == 1:
        return dense
    out, channels, *kernel = dense.shape
    out_per, per = out // groups, channels // groups
    return torch.cat([dense[g * out_per:(g + 1) * out_per, g * per:(g + 1) * per] for g in range(groups)])
