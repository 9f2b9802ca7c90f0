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
* :class:`Tokens` — a sequence of tokens (B, N, C): fixed prefix tokens (a class token) and a patch grid
  flattened row by row; g permutes the channels as the inner layout and the grid tokens as it moves pixels.
* :class:`HeadValues` — a value inside attention (per-head queries, keys, values, attention scores): any number
  of axes, of which some hold the tokens of a patch grid and at most one a head's channels.
"""

from __future__ import annotations

import math
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


@dataclass(frozen=True)
class Tokens(Permuted):
    """A token sequence ``x.permute(dims)`` of a (B, C, N) tensor ``x`` whose channels have layout ``inner``.

    The N = ``prefix`` + ``height``·``width`` tokens are ``prefix`` fixed tokens (class and register tokens) followed
    by a ``height``×``width`` grid of patches flattened row by row. A group element permutes the channels as
    ``inner``'s (``size`` and ``permutation`` are ``inner``'s, as for :class:`Permuted`), moves the grid tokens
    as it moves pixels (:meth:`token_permutation`) and leaves the prefix in place (docs/design.md §3).
    ``dims`` = (0, 2, 1) is the usual (B, N, C) sequence, (0, 1, 2) the (B, C, N) one.
    """

    height: int
    width: int
    prefix: int

    @property
    def tokens(self) -> int:
        """Number of tokens N."""
        return self.prefix + self.height * self.width

    @property
    def token_axis(self) -> int:
        """The axis that holds the tokens."""
        return self.dims.index(2)

    def token_permutation(self, group: Group) -> torch.Tensor:
        """Long tensor (|G|, N): row g gives the source token of every token of g·x."""
        group._require_exact("Moving patch tokens")
        grid = torch.arange(self.height * self.width).view(self.height, self.width) + self.prefix
        fixed = torch.arange(self.prefix)
        return torch.stack([torch.cat([fixed, group.act_grid(g, grid).flatten()]) for g in range(group.order)])

    def entry_permutation(self, group: Group, shape: tuple[int, ...]) -> torch.Tensor:
        """Long tensor (|G|, numel): the source entry of every entry of g·t for a tensor t of ``shape`` that
        broadcasts against a value of this layout (axes aligned from the right, as broadcasting aligns them).

        The channel axis moves as ``inner``'s channels, the token axis as the tokens (it must hold all of them,
        or be of size one); other axes must be of size one.
        """
        offset = len(self.dims) - len(shape)
        moves = {self.channel_axis - offset: self.permutation(group), self.token_axis - offset: None}
        if any(size > 1 and axis not in moves for axis, size in enumerate(shape)):
            raise ValueError(f"a tensor of shape {shape} varies along an axis other than tokens and channels")
        if shape[self.token_axis - offset] > 1:
            moves[self.token_axis - offset] = self.token_permutation(group)
        index = torch.arange(math.prod(shape)).view(shape)
        rows = []
        for g in range(group.order):
            moved = index
            for axis, permutation in moves.items():
                if 0 <= axis < len(shape) and shape[axis] > 1:
                    moved = moved.index_select(axis, permutation[g])
            rows.append(moved.flatten())
        return torch.stack(rows)

    def __str__(self) -> str:
        return f"tokens({self.inner}, {self.prefix}+{self.height}×{self.width}, {','.join(map(str, self.dims))})"


@dataclass(frozen=True)
class HeadValues(Layout):
    """A value inside attention over a token sequence: a tensor of ``rank`` axes, of which the ``token_axes`` hold the
    tokens of a sequence of ``prefix`` fixed tokens and a ``height``×``width`` patch grid (as :class:`Tokens`), and
    ``channel_axis`` (None: no axis) holds one head's channels, of layout ``inner`` (docs/design.md §5).

    Per-head queries, keys and values (B, heads, N, head_dim) have one token axis and the channel axis; the
    attention scores (B, heads, N, N) two token axes and no channel axis. Other axes (batch, heads, the q/k/v
    index) are left in place by every group element. A head holds whole orbits, so a group element permutes the
    slots inside every head alike: ``size`` and ``permutation`` are ``inner``'s, one head's.
    """

    inner: Layout
    height: int
    width: int
    prefix: int
    rank: int
    token_axes: tuple[int, ...]
    channel_axis: int | None

    def size(self, group: Group) -> int:
        return self.inner.size(group)

    def permutation(self, group: Group) -> torch.Tensor:
        return self.inner.permutation(group)

    @property
    def moved_axes(self) -> tuple[int, ...]:
        """The axes a group element moves entries along (tokens and channels), in order."""
        return tuple(sorted(self.token_axes + (() if self.channel_axis is None else (self.channel_axis,))))

    def token_permutation(self, group: Group) -> torch.Tensor:
        """Long tensor (|G|, N): row g gives the source token of every token of g·x (as :class:`Tokens`)."""
        return Tokens(self.inner, (0, 2, 1), self.height, self.width, self.prefix).token_permutation(group)

    def __str__(self) -> str:
        tokens = ",".join(map(str, self.token_axes))
        channels = "-" if self.channel_axis is None else str(self.channel_axis)
        return (f"heads({self.inner}, {self.prefix}+{self.height}×{self.width}, rank {self.rank}, tokens {tokens}, "
                f"channels {channels})")


def unpermuted(layout: Layout | None) -> Layout | None:
    """The layout of the value with its axes in the usual order: ``inner`` of a :class:`Permuted`, else ``layout``;
    the channels of one head (``inner``) for :class:`HeadValues`."""
    return layout.inner if isinstance(layout, (Permuted, HeadValues)) else layout


def act(group: Group, layout: Layout, g: int, x: torch.Tensor, channel_dim: int = 1) -> torch.Tensor:
    """Apply element g to a tensor of the given layout (channels on ``channel_dim``, pixels last).

    A :class:`Permuted` tensor is acted on with its axes put back in order (``channel_dim`` then applies there);
    a :class:`Tokens` one has its channels and its tokens permuted where they are, a :class:`HeadValues` one its
    channel axis and every token axis.
    """
    if isinstance(layout, HeadValues):
        if layout.channel_axis is not None:
            x = x.index_select(layout.channel_axis, layout.permutation(group)[g].to(x.device))
        tokens = layout.token_permutation(group)[g].to(x.device)
        for axis in layout.token_axes:
            x = x.index_select(axis, tokens)
        return x
    if isinstance(layout, Tokens):
        x = x.index_select(layout.channel_axis, layout.permutation(group)[g].to(x.device))
        return x.index_select(layout.token_axis, layout.token_permutation(group)[g].to(x.device))
    if isinstance(layout, Permuted):
        back = sorted(range(len(layout.dims)), key=layout.dims.__getitem__)
        return act(group, layout.inner, g, x.permute(back), channel_dim).permute(layout.dims)
    x = x.index_select(channel_dim, layout.permutation(group)[g].to(x.device))
    if x.dim() > channel_dim + 2 and not isinstance(layout, Flat):
        x = group.act_grid(g, x)
    return x
