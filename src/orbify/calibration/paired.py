"""Running the converted model and the original side by side over calibration batches, node by node.

Calibration refits layers one stage at a time (docs/design.md §9.4): each stage needs, for every batch, the converted
model's values at the inputs of its layers (computed with the layers refitted so far) and the
original's outputs of the same layers, on the images and on their transformed copies.
:class:`PairedRun` keeps for every (batch, model, view) the values still alive at the point the
last stage reached (its *frontier*), so every node runs once per view over the whole
calibration, not once per stage. When the frontiers would exceed ``cache_bytes`` a batch's
values are not kept and the next stage recomputes them from the images: memory stays bounded,
time grows.

:func:`original_graph` gives the original model as a graph with the converted graph's node names:
the converted graph with the inserted orbit pools taken out, calling the original's modules.
"""

from __future__ import annotations

import operator
from dataclasses import dataclass, field

import torch
from torch import fx, nn

from orbify.errors import InputShapeError, UnsupportedOpError
from orbify.graph.channels_last import TENSOR_HOLDER
from orbify.graph.functional_layers import FUNCTIONAL_CALL, layer_from_call
from orbify.graph.orbit_cuts import ORIGINAL_CALL
from orbify.graph.tracing import describe
from orbify.layers.tied import OrbitPool
from orbify.symmetry.groups import Group

CONVERTED = "converted"
ORIGINAL = "original"

_IN_PLACE_FUNCTIONS = {operator.iadd, operator.imul, operator.isub, operator.itruediv}


def original_graph(converted: fx.GraphModule, original: nn.Module) -> fx.GraphModule:
    """The original model as a GraphModule whose nodes carry the converted graph's names.

    The converted graph is copied, its orbit pools removed, and the copy calls ``original``'s
    modules and reads its tensors (shared, not copied) at the same paths. Two kinds of path the
    original lacks are resolved: a layer made from a functional call after tracing
    (:mod:`orbify.graph.functional_layers`) is built from the original's own tensors, and a tensor
    of the top module that the conversion moved into its holder module is read from the top module.
    Any other path the original lacks is refused (:class:`UnsupportedOpError`).
    """
    graph = fx.Graph()
    values: dict[fx.Node, fx.Node] = {}
    output = graph.graph_copy(converted.graph, values)
    graph.output(output)
    _restore_original_calls(graph, values)
    root: dict[str, object] = {}
    for node in list(graph.nodes):
        if node.op == "call_module" and isinstance(converted.get_submodule(node.target), OrbitPool):
            node.replace_all_uses_with(node.args[0])
            graph.erase_node(node)
        elif node.op == "call_module":
            root[node.target] = _original_module(node, original)
        elif node.op == "get_attr":
            holder, _, name = node.target.rpartition(".")
            if holder == TENSOR_HOLDER and not hasattr(original, TENSOR_HOLDER):
                node.target = name
            root[node.target] = _original_attribute(node, original)
    return fx.GraphModule(root, graph, type(original).__name__)


def _restore_original_calls(graph: fx.Graph, values: dict[fx.Node, fx.Node]) -> None:
    """Give every node whose call the conversion rewrote (cut to converted widths, a part given a layer of its own)
    the original's call again (:data:`ORIGINAL_CALL`), after the inputs it then reads."""
    for node in list(graph.nodes):
        if ORIGINAL_CALL in node.meta:
            node.op, node.target, args, kwargs = node.meta[ORIGINAL_CALL]
            node.args, node.kwargs = fx.map_arg((args, kwargs), values.__getitem__)
            latest = node
            for arg in node.all_input_nodes:
                latest = arg if _after(arg, latest) else latest
            if latest is not node:
                latest.append(node)


def _after(a: fx.Node, b: fx.Node) -> bool:
    """True when node ``a`` comes after node ``b`` in their graph."""
    node = b.next
    while node.op != "root":
        if node is a:
            return True
        node = node.next
    return False


def _original_module(node: fx.Node, original: nn.Module) -> nn.Module:
    """The module of ``original`` at the node's path, or the one built from the functional call it was made from."""
    try:
        return original.get_submodule(node.target)
    except AttributeError:
        if FUNCTIONAL_CALL in node.meta:
            return layer_from_call(node.meta[FUNCTIONAL_CALL], original)
        raise _missing(node) from None


def _original_attribute(node: fx.Node, original: nn.Module) -> object:
    owner, _, name = node.target.rpartition(".")
    try:
        return getattr(original.get_submodule(owner), name)
    except AttributeError:
        raise _missing(node) from None


def _missing(node: fx.Node) -> UnsupportedOpError:
    return UnsupportedOpError(f"Calibration cannot find '{node.target}' in the original model to run it beside the "
                              "converted one", where=describe(node),
                              fix="convert with init='orbit-average' (--init orbit-average) and tune, or convert "
                                  "only up to the node before it")


