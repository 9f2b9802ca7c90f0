"""Channel orders that keep orbits whole: channel shuffles, split/chunk and slices on channels (docs/design.md §5).

A group element permutes the |G| slots of every orbit. An op that reorders or cuts the channel
axis keeps the tensor in an orbit layout only when it moves whole orbits and keeps each orbit's
slots in order:

* **Channel shuffles** (``x.view(B, g, C/g, H, W).transpose(1, 2).reshape(B, C, H, W)``, as in
  ShuffleNet) interleave single channels and so tear orbits apart. Which original channel sits in
  which converted position is free, though (channel maps carry weights over any order, §8), so
  :func:`shuffle_orbits` rewrites each shuffle before the walk into the same shuffle of *orbits*:
  ``torch.index_select(x, 1, order)`` with a constant ``order`` that moves whole orbits, the
  original's channel order kept in the node's meta for the channel maps.
* **split / chunk** along channels give parts in an orbit layout when every part holds whole
  orbits; the value is a :class:`Parts`, and ``operator.getitem`` takes one part out.
* **Slices** ``x[:, a:b]`` are orbit-aligned when ``a`` and ``b`` are multiples of |G|.

Anything that cuts an orbit is refused naming the node and the widths that would work. These ops
need the converted value to hold the original's channels in the original's widths (a budget that
rounds the width refuses them), and the layers writing a split or sliced value keep their
channels within the parts (:class:`orbify.transfer.matching.ChannelClasses`).
"""

from __future__ import annotations

import operator
from dataclasses import dataclass

import torch
from torch import fx

from orbify.graph.tracing import shape
from orbify.symmetry.layouts import Layout, Orbit, Plain

ORIGINAL_ORDER = "orbify_original_channel_order"
"""The node meta key of a rewritten shuffle: the original's channel order (out position ← in channel)."""
_TRANSPOSES = {("call_function", torch.transpose), ("call_method", "transpose")}
_RESHAPES = {("call_method", "view"), ("call_method", "reshape"), ("call_function", torch.reshape),
             ("call_method", "flatten"), ("call_function", torch.flatten)}


@dataclass(frozen=True)
class Parts(Layout):
    """The value of a split or chunk along channels: a tuple whose part i has ``layouts[i]`` and spans channels
    ``bounds[i]`` (start, stop) of the split tensor. Not a tensor layout itself; ``getitem`` takes a part out."""

    layouts: tuple[Layout, ...]
    bounds: tuple[tuple[int, int], ...]

    def __str__(self) -> str:
        return "parts(" + ", ".join(map(str, self.layouts)) + ")"


