"""Layouts: how a group moves the channels of a tensor (docs/design.md §3).

Every layout is a *permutation action* on the channel axis: for each group element g,
``permutation(group)[g]`` is an index ``p`` with ``(g·x)[:, c] = x[:, p[c]]``. Pixels move as
well for spatial tensors (``Group.act_grid``); :func:`act` applies both.

* :class:`Plain` — ordinary channels; g moves pixels only.
* :class:`Orbit` — ``orbits`` blocks of |G| contiguous slots (channel = o·|G| + s); g sends slot s
  to slot g·s.
* :class:`Flat` — the flattened (C, H, W) map of an inner layout; g permutes the entries.
* :class:`Permuted` — a (B, C, H, W) tensor of an inner layout with its axes permuted (channels last:
  (B, H, W, C)); g acts as on the inner layout, on the axes where they now are.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

from orbify.symmetry.groups import Group


class Layout:
    """Base class of the channel layouts."""

    def size(self, group: Group) -> int:
        """Number of channels (or flat features) of a tensor in this layout."""
        raise NotImplementedError

    def permutation(self, group: Group) -> torch.Tensor:
        """Long tensor (|G|, size): row g gives the source channel of every channel of g·x."""
        raise NotImplementedError

    @property
    def is_spatial_flat(self) -> bool:
        return False


@dataclass(frozen=True)
class Plain(Layout):
    """``channels`` ordinary channels, left in place by every group element."""

    channels: int

    def size(self, group: Group) -> int:
        return self.channels

    def permutation(self, group: Group) -> torch.Tensor:
        return torch.arange(self.channels).expand(group.order, -1).clone()

    def __str__(self) -> str:
        return f"plain({self.channels})"


@dataclass(frozen=True)
class Orbit(Layout):
    """``orbits`` regular orbits: channel o·|G| + s is slot s of orbit o; g sends s to g·s."""

    orbits: int

    def size(self, group: Group) -> int:
        return self.orbits * group.order

    def permutation(self, group: Group) -> torch.Tensor:
        n = group.order
        # (g·x)[o, t] = x[o, g⁻¹·t]
        slot_source = group.table[group.inverses]  # [g, t] = g⁻¹·t
        base = torch.arange(self.orbits).repeat_interleave(n) * n
        return base.unsqueeze(0) + slot_source.repeat(1, self.orbits)

    def __str__(self) -> str:
        return f"orbit({self.orbits})"


@dataclass(frozen=True)
class Flat(Layout):
    """A spatial map of layout ``inner`` and size ``height``×``width``, flattened from the channel axis on."""

    inner: Layout
    height: int
    width: int

    def size(self, group: Group) -> int:
        return self.inner.size(group) * self.height * self.width

    def permutation(self, group: Group) -> torch.Tensor:
        group._require_exact("Flattening a spatial map")
        channels = self.inner.size(group)
        index = torch.arange(channels * self.height * self.width).view(channels, self.height, self.width)
        inner = self.inner.permutation(group)
        return torch.stack([group.act_grid(g, index[inner[g]]).flatten() for g in range(group.order)])

    @property
    def is_spatial_flat(self) -> bool:
        return True

    def __str__(self) -> str:
        return f"flat({self.inner}×{self.height}×{self.width})"


@dataclass(frozen=True)
class Permuted(Layout):
    """A tensor ``x.permute(dims)`` of a tensor ``x`` of layout ``inner`` (channels on axis 1, pixels last).

    ``dims`` = (0, 2, 3, 1) is a channels-last map (B, H, W, C). Channels move as ``inner``'s, so
    ``size`` and ``permutation`` are ``inner``'s; :func:`act` moves the axes back, acts and moves them again.
    """

    inner: Layout
    dims: tuple[int, ...]

    def size(self, group: Group) -> int:
        return self.inner.size(group)

    def permutation(self, group: Group) -> torch.Tensor:
        return self.inner.permutation(group)

    @property
    def channel_axis(self) -> int:
        """The axis that holds the channels."""
        return self.dims.index(1)

    def __str__(self) -> str:
        return f"permuted({self.inner}, {','.join(map(str, self.dims))})"


def unpermuted(layout: Layout | None) -> Layout | None:
    """The layout of the value with its axes in the usual order: ``inner`` of a :class:`Permuted`, else ``layout``."""
    return layout.inner if isinstance(layout, Permuted) else layout


def act(group: Group, layout: Layout, g: int, x: torch.Tensor, channel_dim: int = 1) -> torch.Tensor:
    """Apply element g to a tensor of the given layout (channels on ``channel_dim``, pixels last).

    A :class:`Permuted` tensor is acted on with its axes put back in order (``channel_dim`` then applies there).
    """
    if isinstance(layout, Permuted):
        back = sorted(range(len(layout.dims)), key=layout.dims.__getitem__)
        return act(group, layout.inner, g, x.permute(back), channel_dim).permute(layout.dims)
    x = x.index_select(channel_dim, layout.permutation(group)[g].to(x.device))
    if x.dim() > channel_dim + 2 and not isinstance(layout, Flat):
        x = group.act_grid(g, x)
    return x
