"""Models with no exact input size: which ops need sides that no input size gives them together.

A strided op with kernel ``k``, stride ``s``, padding ``p`` and dilation ``d`` is exact on the input
sides ``h ≡ d·(k − 1) + 1 − 2p (mod s)`` (docs/design.md §6): a 3×3 stride-2 conv with padding 1 on odd
sides, a 2×2 stride-2 pool on even ones. Each such requirement on an op's own input side is, given the
ops upstream of it exact, a set of residues of the model's input side ``H`` modulo a period ``P`` (the
product of the strides on the way there times the op's stride: shifting ``H`` by ``P`` shifts every side
by a whole number of strides). Two ops whose sets are disjoint *conflict*: no input size makes both
exact, as when a 3×3 stride-2 conv and a 2×2 stride-2 average pool read the same tensor (the
resnet-d shortcut). A system of congruences is solvable exactly when every pair is, so the conflicts
found pairwise are the whole story for strided ops; a node that runs only at some sides (an add of a
branch downsampled and upsampled again beside an undivided one) takes part like any other.

:func:`find_conflicts` probes one period of input sides, records for each op the sides where it is
exact (``ok``) and walks the graph in order, intersecting the sets of the ops upstream of every node.
Where an intersection becomes empty it keeps a smallest set of ops that is still empty (usually two),
reports it, lets one of them *give way* (:func:`_giving_way`) and goes on, so one probe finds every
conflict of the model. Probing is the caller's (:class:`orbify.graph.sizes.SizeChecker` runs shapes on
the meta device), so this module does no arithmetic on tensors.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from fractions import Fraction

from torch import fx, nn

from orbify.errors import InputShapeError
from orbify.graph.tracing import describe

#: The longest period probed (input sides tried); a model needing more is not analysed (no conflict is claimed).
MAX_PERIOD = 128

#: Conflicts spelled out in an error (the rest are counted).
_LISTED = 4

#: Characters of a failure's message quoted in a requirement.
_WHY = 160

#: Two input sides far above any model's usual one, where every side is large: their difference gives each
#: op's sides per input pixel (the product of the strides on the way), hence the period. Both are shifted
#: together (by less than MAX_PERIOD) until the model runs at both.
_FAR = (4096, 8192)


@dataclass
class SizeProbe:
    """What one input side does to the model (filled in by the size checker).

    ``broken``: node name → why the op is not exact there (an object with ``needs``, the op's requirement on
    its own input side, in words); ``failed``: (node name, why) where the model stopped running, or None;
    ``sides``: node name → (input height, stride along the height) of every strided or resampling node
    reached (a resampling counts with stride 2: a scale factor of ½ needs even sides).
    """

    broken: dict[str, object] = field(default_factory=dict)
    failed: tuple[str, str] | None = None
    sides: dict[str, tuple[int, int]] = field(default_factory=dict)


Probe = Callable[[int, bool], SizeProbe]
"""``probe(side, resampling)``: a :class:`SizeProbe` at the square input side; ``resampling=False`` skips
probing resamplings numerically (sides only)."""


@dataclass(frozen=True)
class Requirement:
    """One op of a conflict: what it needs of its own input side, and the model input sides that give it that."""

    node: str
    where: str          # the node, its module and source line (tracing.describe)
    needs: str          # e.g. "an odd input side (kernel 3×3, stride 2, padding 1)"
    sizes: str          # e.g. "model input sides ≡ 1 (mod 8)", given the ops upstream exact

    def __str__(self) -> str:
        return f"'{self.node}' needs {self.needs}, given by {self.sizes}"


@dataclass(frozen=True)
class StrideConflict:
    """Ops that are never exact together (one op alone: exact at no input size), and which should give way."""

    members: tuple[Requirement, ...]
    ranked: tuple[str, ...]     # the members' nodes, the one a repair replaces first (orbify.graph.stride_repair)

    @property
    def giving_way(self) -> str:
        return self.ranked[0]

    def __str__(self) -> str:
        if len(self.members) == 1:
            return f"{self.members[0]}, which no input size gives it"
        ops = " and ".join(f"'{m.node}'" for m in self.members)
        together = "both" if len(self.members) == 2 else "them all"
        return f"conflict between {ops}: " + "; ".join(map(str, self.members)) + f", and no input size gives {together}"


def no_exact_size_error(conflicts: Iterable[StrideConflict]) -> InputShapeError:
    """The error saying that no input size is exact, naming each conflict and the repair that removes it."""
    conflicts = list(conflicts)
    giving_way = ", ".join(f"'{c.giving_way}'" for c in conflicts[:_LISTED])
    return InputShapeError(
        f"No input size is exact for this model: {len(conflicts)} conflict{'s' if len(conflicts) > 1 else ''} "
        "between ops that need input sides no size gives them together — " + " | ".join(map(str, conflicts[:_LISTED]))
        + (f" | and {len(conflicts) - _LISTED} more" if len(conflicts) > _LISTED else ""),
        where=conflicts[0].members[0].where,
        fix=f"convert with --repair-strides (orbify.convert(..., repair_strides=True)): it replaces one op of each "
            f"conflict ({giving_way}{', ...' if len(conflicts) > _LISTED else ''}) by the nearest op exact on the "
            "other parity and notes the drift this causes before tuning; or convert at an inexact size anyway with "
            "--input-size")


def find_conflicts(gm: fx.GraphModule, probe: Probe, near: int) -> list[StrideConflict]:
    """The conflicts that leave ``gm`` without an exact input size; empty when some size is exact.

    ``probe`` checks one square input side; one period of sides from about ``near`` up is probed. Also
    empty when the period cannot be found or exceeds :data:`MAX_PERIOD` (nothing is claimed then).
    """
    period = _period(probe)
    if period is None:
        return []
    start = max(near, 2 * period, 8)
    window = _Window(start, period, [probe(side, True) for side in range(start, start + period)])
    if window.some_size_exact():
        return []
    return _Walk(gm, window).conflicts()


def _period(probe: Probe) -> int | None:
    """The least common multiple of ``stride ÷ (sides per input pixel)`` over the strided and resampling ops,
    measured between two far sides the model runs at; None when it runs at no such pair."""
    for offset in range(MAX_PERIOD):
        low = probe(_FAR[0] + offset, False)
        high = probe(_FAR[1] + offset, False) if low.failed is None else low
        if high.failed is None:
            return _least_period(low, high)
    return None


def _least_period(low: SizeProbe, high: SizeProbe) -> int | None:
    period = 1
    for name, (side, stride) in high.sides.items():
        if name not in low.sides or side == low.sides[name][0]:
            continue        # a side that does not follow the input's (after a resize to a given size)
        per_pixel = Fraction(side - low.sides[name][0], _FAR[1] - _FAR[0])
        period = math.lcm(period, (stride / per_pixel).numerator)
    return period if period <= MAX_PERIOD else None


class _Window:
    """One period of probed input sides: for each op, the sides at which it is exact, as a bit mask."""

    def __init__(self, start: int, period: int, probes: list[SizeProbe]):
        self.start, self.period = start, period
        self.full = (1 << period) - 1
        self.ok: dict[str, int] = {}
        self.needs: dict[str, str] = {}
        for bit, found in enumerate(probes):
            for name, violation in found.broken.items():
                self._miss(name, bit, violation.needs)
            if found.failed is not None:
                name, why = found.failed
                self._miss(name, bit, f"sides it can run on (elsewhere it fails: {why[:_WHY]})")

    def _miss(self, name: str, bit: int, needs: str) -> None:
        self.ok[name] = self.ok.get(name, self.full) & ~(1 << bit)
        self.needs.setdefault(name, needs)

    def some_size_exact(self) -> bool:
        return self.together(self.ok) != 0

    def together(self, names: Iterable[str]) -> int:
        mask = self.full
        for name in names:
            mask &= self.ok[name]
        return mask

    def residues(self, mask: int) -> str:
        """The input sides of ``mask`` as residues modulo the least modulus that describes them."""
        if mask == 0:
            return "no model input side"
        if mask == self.full:
            return "every model input side"
        modulus = next(m for m in range(1, self.period + 1) if self.period % m == 0 and
                       all((mask >> i & 1) == (mask >> (i - m) & 1) for i in range(m, self.period)))
        residues = sorted({(self.start + i) % modulus for i in range(self.period) if mask >> i & 1})
        return f"model input sides ≡ {', '.join(map(str, residues))} (mod {modulus})"


class _Walk:
    """The graph in order: each node's constrained ancestors, and the conflicts among them."""

    def __init__(self, gm: fx.GraphModule, window: _Window):
        self.gm, self.window = gm, window
        self.nodes = {node.name: node for node in gm.graph.nodes}
        self.order = {name: i for i, name in enumerate(self.nodes)}
        self.upstream: dict[str, frozenset[str]] = {}
        self.given_way: set[str] = set()

    def conflicts(self) -> list[StrideConflict]:
        found = []
        for node in self.gm.graph.nodes:
            inherited = (self.upstream[arg.name] for arg in node.all_input_nodes)
            own = {node.name} if node.name in self.window.ok else set()
            self.upstream[node.name] = frozenset(own).union(*inherited)
            kept = self._kept(node.name)
            while kept and self.window.together(kept) == 0:
                members = self._smallest(kept)
                found.append(self._conflict(members))
                self.given_way.add(found[-1].giving_way)
                kept = self._kept(node.name)
        return found

    def _kept(self, name: str) -> list[str]:
        """The constrained ops at or upstream of ``name`` that have not given way, in graph order."""
        return sorted(self.upstream[name] - self.given_way, key=self.order.__getitem__)

    def _smallest(self, ops: list[str]) -> list[str]:
        """A subset of ``ops`` with no common exact side from which no op can be left out (earliest tried first)."""
        members = list(ops)
        for name in ops:
            rest = [m for m in members if m != name]
            if rest and self.window.together(rest) == 0:
                members = rest
        return members

    def _conflict(self, members: list[str]) -> StrideConflict:
        """The conflict among ``members``; each one's model input sides are those its own kept upstream ops
        (the other members left out) leave it."""
        requirements = tuple(
            Requirement(name, describe(self.nodes[name]), self.window.needs[name],
                        self.window.residues(self.window.together(set(self._kept(name)) - set(members) | {name})))
            for name in members)
        return StrideConflict(requirements, _ranked(self.gm, [self.nodes[name] for name in members]))


def _ranked(gm: fx.GraphModule, nodes: list[fx.Node]) -> tuple[str, ...]:
    """The ops of a conflict in the order a repair tries to replace them: a pool before a conv (its
    replacement touches no learned weights), a conv before any other op (which has no replacement), and among
    those an op exact on even sides (an even kernel) before one exact on odd sides (an odd kernel, centred on a
    pixel, as most strided convs are); the latest in the graph first on ties."""
    def rank(index_node: tuple[int, fx.Node]) -> tuple[int, int, int]:
        index, node = index_node
        module = gm.get_submodule(node.target) if node.op == "call_module" else None
        kind = 0 if isinstance(module, (nn.AvgPool2d, nn.MaxPool2d)) else 1 if isinstance(module, nn.Conv2d) else 2
        kernel, dilation = (getattr(module, key, 1) for key in ("kernel_size", "dilation"))
        first = (lambda v: v if isinstance(v, int) else v[0])
        odd = (first(dilation) * (first(kernel) - 1) + 1) % 2
        return kind, odd, -index
    return tuple(node.name for _, node in sorted(enumerate(nodes), key=rank))
