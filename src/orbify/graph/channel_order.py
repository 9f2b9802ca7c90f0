"""Channel orders that keep orbits whole: channel shuffles, split/chunk and slices on channels (docs/design.md §5).

A group element permutes the |G| slots of every orbit. An op that reorders or cuts the channel
axis keeps the tensor in an orbit layout only when it moves whole orbits and keeps each orbit's
slots in order:

* **Channel shuffles** (``x.view(B, g, C/g, H, W).transpose(1, 2).reshape(B, C, H, W)``, as in
  ShuffleNet) interleave single channels and so tear orbits apart. Which original channel sits in
  which converted position is free, though (channel maps carry weights over any order, §8), so
  :func:`shuffle_orbits` rewrites each shuffle before the walk into the same shuffle of *orbits*
  (:func:`orbify.layers.shuffles.shuffle_blocks`), the original's channel order kept in the node's
  meta for the channel maps. Only the converted value's orbits must split evenly into the groups,
  not the original's channels: 116 channels in 2 groups become 2 × 15 orbits under c4.
* **split / chunk** along the channel axis (dim 1, or the last axis of a channels-last value) and
  **slices** ``x[:, a:b]`` cut the converted value at whole orbits: where the original's cut falls
  inside an orbit (or the budget rounded the width), the converted value is cut at an orbit boundary
  near it, each part's readers are built with the width they receive, and a note in the plan says
  so (:mod:`orbify.graph.orbit_cuts`). A split's value is a :class:`Parts`, and ``operator.getitem``
  takes one part out. Which original channels a part's converted channels stand for is its channel
  map (:meth:`orbify.transfer.channels.ChannelMap.part`, from :func:`part_bounds`).

A cut is refused when the converted value has fewer orbits than the original has non-empty parts,
or when a part cannot be as wide as a value it is added to. The layers writing a split or sliced
value keep the identity assignment (:class:`orbify.transfer.matching.ChannelClasses`), so a part
holds the original's part up to the rounding.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from itertools import accumulate
from typing import NamedTuple

import torch
from torch import fx

from orbify.graph.orbit_cuts import (
    CUTS_MADE,
    PART_ORBITS,
    added_partners,
    broadcast_use,
    cut_note,
    keep_original_call,
    orbit_boundaries,
    part_sizes,
    rounded,
    split_parts,
)
from orbify.graph.tracing import shape
from orbify.layers.shuffles import shuffle_blocks
from orbify.symmetry.layouts import HeadValues, Layout, Orbit, Permuted, Plain, unpermuted

ORIGINAL_ORDER = "orbify_original_channel_order"
"""The node meta key of a rewritten shuffle: the original's channel order (out position ← in channel)."""
CHANNEL_CUT = "orbify_channel_cut"
"""The node meta key of a channel slice: its :class:`ChannelCut`."""
_TRANSPOSES = {("call_function", torch.transpose), ("call_method", "transpose")}
_RESHAPES = {("call_method", "view"), ("call_method", "reshape"), ("call_function", torch.reshape),
             ("call_method", "flatten"), ("call_function", torch.flatten)}


class ChannelCut(NamedTuple):
    """Channels ``start:stop`` of a converted value, standing for channels ``original_start:original_stop`` of the
    original's (a part of a split, or a slice)."""

    start: int
    stop: int
    original_start: int
    original_stop: int


@dataclass(frozen=True)
class Parts(Layout):
    """The value of a split or chunk along channels: a tuple whose part i has ``layouts[i]`` and spans channels
    ``bounds[i]`` (start, stop) of the split tensor, standing for the original's channels ``original[i]`` (None: the
    same). Not a tensor layout itself; ``getitem`` takes a part out."""

    layouts: tuple[Layout, ...]
    bounds: tuple[tuple[int, int], ...]
    original: tuple[tuple[int, int], ...] | None = None

    def cut(self, index: int) -> ChannelCut:
        """The channels of part ``index`` and the original's channels they stand for."""
        return ChannelCut(*self.bounds[index], *(self.bounds if self.original is None else self.original)[index])

    def __str__(self) -> str:
        return "parts(" + ", ".join(map(str, self.layouts)) + ")"


