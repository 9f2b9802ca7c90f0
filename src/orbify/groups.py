"""The rotation groups cN and dN and how they act on the pixel grid.

Convention (fixed project-wide and tested against ``numpy.rot90``/``numpy.flip``): an element
``g = (k, m)`` means *mirror if m, then rotate by k·360°/N counter-clockwise*. The mirror is a
left-right flip (``x.flip(-1)``); a quarter turn is ``torch.rot90(x, 1, dims=(-2, -1))``.
Elements are numbered ``index = m·N + k``, so index 0 is the identity and the rotations come
first. Composition follows from ``F R^k = R^-k F``::

    (k1, m1)·(k2, m2) = (k1 + (-1)^m1·k2 mod N, m1 xor m2)

For N dividing 4 every element moves pixels exactly (a permutation); such groups are *exact*.
Other N rotate by interpolation and are *approximate* (see :mod:`orbify.resample`).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import cached_property

import torch

from .errors import GroupError

_NAME = re.compile(r"^\s*([cCdD])\s*(\d+)\s*$")


@dataclass(frozen=True)
class Group:
    """The cyclic group cN (``mirror=False``) or the dihedral group dN (``mirror=True``)."""

    rotations: int
    mirror: bool

    def __post_init__(self) -> None:
        if self.rotations < 1:
            raise GroupError(f"A group needs at least one rotation, got N={self.rotations}",
                             fix="use cN or dN with N ≥ 1, e.g. c4 or d4")

    # -- naming -------------------------------------------------------------------------
    @property
    def name(self) -> str:
        return f"{'d' if self.mirror else 'c'}{self.rotations}"

    def __str__(self) -> str:
        return self.name

    @property
    def order(self) -> int:
        """|G|: N for cN, 2N for dN."""
        return self.rotations * (2 if self.mirror else 1)

    @property
    def exact(self) -> bool:
        """True when every element acts on the pixel grid as an exact permutation (N divides 4)."""
        return 4 % self.rotations == 0

    # -- elements and the multiplication table -------------------------------------------
    @cached_property
    def elements(self) -> tuple[tuple[int, int], ...]:
        """All elements as (k, m) pairs, in index order (index = m·N + k)."""
        return tuple((k, m) for m in range(2 if self.mirror else 1) for k in range(self.rotations))

    def index(self, k: int, m: int) -> int:
        return (m % 2) * self.rotations + k % self.rotations

    def compose(self, a: int, b: int) -> int:
        """Index of a·b (apply b first, then a)."""
        k1, m1 = self.elements[a]
        k2, m2 = self.elements[b]
        return self.index(k1 + (-k2 if m1 else k2), m1 ^ m2)

    def inverse(self, a: int) -> int:
        k, m = self.elements[a]
        return a if m else self.index(-k, 0)

    @cached_property
    def table(self) -> torch.Tensor:
        """Multiplication table: ``table[a, b]`` is the index of a·b (a long tensor |G|×|G|)."""
        n = self.order
        return torch.tensor([[self.compose(a, b) for b in range(n)] for a in range(n)], dtype=torch.long)

    @cached_property
    def inverses(self) -> torch.Tensor:
        return torch.tensor([self.inverse(a) for a in range(self.order)], dtype=torch.long)

    def angle(self, a: int) -> float:
        """Rotation angle of element a in radians (counter-clockwise)."""
        return 2 * math.pi * self.elements[a][0] / self.rotations

    def is_mirror(self, a: int) -> bool:
        return bool(self.elements[a][1])

    # -- action on the pixel grid --------------------------------------------------------
    def quarter_turns(self, a: int) -> int:
        """Number of exact quarter turns of element a (exact groups only)."""
        self._require_exact("quarter_turns")
        return self.elements[a][0] * (4 // self.rotations)

    def act_grid(self, a: int, x: torch.Tensor) -> torch.Tensor:
        """Move the pixels of ``x`` (last two axes) by element a.

        Exact groups use flip/rot90; approximate groups rotate by bilinear interpolation
        (zeros outside the image), so only a central disk is comparable afterwards.
        """
        k, m = self.elements[a]
        if self.exact:
            if m:
                x = x.flip(-1)
            turns = k * (4 // self.rotations)
            return torch.rot90(x, turns, dims=(-2, -1)) if turns % 4 else x
        from .resample import rotate_images

        return rotate_images(x, self.angle(a), mirror=bool(m))

    def _require_exact(self, what: str) -> None:
        if not self.exact:
            raise GroupError(f"{what} needs an exact group, but {self.name} rotates by "
                             f"{360 / self.rotations:g}°, which is not a multiple of 90°",
                             fix="use c1, c2, c4, d1, d2 or d4 here")


def parse_group(spec: str | Group) -> Group:
    """Parse ``"c4"``, ``"D4"``, ``"d1"`` ... into a :class:`Group` (a Group passes through)."""
    if isinstance(spec, Group):
        return spec
    match = _NAME.match(str(spec))
    if not match:
        raise GroupError(
            f"Unknown group {spec!r}",
            fix="write cN for N rotations (c1, c2, c4, c8, ...) or dN for N rotations plus mirror "
                "images (d1, d2, d4, d8, ...); c2, c4, d1, d2 and d4 act exactly on the pixel grid",
        )
    letter, number = match.groups()
    return Group(rotations=int(number), mirror=letter.lower() == "d")


EXACT_GROUPS = ("c1", "c2", "c4", "d1", "d2", "d4")
