"""Which original channels share an orbit in a converted model (docs/design.md §8).

Two pieces, used by :mod:`orbify.conversion.converter` and :mod:`orbify.calibration`:

* **Channel matching** (:func:`match_channels`). Which original channels share an orbit, and in
  which slot, is free. The weight residual ‖W − Π(W)‖ of a layer is the scatter of its output
  channels' filters, each moved back to slot 0, around their orbit's mean. Matching alternates two
  steps that never raise it: given the tied weight (the orbit means), assign channels to
  (orbit, slot) positions by a linear assignment (``scipy.optimize.linear_sum_assignment``); given
  the assignment, project again. It starts from the identity assignment, so the result is never
  worse than the identity.
* **Channel classes** (:class:`ChannelClasses`). Values joined by an elementwise op (a residual
  add, a squeeze-excitation product) must hold the same original channel in every position, so
  the layers that write them share one assignment; grouped convs and group norms that read a
  value keep its channels inside their groups; a value that is split, sliced or shuffled along
  its channels keeps the identity assignment, so that its parts hold the original's parts.

Loading the weights is :mod:`orbify.transfer.loading`; which layers take part, :mod:`orbify.transfer.kinds`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import torch
from scipy.optimize import linear_sum_assignment
from torch import fx, nn

from orbify.graph.channel_order import cuts_channels
from orbify.graph.rules import broadcasts_channel, elementwise, rule_for
from orbify.graph.tracing import shape
from orbify.transfer.kinds import chooses_channels

#: Alternations of assignment and projection at most (matching stops earlier when it stops improving).
MATCH_ROUNDS = 6
#: Multiply-adds of one assignment round above which a layer keeps the identity assignment (a few seconds).
MATCH_WORK_LIMIT = 2e10


# -- matching -----------------------------------------------------------------------------------

@dataclass
class MatchTerm:
    """One layer writing into the channels being matched.

    ``rows`` holds original output channel c's weight in row c, its inputs already in the
    converted order (out-first, also for transposed convs). ``tying`` is the layer's weight
    parametrization: ``tying(tying.right_inverse(W))`` is Π(W) in the stored orientation.
    """

    rows: torch.Tensor
    tying: nn.Module
    transposed: bool = False

    def project(self, full: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Π of an out-first full weight (positions, ...): its base and the tied weight, out-first."""
        stored = full.transpose(0, 1) if self.transposed else full
        base = self.tying.right_inverse(stored)
        tied = self.tying(base)
        return base, (tied.transpose(0, 1) if self.transposed else tied)


@dataclass
class MatchResult:
    """The chosen assignment; per term, the base of Π(W) under it and the relative residuals."""

    source: torch.Tensor                  # (positions,) original channel of every position
    bases: list[torch.Tensor] | None      # per term: right_inverse of the term's weight under ``source``
    residuals: list[float] | None         # per term: ‖W − ΠW‖ / ‖W‖ under ``source``
    identity_residuals: list[float] | None   # the same under the default (usage) assignment
    rounds: int = 0
    notes: list[str] = field(default_factory=list)


