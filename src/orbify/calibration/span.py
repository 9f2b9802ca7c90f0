"""Choosing kept channels by the reconstruction error they leave: greedy selection of whole orbits.

In the converted model the orbit that stands for original channel c carries, in slot s, what the
original's channel c computes on the image moved by s⁻¹, moved back: ``ã[c, s](x) = s·a_c(s⁻¹·x)``.
The next layer can use all these features. A good set of kept channels is one whose orbits
explain the values the next layers read, on every copy of the images. With the covariance of
the features ã over the calibration images (positions are samples), the kept channels are
chosen greedily: each step adds the channel whose block of |G| features most reduces the
remaining weighted variance of all features (a block form of orthogonal matching pursuit; docs/design.md §9.3);
conditioning on a chosen block removes what it explains from every other. The weight of a
feature is how strongly the next layers read its channel (Σ_o ‖W[o, c]‖²). Channels that are
moved copies of one another explain each other, so the choice spreads over distinct patterns.

When the next layer has a plain output (a classifier after the orbit pool), it sees only the
mean over each orbit's slots: the features are then the slot means (blocks of one).

**Symmetry.** Moving the data by h relabels the slots (``ã[c, s](h·x) = h·ã[c, h⁻¹s](x)``), so
over the images and their copies the covariance depends on s⁻¹s' only:
``cov[(c, s), (c', s')] = B[c, c', s⁻¹s']``. Only B is accumulated — each sample contributes the
products of one slot's features with all features, the slot cycling over the samples —
which costs |G| times less than the full covariance.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout

#: Samples (positions) per batch and channel class used for the covariance, at most.
SAMPLES_PER_BATCH = 2048


@dataclass
class SpanRequest:
    """One channel class: the module path of its first reader, its width, how strongly its readers read each channel,
    and the layout of the reader's input (where its channels and positions are)."""

    reader: str
    channels: int
    weights: torch.Tensor    # (channels,)
    slot_means: bool         # the reader sees only the mean over each orbit's slots
    layout: Layout | None = None


class OrbitCovariance:
    """Accumulates B[c, c', t] (and the channel means) of one class over batches."""

    def __init__(self, channels: int, group: Group, slots: list[int]):
        self.group = group
        self.slots = slots
        self.table = group.table[slots][:, slots] if len(slots) > 1 else torch.zeros(1, 1, dtype=torch.long)
        width = len(slots)
        self.block_row = torch.zeros(channels, channels, width, dtype=torch.float64)
        self.sums = torch.zeros(channels, dtype=torch.float64)
        self.count = 0
        self.samples = 0

    def add(self, views: torch.Tensor, seed: int) -> None:
        """``views``: (samples, channels, slots), slot s holding s·a(s⁻¹·x) at the same positions."""
        if views.shape[0] > SAMPLES_PER_BATCH:
            pick = torch.randperm(views.shape[0], generator=torch.Generator().manual_seed(seed))[:SAMPLES_PER_BATCH]
            views = views[pick]
        width = len(self.slots)
        which = (torch.arange(views.shape[0]) + self.samples) % width
        batch_row = torch.zeros(self.block_row.shape, dtype=views.dtype)   # one batch in the data's precision
        for h in range(width):
            rows = views[which == h]
            if rows.shape[0]:
                # B[c, c', t] += Σ ã[c, h] ã[c', h·t]
                batch_row += torch.einsum("ic,idt->cdt", rows[:, :, h], rows[:, :, self.table[h]])
        self.block_row += batch_row.double()
        self.sums += views.sum((0, 2)).double()
        self.count += views.shape[0] * width
        self.samples += views.shape[0]

    def covariance(self, slot_means: bool) -> tuple[torch.Tensor, torch.Tensor]:
        """The centred block row B (C, C, |G|) and the slot table, or for slot means (C, C, 1) and a trivial table."""
        width = len(self.slots)
        mean = self.sums / max(self.count, 1)
        block = self.block_row / max(self.samples, 1) - (mean[:, None] * mean[None, :])[:, :, None]
        inverse = _inverses(self.table)
        block = (block + block.transpose(0, 1)[:, :, inverse]) / 2   # cov[(c,0),(c',t)] = cov[(c',0),(c,t⁻¹)]
        if slot_means or width == 1:
            return block.mean(2, keepdim=True), torch.zeros(1, 1, dtype=torch.long)
        return block, self.table


def _inverses(table: torch.Tensor) -> torch.Tensor:
    """Position of t⁻¹ for every position t of a slot table (``table[a, b]`` = position of a·b; 0 the identity)."""
    return (table == 0).long().argmax(1)


def greedy_orbits(block_row: torch.Tensor, table: torch.Tensor, weights: torch.Tensor, count: int,
                  blocks: int = 1) -> torch.Tensor:
    """Choose ``count`` channels whose orbits best explain all features (weighted); increasing order.

    ``block_row[c, c', t]`` = cov[(c, 0), (c', t)] of a covariance that depends on s⁻¹s' only
    (``table``: the slots' multiplication table). Conditioning on a whole orbit keeps that
    symmetry, so the greedy steps work on the block row alone. Every slot of a target channel
    gains the same from a candidate (the candidate's block is invariant under the relabelling),
    so slot 0 stands for all. With ``blocks`` > 1 (and both counts divisible) every block of
    channels gets the same number of kept channels.
    """
    channels, _, width = block_row.shape
    b = block_row.float()   # float32: the steps only rank candidates, and they are bound by memory traffic
    inverse = _inverses(table)
    relative = table[inverse]                          # [s, s'] = s⁻¹·s'
    scale = float(b[torch.arange(channels), torch.arange(channels), 0].mean().clamp_min(1e-30))
    jitter = 1e-5 * scale * torch.eye(width, dtype=b.dtype)
    root_weights = (weights / weights.max().clamp_min(1e-30)).to(b.dtype).clamp_min(0).sqrt()
    quota = count // blocks if blocks > 1 and count % blocks == 0 and channels % blocks == 0 else None
    owner = torch.arange(channels) * blocks // channels
    taken = torch.zeros(channels, dtype=torch.bool)
    every = torch.arange(channels)
    for _ in range(min(count, channels)):
        own = b[every, every][:, relative]            # (C, |G|, |G|): cov of each candidate's block
        factor, _ = torch.linalg.cholesky_ex(own + jitter)
        # gain_k = Σ_c' w_c' v_k,c'ᵀ own_k⁻¹ v_k,c' with v_k,c'[s] = cov[(k, s), (c', 0)] = b[k, c', s⁻¹]
        scaled = b * root_weights[None, :, None]
        products = torch.bmm(scaled.transpose(1, 2), scaled)[:, inverse][:, :, inverse]
        gain = torch.cholesky_solve(products, factor).diagonal(dim1=1, dim2=2).sum(1)
        allowed = ~taken
        if quota is not None:
            allowed &= ~(torch.bincount(owner[taken], minlength=blocks) >= quota)[owner]
        gain[~allowed] = -1.0
        j = int(gain.argmax())
        taken[j] = True
        column = b[:, j][:, relative]                   # [c', t, s] = cov[(c', t), (j, s)]
        whitened = torch.linalg.solve_triangular(factor[j], column.reshape(-1, width).T, upper=False)  # (|G|, C'·|G|)
        b -= (whitened.T.reshape(channels, width, width)[:, 0] @ whitened).reshape(channels, channels, width)
    if count > channels:
        return torch.arange(count) % channels
    return torch.nonzero(taken).flatten()