def shuffle_orbits(gm: fx.GraphModule, order: int) -> int:
    """Rewrite every channel shuffle of ``gm`` whose groups hold whole orbits of ``order`` slots into the shuffle of
    orbits (see the module docstring); returns how many. Others are left for the rules to refuse."""
    rewritten = 0
    for node in list(gm.graph.nodes):
        chain = _shuffle_chain(node)
        if chain is None:
            continue
        split_view, last = chain[0], chain[-1]
        channels, groups = shape(split_view.args[0])[1], shape(split_view)[1]
        if channels % (groups * order):
            continue
        name = f"orbit_shuffle_{rewritten}"
        gm.register_buffer(name, _shuffle(channels // order, groups, order))
        with gm.graph.inserting_before(last):
            index = gm.graph.get_attr(name)
            select = gm.graph.call_function(torch.index_select, (split_view.args[0], 1, index))
        select.meta = {**last.meta, ORIGINAL_ORDER: _shuffle(channels, groups, 1)}
        last.replace_all_uses_with(select)
        for dead in reversed(chain):
            gm.graph.erase_node(dead)
        rewritten += 1
    if rewritten:
        gm.recompile()
    return rewritten


def _shuffle(units: int, groups: int, width: int) -> torch.Tensor:
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
    """``torch.index_select(x, 1, order)`` of a rewritten shuffle: orbits move whole, so the layout is kept."""
    node, layout = step.node, step.layout
    if ORIGINAL_ORDER not in node.meta or node.args[1] not in (1, -3):
        raise step.refuse("Selecting channels by index", "select whole orbits only (a channel shuffle whose groups "
                          "hold whole orbits is rewritten for you)")
    return layout


def split_channels(step) -> Layout | None:
    """``split`` / ``chunk`` along the channel axis: a :class:`Parts` when every part holds whole orbits."""
    node, layout = step.node, step.layout
    total = shape(node.args[0])[1] if shape(node.args[0]) else None
    dim = node.kwargs.get("dim", node.args[2] if len(node.args) > 2 else 0)
    if layout is None or total is None or dim not in (1, 1 - len(shape(node.args[0]))):
        raise step.refuse(f"A split along dim {dim}", "split along the channel axis (dim 1) only")
    sizes = _part_sizes(node, total)
    bounds, start = [], 0
    for size in sizes:
        bounds.append((start, start + size))
        start += size
    return Parts(tuple(_part_layout(step, layout, b, total) for b in bounds), tuple(bounds))


def _part_sizes(node: fx.Node, total: int) -> list[int]:
    """The widths of the parts of a split (sizes or a size) or chunk (a count) of ``total`` channels."""
    argument = node.args[1] if len(node.args) > 1 else node.kwargs.get("split_size_or_sections",
                                                                      node.kwargs.get("chunks"))
    if node.target in ("chunk", torch.chunk):
        each = -(-total // argument)
        return [min(each, total - i) for i in range(0, total, each)]
    if isinstance(argument, int):
        return [min(argument, total - i) for i in range(0, total, argument)]
    return list(argument)


def _part_layout(step, layout: Layout, bounds: tuple[int, int], total: int) -> Layout:
    """The layout of channels ``bounds`` of a value of ``layout``; refuses a cut through an orbit."""
    start, stop = bounds
    if isinstance(layout, Plain):
        return Plain(stop - start)
    order = step.ctx.group.order
    if not isinstance(layout, Orbit) or layout.orbits * order != total:
        raise step.refuse(f"Cutting channels {start}:{stop} of a {layout} value of {total} channels",
                          "cut only a value whose converted width equals the original's (the 'channels' budget on "
                          f"widths divisible by {order})")
    if start % order or stop % order:
        widths = ", ".join(str(w) for w in (start // order * order, -(-stop // order) * order))
        raise step.refuse(f"Channels {start}:{stop} cut through orbits of {order} slots",
                          f"cut at multiples of {order} (here e.g. at {widths}), or {_CONVERT_UP_TO}")
    return Orbit((stop - start) // order)


_CONVERT_UP_TO = "convert only up to the node before it (--stop-at)"


def take_part(step) -> Layout | None:
    """``operator.getitem``: a part of a :class:`Parts`; or a slice of channels ``x[:, a:b]``; else refused."""
    node = step.node
    source = node.args[0]
    held = step.arg_layout(source)
    if isinstance(held, Parts):
        return held.layouts[node.args[1]]
    if shape(node) is None or held is None:
        return None
    bounds = channel_slice(node)
    if bounds is None:
        raise step.refuse("Indexing a tensor other than slicing its channels (x[:, a:b])", _CONVERT_UP_TO)
    return _part_layout(step, held, bounds, shape(source)[1])


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
    return (node.target in ("split", "chunk", torch.split, torch.chunk, torch.index_select)
            or (node.target is operator.getitem and channel_slice(node) is not None))


def part_bounds(node: fx.Node, layouts) -> tuple[int, int] | None:
    """The channel range a getitem node takes (a part of a split, or a channel slice), else None."""
    held = layouts.get(node.args[0]) if node.args and isinstance(node.args[0], fx.Node) else None
    if isinstance(held, Parts):
        return held.bounds[node.args[1]]
    return channel_slice(node)
