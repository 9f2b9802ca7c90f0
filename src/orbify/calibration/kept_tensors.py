"""What calibration carries without refitting it: model tensors and attention, under the kept channels (§9).

Calibration gives every channel class new channels (orbit o stands for one kept original channel,
:mod:`orbify.calibration.selection`), so whatever the conversion carried under its own channel maps is
carried again under the kept channels' maps before any layer is refitted:

* **Tensors tied per orbit** (a layer scale) take the original's entries of the kept channels. Every
  slot of an orbit keeps the same channel, so the orbit average that the tying stores is those
  entries exactly: they are carried, as the norms' affine parameters are (:mod:`orbify.calibration.norms`).
* **Token tensors** (a class token, a position embedding) take the entries of the kept channels along
  their channel axis and are averaged over the joint orbits of patch tokens and channels, as the
  conversion does (:func:`orbify.transfer.attention.token_tensor_rows`).
* **Self-attention** (``nn.MultiheadAttention``) is kept at the orbit average of its projections
  under the kept channels of its input (:func:`orbify.transfer.attention.carry_attention`: q, k and v
  read the kept channels, the output rows are those of the kept channels of the stream it is added
  to). It is not refitted: q and k reach its output through the softmax, not linearly, and the value
  it weighs and the output projection's input are not values of the graph. The layers after it are
  refitted on its output, which absorbs part of its drift; the report lists it as an orbit average.
"""

from __future__ import annotations

import torch
from torch import fx, nn
from torch.nn.utils import parametrize

from orbify.layers.tied import ChannelTensorTying, EntryTying
from orbify.symmetry.layouts import Layout, Tokens
from orbify.transfer.attention import carry_attention, token_tensor_rows
from orbify.transfer.channels import ChannelMap, rows
from orbify.transfer.loading import assign

#: Why an attention module keeps its orbit average (the report's note).
ATTENTION_NOTE = ("attention kept at the orbit average of its projections under the kept channels (q and k act "
                  "through the softmax; the layers after it are refitted on its output)")


@torch.no_grad()
def load_kept_tensors(converted: fx.GraphModule, view_graph: fx.GraphModule, maps: dict[fx.Node, ChannelMap | None],
                      layouts: dict[str, Layout | None]) -> None:
    """Give every tied model tensor of ``converted`` the original's entries of the kept channels of the value it meets.

    ``view_graph`` is the original as a graph with the converted graph's node names (it reads the
    original's tensors), ``maps`` the channel map of every value under the kept channels, ``layouts``
    the layout of every value by node name.
    """
    originals = {node.name: node for node in view_graph.graph.nodes if node.op == "get_attr"}
    for node in converted.graph.nodes:
        if node.op != "get_attr" or node.name not in originals:
            continue
        owner_path, _, name = node.target.rpartition(".")
        owner = converted.get_submodule(owner_path)
        if not parametrize.is_parametrized(owner, name):
            continue
        met = _met_value(node, maps)
        if met is None:
            continue
        tying = owner.parametrizations[name][0]
        old_owner, _, old_name = originals[node.name].target.rpartition(".")
        value = getattr(view_graph.get_submodule(old_owner), old_name).detach()
        source, layout = maps[met].source, layouts.get(met.name)
        if isinstance(tying, ChannelTensorTying):
            value = rows(value.reshape(-1), source).reshape(tuple(source.numel() if n > 1 else 1 for n in value.shape))
        elif isinstance(tying, EntryTying) and isinstance(layout, Tokens):
            value = token_tensor_rows(value, source, layout)
        else:
            continue
        assign(owner, name, value)


def _met_value(attribute: fx.Node, maps: dict[fx.Node, ChannelMap | None]) -> fx.Node | None:
    """The first value after ``attribute`` (through the ops that shape or expand it) that carries channels."""
    frontier = list(attribute.users)
    while frontier:
        node = frontier.pop(0)
        if maps.get(node) is not None:
            return node
        frontier.extend(node.users)
    return None


def attention_nodes(converted: fx.GraphModule) -> list[fx.Node]:
    """The self-attention modules of ``converted`` (in graph order)."""
    return [node for node in converted.graph.nodes
            if node.op == "call_module" and isinstance(converted.get_submodule(node.target), nn.MultiheadAttention)]


def load_kept_attention(node: fx.Node, converted: fx.GraphModule, view_graph: fx.GraphModule,
                        maps: dict[fx.Node, ChannelMap | None]) -> None:
    """Carry the original's attention at ``node`` into the converted one under the kept channels of its input."""
    carry_attention(converted.get_submodule(node.target), view_graph.get_submodule(node.target),
                    maps[node.all_input_nodes[0]])
