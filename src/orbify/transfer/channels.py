"""Which original channels each converted channel stands for (used to carry weights over; docs/design.md §8).

A :class:`ChannelMap` belongs to a value in the converted graph. ``source[p]`` is the original
channel that new channel p copies (−1: none); ``inflow`` (original × new, sparse) is how a layer
that reads the value turns its original input weights into new ones: ``W_new = W_orig @ inflow``
along the input-channel axis. Replicated channels split their weight, pooled orbits sum it, so a
layer fed with copies of its original inputs computes what it computed before. An *embedded*
map (:meth:`ChannelMap.embedded`) feeds slot 0 of every orbit only: the lossless ``embed``
initialisation reads the original features from slot 0 (docs/design.md §7).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import torch
from torch import fx

from orbify.graph.reductions import is_channel_statistic


@dataclass
class ChannelMap:
    source: torch.Tensor    # (new,) long
    inflow: torch.Tensor    # (original, new) float, sparse COO, coalesced
    spatial: int = 1        # flat values: each channel spans this many consecutive positions

    @property
    def new(self) -> int:
        return self.source.numel()

    @property
    def original(self) -> int:
        return self.inflow.shape[0]

    @classmethod
    def identity(cls, channels: int) -> "ChannelMap":
        index = torch.arange(channels)
        return cls(index, _sparse(index, index, torch.ones(channels), channels, channels))

    @classmethod
    def from_source(cls, source: torch.Tensor, original: int) -> "ChannelMap":
        """Each new channel p copies original channel source[p]; copies share its outgoing weight."""
        return cls._feeding(source.long(), original, source.long() >= 0)

    @classmethod
    def embedded(cls, source: torch.Tensor, original: int, order: int) -> "ChannelMap":
        """Like :meth:`from_source`, but only slot 0 of every orbit of ``order`` slots feeds the next layer."""
        source = source.long()
        slot_zero = torch.arange(source.numel()) % order == 0
        return cls._feeding(source, original, (source >= 0) & slot_zero)

    @classmethod
    def _feeding(cls, source: torch.Tensor, original: int, feeds: torch.Tensor) -> "ChannelMap":
        new = torch.nonzero(feeds).flatten()
        old = source[new]
        counts = torch.bincount(old, minlength=original).clamp_min(1).to(torch.float32)
        return cls(source, _sparse(old, new, 1.0 / counts[old], original, source.numel()))

    def pooled(self, order: int) -> "ChannelMap":
        """The map after an orbit pool: orbit o stands for what its slots stood for."""
        rows, cols = self.inflow.indices()
        inflow = _sparse(rows, cols // order, self.inflow.values(), self.original, self.new // order)
        return ChannelMap(self.source.reshape(-1, order)[:, 0].clone(), inflow)

    def reordered(self, converted: torch.Tensor, original: torch.Tensor) -> "ChannelMap":
        """The map after a channel reorder: new position p takes new channel ``converted[p]``, while the original
        model's position r took original channel ``original[r]``."""
        to_original_position = torch.argsort(original)
        to_new_position = torch.argsort(converted)
        picked = self.source[converted]
        rows, cols = self.inflow.indices()
        inflow = _sparse(to_original_position[rows], to_new_position[cols], self.inflow.values(), self.original,
                         self.new)
        return ChannelMap(torch.where(picked >= 0, to_original_position[picked.clamp_min(0)], picked), inflow)

    def part(self, start: int, stop: int, original_start: int | None = None,
             original_stop: int | None = None) -> "ChannelMap":
        """The map of channels ``start:stop`` taken out of the value (a split or slice) where the original took its
        channels ``original_start:original_stop`` (default: the same; they differ where the cut moved to an orbit
        boundary). A channel standing for an original channel outside the original's part (a cut moved, or a
        channel shuffle upstream) stands for none in the part: it feeds no weight on (source −1). An original
        channel with copies on both sides of the cut feeds its whole weight to the copies in the part."""
        low = start if original_start is None else original_start
        high = stop if original_stop is None else original_stop
        source = self.source[start:stop]
        inside = (source >= low) & (source < high)
        rows, cols = self.inflow.indices()
        kept = (cols >= start) & (cols < stop) & (rows >= low) & (rows < high)
        rows, cols, values = rows[kept] - low, cols[kept] - start, self.inflow.values()[kept]
        totals = torch.zeros(high - low).index_add_(0, rows, values)
        inflow = _sparse(rows, cols, values / totals[rows], high - low, stop - start)
        return ChannelMap(torch.where(inside, source - low, torch.full_like(source, -1)), inflow)

    @property
    def unfed(self) -> int:
        """How many channels stand for no original channel."""
        return int((self.source < 0).sum())

    def flattened(self, positions: int) -> "ChannelMap":
        return ChannelMap(self.source, self.inflow, self.spatial * positions)

    @classmethod
    def concat(cls, maps: list["ChannelMap"]) -> "ChannelMap":
        sources, rows, cols, values = [], [], [], []
        original = new = 0
        for m in maps:
            sources.append(torch.where(m.source >= 0, m.source + original, m.source))
            r, c = m.inflow.indices()
            rows.append(r + original)
            cols.append(c + new)
            values.append(m.inflow.values())
            original += m.original
            new += m.new
        return cls(torch.cat(sources), _sparse(torch.cat(rows), torch.cat(cols), torch.cat(values), original, new))

    def dense_inflow(self) -> torch.Tensor:
        """The inflow as a dense (original, new) matrix (for inspection and tests)."""
        return self.inflow.to_dense()