def match_channels(terms: list[MatchTerm], usage: torch.Tensor, blocks: int = 1) -> MatchResult:
    """Assign original channels to (orbit, slot) positions to minimise the summed relative weight residual.

    ``usage`` is the default assignment (position → original channel); matching permutes it, so
    every channel keeps the number of positions it had. Each term's weight counts relative to its
    norm. ``blocks`` > 1 keeps channel c in block ⌊c·blocks/C⌋ at positions of block
    ⌊p·blocks/P⌋ (grouped layers read whole blocks); it needs as many positions as channels.
    Layers too large to match in a few seconds (:data:`MATCH_WORK_LIMIT`) keep ``usage``, with a note.
    """
    positions = usage.numel()
    channels = terms[0].rows.shape[0]
    work = sum(channels * positions * t.rows[0].numel() for t in terms)
    skip = None
    if work > MATCH_WORK_LIMIT:
        skip = f"{work:.1e} multiply-adds per round exceed the limit of {MATCH_WORK_LIMIT:.0e}"
    elif blocks > 1 and positions != channels:
        skip = f"the layer is read in {blocks} channel groups and its width changes ({channels} → {positions})"
    if skip is not None:
        return MatchResult(usage, None, None, None, 0, [f"channel matching skipped: {skip}"])
    flat = [t.rows.reshape(t.rows.shape[0], -1) for t in terms]
    weights = [1.0 / max(float((w**2).sum()), 1e-30) for w in flat]   # every term counts relative to its norm
    forbidden = _block_mask(usage, channels, blocks) if blocks > 1 else None
    best = identity = _Projection(terms, flat, usage, weights)
    rounds = 0
    while rounds < MATCH_ROUNDS:
        rounds += 1
        score = sum(k * (w @ c.T) for w, c, k in zip(flat, best.tied, weights))   # (channels, positions)
        score = score[usage].double().numpy()
        if forbidden is not None:
            score[forbidden] = -np.inf
        row, col = linear_sum_assignment(score, maximize=True)
        candidate = torch.empty_like(usage)
        candidate[torch.from_numpy(col)] = usage[torch.from_numpy(row)]
        if torch.equal(candidate, best.source):
            break
        projection = _Projection(terms, flat, candidate, weights)
        if projection.total >= best.total * (1 - 1e-9):
            break
        best = projection
    return MatchResult(best.source, best.bases, best.relative(), identity.relative(), rounds)


class _Projection:
    """Π of every term under one assignment: bases, tied weights (the orbit means), squared residuals.

    ``total`` is the objective: the squared residuals weighted by ``weights``.
    """

    def __init__(self, terms: list[MatchTerm], flat: list[torch.Tensor], source: torch.Tensor,
                 weights: list[float]):
        self.source = source
        self.bases, self.tied, self.squared, self.norms = [], [], [], []
        in_order = source.numel() == flat[0].shape[0] and torch.equal(source, torch.arange(source.numel()))
        for term, w in zip(terms, flat):
            full = w if in_order else w[source]
            base, tied = term.project(full.reshape(source.numel(), *term.rows.shape[1:]))
            tied = tied.reshape(source.numel(), -1)
            self.bases.append(base)
            self.tied.append(tied)
            self.squared.append(float(torch.sub(full, tied).pow_(2).sum()))
            self.norms.append(float((full**2).sum()))
        self.total = sum(k * s for k, s in zip(weights, self.squared))

    def relative(self) -> list[float]:
        """‖W − ΠW‖ / ‖W‖ of every term's weight under this assignment."""
        return [math.sqrt(s / n) if n > 0 else 0.0 for s, n in zip(self.squared, self.norms)]


def _block_mask(usage: torch.Tensor, channels: int, blocks: int) -> np.ndarray:
    positions = usage.numel()
    row_block = (usage * blocks) // channels
    col_block = (torch.arange(positions) * blocks) // positions
    return (row_block[:, None] != col_block[None, :]).numpy()


# -- channel classes ----------------------------------------------------------------------------