def shuffle_orbits(gm: fx.GraphModule, order: int) -> int:
    """Rewrite every channel shuffle of ``gm`` into the shuffle of orbits of ``order`` slots (see the module
    docstring); returns how many. The rule :func:`shuffle_channels` checks that the orbits split evenly."""
    rewritten = 0
    for node in list(gm.graph.nodes):
        chain = _shuffle_chain(node)
        if chain is None:
            continue
        split_view, last = chain[0], chain[-1]
        channels, groups = shape(split_view.args[0])[1], shape(split_view)[1]
        with gm.graph.inserting_before(last):
            shuffle = gm.graph.call_function(shuffle_blocks, (split_view.args[0], groups, order))
        shuffle.meta = {**last.meta, ORIGINAL_ORDER: shuffle_order(channels, groups, 1)}
        last.replace_all_uses_with(shuffle)
        for dead in reversed(chain):
            gm.graph.erase_node(dead)
        rewritten += 1
    if rewritten:
        gm.recompile()
    return rewritten


def shuffle_orders(node: fx.Node, channels: int) -> tuple[torch.Tensor, torch.Tensor] | None:
    """(converted order, original order) of a rewritten shuffle whose converted input holds ``channels`` channels
    (out position ← in channel, as :meth:`orbify.transfer.channels.ChannelMap.reordered` takes them), else None."""
    if ORIGINAL_ORDER not in node.meta:
        return None
    _, groups, width = node.args
    return shuffle_order(channels // width, groups, width), node.meta[ORIGINAL_ORDER]


def shuffle_order(units: int, groups: int, width: int) -> torch.Tensor:
    """The channel order of shuffling ``units`` blocks of ``width`` channels in ``groups`` groups: out ← in."""
    blocks = torch.arange(units).view(groups, units // groups).t().reshape(-1)
    return (blocks[:, None] * width + torch.arange(width)).reshape(-1)


def _shuffle_chain(node: fx.Node) -> list[fx.Node] | None:
    """[split view, transpose(1, 2), (contiguous), merging reshape] when ``node`` starts a channel shuffle."""
    before, after = shape(node.args[0]) if node.args and isinstance(node.args[0], fx.Node) else None, shape(node)
    if ((node.op, node.target) not in _RESHAPES or before is None or after is None or len(before) != 4
            or len(after) != 5 or after[0] != before[0] or after[3:] != before[2:]
            or after[1] * after[2] != before[1]):
        return None
    chain = [node]
    for step in ("transpose", "contiguous", "merge"):
        users = list(chain[-1].users)
        if len(users) != 1:
            return None
        user = users[0]
        if step == "transpose" and not ((user.op, user.target) in _TRANSPOSES and _swaps_1_2(user)):
            return None
        if step == "contiguous" and (user.op, user.target) != ("call_method", "contiguous"):
            continue
        if step == "merge" and not ((user.op, user.target) in _RESHAPES and shape(user) == before):
            return None
        chain.append(user)
    return chain


def _swaps_1_2(node: fx.Node) -> bool:
    dims = node.args[1:3] if len(node.args) >= 3 else (node.kwargs.get("dim0"), node.kwargs.get("dim1"))
    return sorted(d % 5 if isinstance(d, int) else -1 for d in dims) == [1, 2]


# -- rules -------------------------------------------------------------------------------------------
def select_channels(step) -> Layout | None:
    """``torch.index_select``: refused (the indices may tear orbits apart)."""
    raise step.refuse("Selecting channels by index", "select whole orbits only (a channel shuffle is rewritten for "
                      f"you to move whole orbits), or {_CONVERT_UP_TO}")


def shuffle_channels(step) -> Layout | None:
    """A rewritten channel shuffle (:func:`shuffle_orbits`): whole orbits move, so an orbit layout is kept when its
    orbits split evenly into the groups; plain channels are shuffled one by one, as in the original."""
    node, layout = step.node, step.layout
    source, groups, _ = node.args
    inner = unpermuted(layout)
    if isinstance(layout, (Permuted, HeadValues)) or not isinstance(inner, (Orbit, Plain)):
        raise step.refuse(f"A channel shuffle of a {layout} value", _CONVERT_UP_TO)
    if isinstance(inner, Plain):
        node.args = (source, groups, 1)
    elif inner.orbits % groups:
        raise step.refuse(f"A channel shuffle in {groups} groups of a value of {inner.orbits} orbits (the converted "
                          f"width of its {shape(source)[1]} channels) moves parts of orbits",
                          f"give the layers writing it widths that make a multiple of {groups} orbits of "
                          f"{step.ctx.group.order} slots (another budget may), or {_CONVERT_UP_TO}")
    return layout


def split_channels(step) -> Layout | None:
    """``split`` / ``chunk`` along the channel axis (dim 1, or where a channels-last value holds its channels): a
    :class:`Parts`, cut at whole orbits (:mod:`orbify.graph.orbit_cuts`)."""
    node, layout = step.node, step.layout
    in_shape = shape(node.args[0])
    dim = node.kwargs.get("dim", node.args[2] if len(node.args) > 2 else 0)
    axis = layout.channel_axis if isinstance(layout, Permuted) else 1
    if layout is None or in_shape is None or not isinstance(dim, int) or dim % len(in_shape) != axis:
        raise step.refuse(f"A split along dim {dim}", "split along the channel axis only")
    cuts = list(accumulate(part_sizes(node, in_shape[axis]), initial=0))
    taken = split_parts(node)
    layouts, bounds = _cut(step, node.args[0], cuts, [taken.get(i, []) for i in range(len(cuts) - 1)],
                           widths=node.meta.get(PART_ORBITS, ()))
    sizes = [cut.stop - cut.start for cut in bounds]
    if sizes != [cut.original_stop - cut.original_start for cut in bounds]:   # the converted value's own widths
        keep_original_call(node)
        node.target = "split" if node.op == "call_method" else torch.split
        node.args, node.kwargs = (node.args[0], sizes), {"dim": dim}
    return Parts(tuple(layouts), tuple(b[:2] for b in bounds), tuple(b[2:] for b in bounds))


_CONVERT_UP_TO = "convert only up to the node before it (--stop-at)"


def take_part(step) -> Layout | None:
    """``operator.getitem``: a part of a :class:`Parts`; or a slice of channels ``x[:, a:b]``, cut at whole orbits
    (:mod:`orbify.graph.orbit_cuts`); else refused."""
    node = step.node
    source = node.args[0]
    held = step.arg_layout(source)
    if isinstance(held, Parts):
        return held.layouts[node.args[1]]
    if shape(node) is None or held is None:
        return None
    bounds = channel_slice(node)
    if bounds is None or (isinstance(held, Permuted) and held.channel_axis != 1):
        raise step.refuse("Indexing a tensor other than slicing its channels (x[:, a:b])", _CONVERT_UP_TO)
    start, stop = bounds
    layouts, cuts = _cut(step, source, [0, start, stop, shape(source)[1]], [[], [node], []],
                         needed=[False, stop > start, False])
    node.meta[CHANNEL_CUT] = cut = cuts[1]
    if (cut.start, cut.stop) != (start, stop):   # the converted value's own channels
        keep_original_call(node)
        index = node.args[1]
        node.args = (source, (index[0], slice(cut.start, cut.stop), *index[2:]))
    return layouts[1]


def _cut(step, value: fx.Node, cuts: list[int], readers: list[list[fx.Node]], *, needed: list[bool] | None = None,
         widths=()) -> tuple[list[Layout], list[ChannelCut]]:
    """The layouts and channel ranges of the parts of ``value`` whose original is cut at channel positions ``cuts``;
    ``readers[i]`` take part i out. Plain channels are cut where the original is; orbits at the boundaries of
    :func:`_orbit_cuts`."""
    layout = step.arg_layout(value)
    inner = unpermuted(layout)
    if isinstance(inner, Plain) and not isinstance(layout, HeadValues):
        positions = list(cuts)
        parts = [Plain(stop - start) for start, stop in zip(cuts, cuts[1:])]
    elif isinstance(inner, Orbit) and not isinstance(layout, HeadValues):
        _refuse_broadcast_channels(step, value, cuts, readers)
        boundaries = _orbit_cuts(step, value, cuts, readers, needed, widths)
        positions = [b * step.ctx.group.order for b in boundaries]
        parts = [Orbit(stop - start) for start, stop in zip(boundaries, boundaries[1:])]
    else:
        raise step.refuse(f"Cutting the channels of a {layout} value", _CONVERT_UP_TO)
    if isinstance(layout, Permuted):
        parts = [replace(layout, inner=part) for part in parts]
    return parts, [ChannelCut(positions[i], positions[i + 1], cuts[i], cuts[i + 1]) for i in range(len(parts))]


def _refuse_broadcast_channels(step, value: fx.Node, cuts: list[int], readers: list[list[fx.Node]]) -> None:
    """Refuse a part of one channel of an orbit value that is broadcast over the channels of another value."""
    axis = step.arg_layout(value).channel_axis if isinstance(step.arg_layout(value), Permuted) else 1
    for start, stop, taken in zip(cuts, cuts[1:], readers):
        user = broadcast_use(taken, axis) if stop - start == 1 else None
        if user is not None:
            raise step.refuse(f"Channel {start} of '{value.name}', taken alone, is broadcast over the channels of "
                              f"another value at '{user.name}': one channel cannot hold an orbit, and a value "
                              "broadcast over orbits must be invariant",
                              "compute such channels with a layer of their own (a part of a conv's output that is "
                              f"only read one channel at a time gets one for you), or {_CONVERT_UP_TO}")


def _orbit_cuts(step, value: fx.Node, cuts: list[int], readers: list[list[fx.Node]], needed: list[bool] | None,
                widths) -> list[int]:
    """The orbit boundaries of ``value`` (see :mod:`orbify.graph.orbit_cuts`): part i as wide as a value its
    ``readers[i]`` are added to (or ``widths[i]``), earlier cuts of ``value`` kept; new rounded cuts noted."""
    orbits, order, total = unpermuted(step.arg_layout(value)).orbits, step.ctx.group.order, cuts[-1]
    partners = [_partner(step, reader) for reader in readers]
    wanted = [partner[1] if partner else None for partner in partners]
    if len(widths) == len(readers) and sum(widths) == orbits:   # the layer writing the value chose them
        wanted = list(widths)
    made = value.meta.setdefault(CUTS_MADE, {})
    bounds = orbit_boundaries(cuts, orbits, needed=needed, widths=wanted, fixed=made)
    if bounds is None:
        raise step.refuse(f"Cutting {total} channels at {', '.join(map(str, cuts[1:-1]))} into more parts than the "
                          f"{orbits} orbits of {order} slots the converted value holds",
                          f"widen the layer before the cut, use a budget with more orbits ('params' or 'fields'), or "
                          f"{_CONVERT_UP_TO}")
    for i, partner in enumerate(partners):
        if partner and bounds[i + 1] - bounds[i] != partner[1]:
            raise step.refuse(f"Channels {cuts[i]}:{cuts[i + 1]} cut at whole orbits get {bounds[i + 1] - bounds[i]} "
                              f"orbits, but they are combined with '{partner[0].name}' of {partner[1]} orbits",
                              f"give both the same width, or {_CONVERT_UP_TO}")
    for cut, bound in zip(cuts[:-1], bounds):   # the end of the value is always its end
        if cut not in made and rounded(cut, total, bound, orbits):
            step.ctx.add_note(cut_note(step.node.name, cut, total, bound, orbits, order))
        made.setdefault(cut, bound)
    return bounds


def _partner(step, readers: list[fx.Node]) -> tuple[fx.Node, int] | None:
    """A value of orbit layout that one of ``readers`` is combined with elementwise, and its orbits: converted
    already, or computed from one that is by functions keeping its channels (a gate's activation and upsampling,
    which the graph may run after the cut)."""
    for reader in readers:
        for other in added_partners(reader):
            layout = step.arg_layout(_walked_source(step, other))
            if isinstance(unpermuted(layout), Orbit) and not isinstance(layout, HeadValues):
                return other, unpermuted(layout).orbits
    return None


def _walked_source(step, value: fx.Node) -> fx.Node:
    """``value``, or while it is not converted yet, the one tensor input of the op computing it when that keeps the
    number of channels and holds no parameters (a function, a method, an activation module: never a layer that could
    choose its width)."""
    while step.arg_layout(value) is None and _parameter_free(value):
        tensors = [node for node in value.all_input_nodes if shape(node) is not None and node.op != "get_attr"]
        if len(tensors) != 1 or (shape(tensors[0]) or (None, None))[1:2] != (shape(value) or (None, None))[1:2]:
            break
        value = tensors[0]
    return value


def _parameter_free(node: fx.Node) -> bool:
    if node.op in ("call_function", "call_method"):
        return True
    module = node.graph.owning_module.get_submodule(node.target) if node.op == "call_module" else None
    return module is not None and next(module.parameters(), None) is None


def channel_slice(node: fx.Node) -> tuple[int, int] | None:
    """(start, stop) of a getitem that slices the channel axis only (``x[:, a:b]``, ``x[:, a:b, :, :]``), else
    None."""
    index = node.args[1] if node.target is operator.getitem and len(node.args) > 1 else None
    in_shape = shape(node.args[0]) if isinstance(node.args[0], fx.Node) else None
    if not isinstance(index, tuple) or len(index) < 2 or in_shape is None or len(in_shape) < 2:
        return None
    whole = slice(None, None, None)
    rest = index[2:]
    if index[0] != whole or not isinstance(index[1], slice) or index[1].step not in (None, 1):
        return None
    if any(item not in (whole, Ellipsis) for item in rest):
        return None
    start, stop, _ = index[1].indices(in_shape[1])
    return start, stop


def cuts_channels(node: fx.Node) -> bool:
    """True for a split, chunk, channel slice or channel selection (a rewritten shuffle): an op whose output
    channels are a part, or a reordering, of its input's."""
    return (node.target in ("split", "chunk", torch.split, torch.chunk, shuffle_blocks)
            or (node.target is operator.getitem and channel_slice(node) is not None))


def part_bounds(node: fx.Node, layouts) -> ChannelCut | None:
    """The channels a getitem node takes (a part of a split, or a channel slice) and the original's channels they
    stand for, else None."""
    held = layouts.get(node.args[0]) if node.args and isinstance(node.args[0], fx.Node) else None
    if isinstance(held, Parts):
        return held.cut(node.args[1])
    return node.meta.get(CHANNEL_CUT)


def channel_cut_functions(before: Mapping[object, Callable]) -> dict[object, Callable]:
    """The function rules of this module that extend the rules ``before`` (added to
    :data:`orbify.graph.rules.FUNCTION_RULES`): ``torch.cat`` of channels-last values taken here."""
    return {torch.cat: _joined_channels_last(before[torch.cat])}


def _joined_channels_last(concatenate: Callable) -> Callable:
    """The ``torch.cat`` rule ``concatenate`` extended to channels-last values (:class:`Permuted`, not tokens) joined
    along the axis that holds their channels, as channels-first values are joined along dim 1."""

    def rule(step) -> Layout | None:
        node = step.node
        parts = [step.arg_layout(arg) for arg in node.args[0]]
        if not parts or not all(type(part) is Permuted for part in parts):   # tokens: their own rule
            return concatenate(step)
        dim = node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else 0)
        first, rank = parts[0], len(shape(node) or ())
        inners = [part.inner for part in parts]
        aligned = isinstance(dim, int) and dim % rank == first.channel_axis
        if not aligned or any(part.dims != first.dims for part in parts):
            raise step.refuse(f"Concatenating channels-last values along dim {dim}", "concatenate values of the same "
                              f"axis order along the axis of their channels, or {_CONVERT_UP_TO}")
        if all(isinstance(inner, Orbit) for inner in inners):
            return Permuted(Orbit(sum(inner.orbits for inner in inners)), first.dims)
        if all(isinstance(inner, Plain) for inner in inners):
            return Permuted(Plain(sum(inner.channels for inner in inners)), first.dims)
        raise step.refuse("Concatenation of orbit and plain channels", _CONVERT_UP_TO)

    return rule
