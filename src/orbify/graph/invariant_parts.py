"""Parts of a layer's output read as single channels get a layer of their own with invariant outputs
(docs/design.md §5).

A focal modulation computes queries, context and gates with one 1×1 conv and splits them:
``q, ctx, gates = torch.split(f(x), (C, C, L + 1), 1)``; each gate ``gates[:, l:l + 1]`` is one
channel, broadcast over the C channels of the context it scales. One channel cannot hold an orbit,
and a value broadcast over orbit channels is exact only when it is the same for every slot, that is
invariant. So before the walk :func:`separate_single_channel_parts` moves such a part into a layer
of its own, holding the original layer's rows for those channels (the original layer keeps the
others, the split cuts those only); the conversion keeps that layer's output plain (invariant), as
it keeps a classifier head's (its weights orbit-averaged over its input slots). The converted model
computes the same function up to that averaging; the plan notes each separation, and each rewritten
node keeps its original call (:data:`orbify.graph.orbit_cuts.ORIGINAL_CALL`).
"""

from __future__ import annotations

import copy
import operator

import torch
from torch import fx, nn

from orbify.graph.channel_order import channel_slice
from orbify.graph.orbit_cuts import ORIGINAL_CALL, SPLITS, keep_original_call, part_sizes, split_parts
from orbify.graph.tracing import shape


def separate_single_channel_parts(gm: fx.GraphModule) -> tuple[set[fx.Node], list[str]]:
    """Give every split part of a conv's output that is only read one channel at a time a conv of its own (see the
    module docstring). Returns the new layer nodes, whose outputs must stay plain, and a note for each."""
    plain: set[fx.Node] = set()
    notes = []
    for split in list(gm.graph.nodes):
        found = _single_channel_parts(gm, split)
        if found is not None:
            layer, separated = found
            plain.update(_separate(gm, split, layer, separated))
            notes.append(f"'{layer.target}': the output channels of the parts {', '.join(map(str, separated))} of "
                         f"'{split.name}', read one channel at a time (broadcast over the others), come from a layer "
                         "of their own with invariant outputs")
    if plain:
        gm.recompile()
    return plain, notes


def _single_channel_parts(gm: fx.GraphModule, split: fx.Node) -> tuple[fx.Node, list[int]] | None:
    """The ungrouped conv that a split along channels cuts and the indices of its parts read only one channel at a
    time, when there are such parts and others; else None."""
    if split.target not in SPLITS or not split.args or not isinstance(split.args[0], fx.Node):
        return None
    layer, dim = split.args[0], split.kwargs.get("dim", split.args[2] if len(split.args) > 2 else 0)
    if layer.op != "call_module" or len(layer.users) != 1 or shape(layer) is None or len(shape(layer)) != 4:
        return None
    module = gm.get_submodule(layer.target)
    if type(module) is not nn.Conv2d or module.groups != 1 or dim not in (1, -3):
        return None
    taken = split_parts(split)
    separated = [index for index, readers in sorted(taken.items()) if readers and all(map(_single_channels, readers))]
    if not separated or len(separated) == len(part_sizes(split, shape(layer)[1])):
        return None
    return layer, separated


def _single_channels(part: fx.Node) -> bool:
    """True when every use of ``part`` reads one channel: the part has one channel, or is sliced to one."""
    if shape(part) is not None and shape(part)[1] == 1:
        return True
    slices = [channel_slice(user) for user in part.users]
    return bool(slices) and all(cut is not None and cut[1] - cut[0] == 1 for cut in slices)


def _separate(gm: fx.GraphModule, split: fx.Node, layer: fx.Node, separated: list[int]) -> list[fx.Node]:
    """Rewrite ``layer`` to compute the kept parts and a new conv per separated part; returns the new nodes."""
    sizes = part_sizes(split, shape(layer)[1])
    starts = [sum(sizes[:i]) for i in range(len(sizes))]
    kept = [i for i in range(len(sizes)) if i not in separated]
    owner_path, _, name = layer.target.rpartition(".")
    owner = gm.get_submodule(owner_path)
    original = gm.get_submodule(layer.target)
    taken, made = split_parts(split), []
    for index in separated:
        part_name = f"{name}_part{index}"
        owner.add_module(part_name, _rows(original, torch.arange(starts[index], starts[index] + sizes[index])))
        with gm.graph.inserting_after(layer):
            part = gm.graph.call_module(f"{owner_path}.{part_name}" if owner_path else part_name, layer.args)
        part.meta = {**_with_channels(layer.meta, sizes[index]),
                     ORIGINAL_CALL: ("call_function", operator.getitem, (split, index), {})}
        for getitem in taken[index]:
            getitem.replace_all_uses_with(part)
            gm.graph.erase_node(getitem)
        made.append(part)
    rows = torch.cat([torch.arange(starts[i], starts[i] + sizes[i]) for i in kept])
    setattr(owner, name, _rows(original, rows))
    layer.meta = _with_channels(layer.meta, len(rows))
    keep_original_call(split)
    split.target = "split" if split.op == "call_method" else torch.split
    split.args, split.kwargs = (layer, [sizes[i] for i in kept]), {"dim": 1}
    for new_index, index in enumerate(kept):
        for getitem in taken.get(index, []):
            keep_original_call(getitem)
            getitem.args = (split, new_index)
    return made


def _rows(conv: nn.Conv2d, rows: torch.Tensor) -> nn.Conv2d:
    """A copy of ``conv`` computing only its output channels ``rows``."""
    part = copy.deepcopy(conv)
    part.out_channels = len(rows)
    part.weight = nn.Parameter(conv.weight.detach()[rows].clone(), requires_grad=conv.weight.requires_grad)
    if conv.bias is not None:
        part.bias = nn.Parameter(conv.bias.detach()[rows].clone(), requires_grad=conv.bias.requires_grad)
    return part


def _with_channels(meta: dict, channels: int) -> dict:
    """A copy of a node's meta whose recorded output shape has ``channels`` channels."""
    meta = dict(meta)
    tensor_meta = meta["tensor_meta"]
    meta["tensor_meta"] = tensor_meta._replace(shape=torch.Size((tensor_meta.shape[0], channels,
                                                                 *tensor_meta.shape[2:])))
    return meta