def is_mutated_in_place(node: fx.Node) -> bool:
    """True when a user of ``node`` may change its value in place (ReLU(inplace=True), ``+=``, ``x.add_``)."""
    for user in node.users:
        if user.op == "call_function" and (user.target in _IN_PLACE_FUNCTIONS or user.kwargs.get("inplace")):
            return True
        if user.op == "call_method" and str(user.target).endswith("_"):
            return True
        if user.op == "call_module" and getattr(user.graph.owning_module.get_submodule(user.target), "inplace", False):
            return True
    return False


class _Program:
    """One graph prepared for stepwise execution: node order, last use and an interpreter."""

    def __init__(self, gm: fx.GraphModule):
        self.gm = gm
        self.nodes = [node for node in gm.graph.nodes if node.op != "output"]
        self.position = {node.name: i for i, node in enumerate(self.nodes)}
        self.by_name = {node.name: node for node in self.nodes}
        self.interpreter = fx.Interpreter(gm, garbage_collect_values=False)
        placeholders = [node for node in self.nodes if node.op == "placeholder"]
        if len(placeholders) != 1:
            raise InputShapeError(f"Calibration runs models with one input; this one takes {len(placeholders)}",
                                  fix="calibrate a sub-model that takes one image tensor")
        self.last_use = {}
        for i, node in enumerate(self.nodes):
            uses = [self.position.get(user.name, len(self.nodes)) for user in node.users]
            self.last_use[node.name] = max(uses, default=i)
        self.output = next(node for node in gm.graph.nodes if node.op == "output").args[0]


@dataclass
class _Frontier:
    """The live values of one (batch, model, view) after running the nodes up to ``position``."""

    values: dict[str, object] = field(default_factory=dict)
    position: int = -1


class PairedRun:
    """The converted graph and the original's graph run over ``batches``, each from where it stopped.

    ``views`` maps a view id to the element moving the images (``group.act_grid``); view 0 is
    the images as given. The converted model always runs on view 0 only.
    """

    def __init__(self, converted: fx.GraphModule, original: fx.GraphModule, batches: list[torch.Tensor],
                 group: Group, cache_bytes: int):
        self.programs = {CONVERTED: _Program(converted), ORIGINAL: _Program(original)}
        self.batches = batches
        self.group = group
        self.cache_bytes = cache_bytes
        self.frontiers: dict[tuple[int, str, int], _Frontier] = {}
        self.kept_bytes: dict[tuple[int, str, int], int] = {}
        self.started: set[tuple[int, str, int]] = set()
        self.recomputed = 0

    def output_name(self, model: str) -> str | None:
        """The name of the value a model returns, None when it returns a structure of several."""
        output = self.programs[model].output
        return output.name if isinstance(output, fx.Node) else None

    def node(self, model: str, name: str) -> fx.Node:
        return self.programs[model].by_name[name]

    def position(self, model: str, name: str) -> int:
        return self.programs[model].position[name]

    @torch.no_grad()
    def values(self, batch: int, model: str, view: int, names: list[str]) -> dict[str, torch.Tensor]:
        """The values of the named nodes for one batch seen by one view, running only the nodes not yet run.

        Values a later node may change in place are copied when they are produced.
        """
        program = self.programs[model]
        key = (batch, model, view)
        frontier = self.frontiers.pop(key, None)
        self.kept_bytes.pop(key, None)
        wanted = set(names)
        if frontier is None or any(program.position[n] <= frontier.position and n not in frontier.values
                                   for n in wanted):
            self.recomputed += key in self.started   # not kept, or a wanted value dropped: start from the images
            frontier = _Frontier()
        self.started.add(key)
        found = {n: frontier.values[n] for n in wanted if n in frontier.values}
        end = max(program.position[n] for n in wanted)
        interpreter = program.interpreter
        interpreter.env = {program.by_name[n]: v for n, v in frontier.values.items()}
        for i in range(frontier.position + 1, end + 1):
            node = program.nodes[i]
            if node.op == "placeholder":
                value = self._images(batch, view)
            else:
                value = interpreter.run_node(node)
            interpreter.env[node] = value
            if node.name in wanted:
                found[node.name] = value.clone() if is_mutated_in_place(node) else value
            for used in (*node.all_input_nodes, node):
                if program.last_use[used.name] <= i and used in interpreter.env:
                    del interpreter.env[used]
        frontier = _Frontier({node.name: v for node, v in interpreter.env.items()}, max(end, frontier.position))
        interpreter.env = {}
        self._keep(key, frontier)
        return found

    def _images(self, batch: int, view: int) -> torch.Tensor:
        images = self.batches[batch]
        return images if view == 0 else self.group.act_grid(view, images)

    def _keep(self, key: tuple[int, str, int], frontier: _Frontier) -> None:
        size = sum(v.numel() * v.element_size() for v in frontier.values.values() if isinstance(v, torch.Tensor))
        if sum(self.kept_bytes.values()) + size <= self.cache_bytes:
            self.frontiers[key] = frontier
            self.kept_bytes[key] = size
