"""The rotation groups cN and dN and how they act on the pixel grid (docs/design.md §2).

Convention (fixed project-wide and tested against ``numpy.rot90``/``numpy.flip``): an element
``g = (k, m)`` means *mirror if m, then rotate by k·360°/N counter-clockwise*. The mirror is a
left-right flip (``x.flip(-1)``); a quarter turn is ``torch.rot90(x, 1, dims=(-2, -1))``.
Elements are numbered ``index = m·N + k``, so index 0 is the identity and the rotations come
first. Composition follows from ``F R^k = R^-k F``::

    (k1, m1)·(k2, m2) = (k1 + (-1)^m1·k2 mod N, m1 xor m2)

For N dividing 4 every element moves pixels exactly (a permutation); such groups are *exact*.
Other N rotate by interpolation and are *approximate* (see :mod:`orbify.symmetry.resample`): images by
bilinear interpolation, filters by the group's ``resampling`` method ("harmonic", the default,
or "bilinear"). Inside an approximate group the elements that turn by whole quarter turns (and
the mirror) still act exactly, and :meth:`Group.kernel_matrices` keeps them exact on filters.
"""

from __future__ import annotations

import functools
import math
import re
from dataclasses import dataclass, replace
from functools import cached_property

import torch

from orbify.errors import GroupError
from orbify.symmetry.resample import METHODS, kernel_rotation_matrix

#: Angular band kept when the harmonic method turns a filter by an angle off the 90° grid: |m| ≤ 2,
#: the Nyquist limit of the innermost ring of pixels (four at radius 1, or at √½ for even sizes),
#: which every filter has. A conv reads its input through the filter, so what has to turn
#: correctly is the filter's response to the (smooth) input, not its finest pixel detail: angular
#: frequencies the inner ring cannot hold are dropped from the turned copies instead of being
#: turned wrongly. The band was chosen by measurement on trained models; see benchmarks/README.md,
#: "Finer rotations".
FILTER_BAND = 2

_NAME = re.compile(r"^\s*([cCdD])\s*(\d+)\s*(?::\s*([a-z]+)\s*)?$")


@dataclass(frozen=True)
class Group:
    """The cyclic group cN (``mirror=False``) or the dihedral group dN (``mirror=True``).

    ``resampling`` chooses how an approximate group rotates filters by angles off the 90° grid
    ("harmonic" or "bilinear", see :func:`orbify.symmetry.resample.kernel_rotation_matrix`); exact groups
    never resample and always hold the default.
    """

    rotations: int
    mirror: bool
    resampling: str = "harmonic"

    def __post_init__(self) -> None:
        if self.rotations < 1:
            raise GroupError(f"A group needs at least one rotation, got N={self.rotations}",
                             fix="use cN or dN with N ≥ 1, e.g. c4 or d4")
        if self.resampling not in METHODS:
            raise GroupError(f"Unknown filter resampling {self.resampling!r} for {self.name}",
                             fix=f"use one of: {', '.join(METHODS)}")
        if self.exact:   # exact groups never resample: one group, one value
            object.__setattr__(self, "resampling", METHODS[0])

    # -- naming -------------------------------------------------------------------------
    @property
    def name(self) -> str:
        """The mathematical name: ``c8``, ``d4``."""
        return f"{'d' if self.mirror else 'c'}{self.rotations}"

    @property
    def spec(self) -> str:
        """The name :func:`parse_group` reads back to this very group: ``c8``, or ``c8:bilinear``
        for an approximate group with the non-default resampling."""
        return self.name if self.exact or self.resampling == METHODS[0] else f"{self.name}:{self.resampling}"

    def __str__(self) -> str:
        return self.spec

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

    def acts_exactly(self, a: int) -> bool:
        """True when element a turns by a whole number of quarter turns (a pixel permutation)."""
        return (4 * self.elements[a][0]) % self.rotations == 0

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
        from orbify.symmetry.resample import rotate_images

        return rotate_images(x, self.angle(a), mirror=bool(m))

    def kernel_matrices(self, size: int) -> torch.Tensor:
        """Matrices (|G|, size², size², float64) moving a size×size filter by each element.

        ``(g·k).flatten() = M[g] @ k.flatten()``. Exact elements give the permutation of
        :meth:`act_grid`; the others resample by ``self.resampling`` (harmonic: the band
        |m| ≤ :data:`FILTER_BAND` of the filter, turned; bilinear: the pixel filter interpolated). A mirrored element
        (k, 1) — "mirror, then rotate by θ" — is built as "rotate by -θ, then mirror" (the same
        motion of the plane), which makes every quarter turn and the mirror compose exactly with
        every element: M[h·g] = M[h] M[g] whenever h acts exactly. Cached; never modify the result.
        """
        return _kernel_matrices(self, size)

    def _require_exact(self, what: str) -> None:
        if not self.exact:
            raise GroupError(f"{what} needs an exact group, but {self.name} rotates by "
                             f"{360 / self.rotations:g}°, which is not a multiple of 90°",
                             fix="use c1, c2, c4, d1, d2 or d4 here")