class ChannelClasses:
    """Which values of a graph must share their channel assignment, and what limits it.

    Every value gets a class: a layer that chooses its output channels (:func:`chooses_channels`)
    starts one; an elementwise op of several full-width tensors joins its operands' classes; a
    concatenation is a composite of its parts; everything else keeps its first input's class.
    Grouped convs and group norms constrain the class they read (or write) to whole blocks. A
    class is *frozen* (identity assignment) when it holds the graph input or a constant, or takes
    part in a composite that must be kept in blocks or joined.
    """

    def __init__(self, gm: fx.GraphModule):
        self._parent: dict[int, int] = {}
        self._members: dict[int, list[fx.Node]] = {}
        self._blocks: dict[int, int] = {}
        self._frozen: set[int] = set()
        self._parts: dict[int, list[int]] = {}
        self._of: dict[fx.Node, int] = {}
        self._order: dict[fx.Node, int] = {}
        self._constant: set[fx.Node] = set()   # values computed from the model's tensors alone (a reshaped scale)
        for node in gm.graph.nodes:
            self._visit(gm, node)

    # public
    def producers(self, node: fx.Node) -> list[fx.Node]:
        """The channel-choosing layers whose outputs share ``node``'s class, in graph order."""
        return self._members.get(self._find(self._of[node]), [])

    def key(self, node: fx.Node) -> int:
        return self._find(self._of[node])

    def blocks(self, node: fx.Node) -> int | None:
        """Blocks the class must be kept in (1: none), or None when it is frozen."""
        root = self._find(self._of[node])
        return None if root in self._frozen else self._blocks.get(root, 1)

    # building
    def _new(self, frozen: bool = False) -> int:
        cid = len(self._parent)
        self._parent[cid] = cid
        if frozen:
            self._frozen.add(cid)
        return cid

    def _find(self, cid: int) -> int:
        while self._parent[cid] != cid:
            self._parent[cid] = self._parent[self._parent[cid]]
            cid = self._parent[cid]
        return cid

    def _union(self, a: int, b: int) -> int:
        a, b = self._find(a), self._find(b)
        if a == b:
            return a
        self._parent[b] = a
        self._members[a] = sorted(self._members.get(a, []) + self._members.pop(b, []),
                                  key=lambda n: self._order[n])
        self._blocks[a] = math.lcm(self._blocks.get(a, 1), self._blocks.pop(b, 1))
        if b in self._frozen or a in self._parts or b in self._parts:
            self._freeze(a)
        return a

    def _freeze(self, cid: int) -> None:
        root = self._find(cid)
        if root in self._frozen and root not in self._parts:
            return
        self._frozen.add(root)
        for part in self._parts.pop(root, []):
            self._freeze(part)

    def _constrain(self, cid: int, blocks: int) -> None:
        root = self._find(cid)
        if root in self._parts:
            self._freeze(root)
        else:
            self._blocks[root] = math.lcm(self._blocks.get(root, 1), blocks)

    def _visit(self, gm: fx.GraphModule, node: fx.Node) -> None:
        self._order[node] = len(self._order)
        module = gm.get_submodule(node.target) if node.op == "call_module" else None
        inputs = [self._of[a] for a in node.all_input_nodes if a in self._of]
        if node.op == "get_attr" or (node.all_input_nodes and all(a in self._constant for a in node.all_input_nodes)):
            self._constant.add(node)
        if node.op in ("placeholder", "get_attr"):
            self._of[node] = self._new(frozen=True)
        elif node.op == "output":
            return
        elif chooses_channels(module):
            cid = self._of[node] = self._new()
            self._members[cid] = [node]
            if getattr(module, "groups", 1) > 1:
                self._constrain(cid, module.groups)
                if inputs:
                    self._constrain(inputs[0], module.groups)
        elif node.op == "call_function" and node.target is torch.cat:
            cid = self._of[node] = self._new()
            self._parts[cid] = [self._of[a] for a in node.args[0] if a in self._of]
        elif rule_for(node, module) is elementwise:
            full = [self._of[a] for a in node.args if isinstance(a, fx.Node) and a in self._of
                    and a not in self._constant and shape(a) is not None and not broadcasts_channel(a)]
            cid = full[0] if full else (inputs[0] if inputs else self._new(frozen=True))
            for other in full[1:]:
                cid = self._union(cid, other)
            self._of[node] = cid
        else:
            self._of[node] = inputs[0] if inputs else self._new(frozen=True)
            if isinstance(module, nn.GroupNorm) and inputs:
                self._constrain(inputs[0], module.num_groups)
            if cuts_channels(node) and inputs:
                self._freeze(inputs[0])
                self._of[node] = self._new(frozen=True)


def residual_totals(plan) -> dict[str, float | None]:
    """Mean per-layer weight residual of a :class:`~orbify.graph.plan.ConversionPlan`, as converted and with identity.

    Keys ``matched`` and ``identity`` (None when no layer recorded one) and ``layers`` (how many).
    """
    layers = [layer for layer in plan.layers if layer.weight_residual is not None]
    identity = [layer.weight_residual_identity for layer in layers if layer.weight_residual_identity is not None]
    return {
        "matched": sum(layer.weight_residual for layer in layers) / len(layers) if layers else None,
        "identity": sum(identity) / len(identity) if identity else None,
        "layers": len(layers),
    }