def carried_map(node: fx.Node, sources: list[ChannelMap | None], maps: Mapping[fx.Node, ChannelMap | None], *,
                pool_order: int | None = None, positions: int | None = None, part: tuple[int, ...] | None = None,
                reorder: tuple[torch.Tensor, torch.Tensor] | None = None) -> ChannelMap | None:
    """The channel map of a value that no conv or linear layer writes, from the maps of its inputs.

    ``sources`` are the maps of the node's inputs that carry channels, in argument order, and
    ``maps`` holds the map of every earlier node. A ``torch.cat`` whose parts all have maps joins
    them (:meth:`ChannelMap.concat`); an orbit pool of ``pool_order`` slots pools the first source;
    a node that flattens a spatial map of ``positions`` positions per channel spreads it; a node
    taking channels ``part`` (start, stop, and the original's start and stop, as
    :meth:`ChannelMap.part` takes them) out of a split or slice takes that part; a channel
    ``reorder`` (converted order, original order) reorders; a statistic over the channels (a variance,
    a mean) is one channel standing for the original's one; any other op keeps the map of its widest
    source (the first of them), not that of an operand broadcast over the channels. None when no input
    carries channels.
    """
    if not sources:
        return None
    if node.target is torch.cat and all(maps.get(part) is not None for part in node.args[0]):
        return ChannelMap.concat([maps[part] for part in node.args[0]])
    if is_channel_statistic(node):   # one channel over all channels, in the original as here
        return ChannelMap.identity(1)
    if pool_order is not None:
        return sources[0].pooled(pool_order)
    if positions is not None:
        return sources[0].flattened(positions)
    if part is not None:
        return sources[0].part(*part)
    if reorder is not None:
        return sources[0].reordered(*reorder)
    return max(sources, key=lambda source: -1 if source is None else source.new)   # not a broadcast operand's


def _sparse(rows: torch.Tensor, cols: torch.Tensor, values: torch.Tensor, original: int, new: int) -> torch.Tensor:
    return torch.sparse_coo_tensor(torch.stack([rows, cols]), values.to(torch.float32), (original, new),
                                   check_invariants=False).coalesce()   # indices built here, valid by construction


def budget_source(original: int, orbits: int, order: int, budget: str) -> torch.Tensor:
    """Default assignment of original channels to the (orbit, slot) positions of a new layer.

    ``fields``: every slot of orbit o copies channel o; otherwise position p copies channel
    p mod C (identity when the widths agree; cyclic repetition when the new layer is wider).
    """
    if budget == "fields":
        return torch.arange(orbits).repeat_interleave(order) % original
    return torch.arange(orbits * order) % original


def rows(tensor: torch.Tensor, source: torch.Tensor, fill: float = 0.0) -> torch.Tensor:
    """Rows of ``tensor`` picked by ``source`` along axis 0, ``fill`` where source is −1 (values copied exactly)."""
    valid = source >= 0
    if bool(valid.all()):
        return tensor[source]
    picked = tensor[source.clamp_min(0)]
    return torch.where(valid.reshape(-1, *([1] * (tensor.dim() - 1))), picked, torch.full_like(picked, fill))


def feed(weight: torch.Tensor, inflow: ChannelMap) -> torch.Tensor:
    """Apply an input map to a dense weight (out, in_original·spatial, *kernel) → (out, in_new·spatial, *kernel).

    Sparse: every stored inflow entry moves one input channel's weights (times its value), so the
    cost is proportional to the new weight's size, not to original × new.
    """
    out, kernel = weight.shape[0], weight.shape[2:]
    w = weight.reshape(out, inflow.original, inflow.spatial, *kernel)
    old, new = inflow.inflow.indices()
    values = inflow.inflow.values().to(weight.dtype)
    shape = (1, -1, *([1] * (w.dim() - 2)))
    if new.numel() == inflow.new and bool((torch.bincount(new, minlength=inflow.new) == 1).all()):
        order = torch.argsort(new)   # one entry per new channel: a gather
        picked = w.index_select(1, old[order])
        mixed = picked if bool((values == 1).all()) else picked * values[order].reshape(shape)
    else:
        mixed = w.new_zeros(out, inflow.new, *w.shape[2:])
        mixed.index_add_(1, new, w.index_select(1, old) * values.reshape(shape))
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