@functools.lru_cache(maxsize=64)
def _kernel_matrices(group: Group, size: int) -> torch.Tensor:
    flip = torch.eye(size * size, dtype=torch.float64).reshape(-1, size, size).flip(-1).reshape(size * size, -1).T
    matrices = []
    for k, m in group.elements:
        turn = _rotation_matrix(size, -k if m else k, group.rotations, group.resampling)
        matrices.append(flip @ turn if m else turn)
    return torch.stack(matrices)


def _rotation_matrix(size: int, k: int, n: int, method: str) -> torch.Tensor:
    """Filter rotation by k/n of a full turn: exact quarter turns q times a resampling by the rest.

    The rest, 2π(4k - qn)/(4n) in [-45°, 45°) with q = round(4k/n) (halves rounded up), comes from
    whole numbers, so rotations that differ by quarter turns (or only in sign of a ±45° rest) share
    the very same resampling matrix.
    """
    quarter_turns = (8 * k + n) // (2 * n)
    rest = 2 * math.pi * (4 * k - quarter_turns * n) / (4 * n)
    band = FILTER_BAND if method == "harmonic" else None
    return kernel_rotation_matrix(size, quarter_turns * math.pi / 2, method) @ kernel_rotation_matrix(size, rest, method, band)


def parse_group(spec: str | Group, resampling: str | None = None) -> Group:
    """Parse ``"c4"``, ``"D4"``, ``"d1"``, ``"c8:bilinear"`` ... into a :class:`Group` (a Group passes through).

    The filter resampling of approximate groups is the ``resampling`` argument ("harmonic" or
    "bilinear") when given, else the one named after a colon, else the default "harmonic".
    ``parse_group(group.spec) == group`` for every group.

    >>> import orbify
    >>> d4 = orbify.parse_group("D4")
    >>> d4.name, d4.order, d4.exact
    ('d4', 8, True)
    >>> c8 = orbify.parse_group("c8:bilinear")
    >>> c8.order, c8.exact, c8.resampling
    (8, False, 'bilinear')
    >>> orbify.parse_group(c8.spec) == c8
    True
    """
    if isinstance(spec, Group):
        return spec if resampling is None else replace(spec, resampling=resampling)
    match = _NAME.match(str(spec))
    if not match:
        raise GroupError(
            f"Unknown group {spec!r}",
            fix="write cN for N rotations (c1, c2, c4, c8, ...) or dN for N rotations plus mirror "
                "images (d1, d2, d4, d8, ...); c2, c4, d1, d2 and d4 act exactly on the pixel grid, others "
                f"resample filters, by {' or '.join(METHODS)} (e.g. c8:bilinear; default {METHODS[0]})",
        )
    letter, number, named = match.groups()
    return Group(rotations=int(number), mirror=letter.lower() == "d", resampling=resampling or named or METHODS[0])


APPROXIMATE_NOTE = ("{group} is an approximate group: its rotations by multiples of {step:g}° that are not multiples "
                    "of 90° move filters by resampling ({resampling}) and images by bilinear interpolation, so the "
                    "converted model is only approximately equivariant to them (measured on a central disk, with "
                    "smooth inputs); it stays exactly equivariant to its quarter turns{mirror}")


def approximate_note(group: Group) -> str:
    """One sentence stating plainly how far ``group`` acts exactly (empty for exact groups)."""
    if group.exact:
        return ""
    return APPROXIMATE_NOTE.format(group=group.name, step=360 / group.rotations, resampling=group.resampling,
                                   mirror=" and its mirror images" if group.mirror else "")
