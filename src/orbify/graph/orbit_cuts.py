"""Where a converted value is cut when the original cuts its channels inside an orbit (docs/design.md §5).

The converted model keeps the channel *budget*, not every width: a value of C original channels
holds O whole orbits. A split, chunk or slice of the original cuts it at channel positions
0 = c_0 ≤ c_1 ≤ … ≤ c_m = C; the converted value is cut at orbit boundaries B_0 = 0 ≤ … ≤ B_m = O
(:func:`orbit_boundaries`):

* B_i is the boundary nearest the same fraction of the value, c_i·O/C orbits (halves go down:
  10 of 40 channels under c4 is 2 of 10 orbits);
* every non-empty part gets at least one orbit and an empty part none (too few orbits: no cut);
* a part the graph adds to a value already converted gets that value's width, so both agree;
* a position this value was already cut at keeps its boundary, so ``x[:, :a]`` and ``x[:, a:]``
  partition the value as they partition the original.

Cutting at whole orbits keeps the conversion exact whatever the boundaries; they only decide which
original channels each part's readers find (the channel maps, :meth:`orbify.transfer.channels.ChannelMap.part`).

A layer whose output is only ever split (through per-channel ops: norms, activations) is instead
given whole orbits *per part* (:mod:`orbify.conversion.output_widths`); the split is then told
their orbits (:data:`PART_ORBITS`) and cuts there.
"""

from __future__ import annotations

import operator
from collections.abc import Mapping, Sequence

import torch
from torch import fx

from orbify.graph.tracing import shape

PART_ORBITS = "orbify_part_orbits"
"""Node meta of a split whose input was written with whole orbits per part: the orbits of every part."""
CUTS_MADE = "orbify_orbit_cuts"
"""Node meta of a value cut at orbit boundaries: original channel position → orbit boundary chosen."""

ORIGINAL_CALL = "orbify_original_call"
"""Node meta of a node whose call the conversion rewrote (a split or slice to the converted widths, a part of a split
given a layer of its own): the original's (op, target, args, kwargs), for running the original beside it."""
SPLITS = ("split", "chunk", torch.split, torch.chunk)
"""The targets of split and chunk nodes."""


def keep_original_call(node: fx.Node) -> None:
    """Record ``node``'s call as the original makes it (:data:`ORIGINAL_CALL`) before it is rewritten."""
    node.meta.setdefault(ORIGINAL_CALL, (node.op, node.target, node.args, dict(node.kwargs)))


def nearest_boundary(position: int, total: int, orbits: int) -> int:
    """The orbit boundary nearest ``position`` of ``total`` channels in a value of ``orbits`` orbits (halves down)."""
    return -((total - 2 * position * orbits) // (2 * total))


def orbit_boundaries(cuts: Sequence[int], orbits: int, *, needed: Sequence[bool] | None = None,
                     widths: Sequence[int | None] = (), fixed: Mapping[int, int] | None = None) -> list[int] | None:
    """The orbit boundaries of a value of ``orbits`` orbits whose original is cut at channel positions ``cuts``.

    ``cuts`` runs from 0 to the original width C; the result has one boundary per cut, from 0 to
    ``orbits``. An inner position in ``fixed`` keeps its boundary there, part i gets ``widths[i]``
    orbits where given (measured from a boundary known on either side), any other position the
    nearest boundary, each as far as possible: a part that is ``needed`` (default: every non-empty
    one) never gets fewer than one orbit. None when the needed parts outnumber the orbits.
    """
    total, last, fixed = cuts[-1], len(cuts) - 1, fixed or {}
    needed = [stop > start for start, stop in zip(cuts, cuts[1:])] if needed is None else list(needed)
    if sum(needed) > orbits:
        return None
    wanted: list[int | None] = [0 if cut == 0 else fixed.get(cut) for cut in cuts]
    wanted[last] = orbits
    parts = [i for i in range(min(len(widths), last)) if widths[i] is not None]
    for i in parts:                                   # from the left, then from the right
        if wanted[i] is not None and wanted[i + 1] is None:
            wanted[i + 1] = wanted[i] + widths[i]
    for i in reversed(parts):
        if wanted[i + 1] is not None and wanted[i] is None:
            wanted[i] = wanted[i + 1] - widths[i]
    bounds = [0]
    for i, cut in enumerate(cuts[1:]):
        want = wanted[i + 1] if wanted[i + 1] is not None else nearest_boundary(cut, total, orbits)
        low, high = bounds[-1] + needed[i], orbits - sum(needed[i + 1:])
        bounds.append(orbits if i + 1 == last else min(max(want, low), high))
    return bounds


def cut_note(name: str, position: int, total: int, boundary: int, orbits: int, order: int) -> str:
    """The plan's note of a cut moved to an orbit boundary."""
    return (f"'{name}': cut at {position} of {total} channels → {boundary} of {orbits} orbits "
            f"({boundary * order} channels)")


def rounded(position: int, total: int, boundary: int, orbits: int) -> bool:
    """True when a cut does not fall at the same fraction of the converted value as of the original."""
    return boundary * total != position * orbits


def added_partners(part: fx.Node) -> list[fx.Node]:
    """The values ``part`` is combined with elementwise (a user of two tensors of ``part``'s shape that has that shape
    itself: add, mul, …), in the order of the users."""
    part_shape = shape(part)
    partners = []
    for user in part.users:
        others = [arg for arg in user.all_input_nodes if arg is not part]
        if part_shape is not None and len(others) == 1 and shape(user) == part_shape == shape(others[0]):
            partners.append(others[0])
    return partners


def broadcast_use(readers: list[fx.Node], axis: int) -> fx.Node | None:
    """A node combining one of ``readers``, of one channel along ``axis``, with values of more channels (broadcast
    over them), else None."""
    for reader in readers:
        for user in reader.users:
            if user.target is torch.cat or len(user.all_input_nodes) < 2 or shape(user) is None:
                continue
            if shape(reader) is not None and shape(reader)[axis] == 1 < shape(user)[axis]:
                return user
    return None


def split_parts(split: fx.Node) -> dict[int, list[fx.Node]]:
    """The ``getitem`` nodes taking each part out of a split's tuple, by part index."""
    taken: dict[int, list[fx.Node]] = {}
    for user in split.users:
        if user.target is operator.getitem and isinstance(user.args[1], int):
            taken.setdefault(user.args[1], []).append(user)
    return taken


def part_sizes(node: fx.Node, total: int) -> list[int]:
    """The widths of the parts of a split (sizes or a size) or chunk (a count) of ``total`` channels."""
    argument = node.args[1] if len(node.args) > 1 else node.kwargs.get("split_size_or_sections",
                                                                      node.kwargs.get("chunks"))
    if node.target in ("chunk", torch.chunk):
        each = -(-total // argument)
        return [min(each, total - i) for i in range(0, total, each)]
    if isinstance(argument, int):
        return [min(argument, total - i) for i in range(0, total, argument)]
    return list(argument)
