"""Edits and searches of the traced graph during a conversion: inserting orbit pools, swapping modules."""

from __future__ import annotations

from torch import fx, nn

from orbify.errors import OptionError, UnsupportedOpError
from orbify.graph.tracing import describe
from orbify.layers.tied import OrbitPool
from orbify.transfer.kinds import chooses_channels


def find_node(gm: fx.GraphModule, name: str) -> fx.Node:
    """The node of that name or module path; for a container path, the last node inside it.

    Raises :class:`~orbify.errors.OptionError` (for the ``stop_at`` option) when there is none.
    """
    inside = None
    for node in gm.graph.nodes:
        if node.name == name or node.target == name:
            return node
        if node.op == "call_module" and node.target.startswith(name + "."):
            inside = node
    if inside is not None:
        return inside
    names = ", ".join(n.name for n in gm.graph.nodes if n.op == "call_module")
    raise OptionError(f"No graph node named {name!r} to stop at", where="option stop_at",
                      fix=f"use a node name or module path, e.g. one of: {names[:300]}")


def insert_pool(gm: fx.GraphModule, node: fx.Node, name: str, order: int) -> fx.Node:
    """Insert an :class:`~orbify.layers.tied.OrbitPool` (submodule ``name``) after ``node``; its users read the pool."""
    gm.add_submodule(name, OrbitPool(order))
    with gm.graph.inserting_after(node):
        pool = gm.graph.call_module(name, (node,))
    node.replace_all_uses_with(pool, delete_user_cb=lambda user: user is not pool)
    return pool


def descendants(node: fx.Node) -> set[fx.Node]:
    """Every node that reads ``node``'s value, directly or not."""
    out, stack = set(), [node]
    while stack:
        for user in stack.pop().users:
            if user not in out:
                out.add(user)
                stack.append(user)
    return out


def head_layers(gm: fx.GraphModule) -> set[fx.Node]:
    """The conv/linear nodes that produce the output through layout-keeping ops only: they map to plain."""
    heads: set[fx.Node] = set()
    seen: set[fx.Node] = set()
    stack = [n for n in gm.graph.nodes if n.op == "output"]
    while stack:
        node = stack.pop()
        for arg in node.all_input_nodes:
            if arg in seen:
                continue
            seen.add(arg)
            if arg.op == "call_module" and chooses_channels(gm.get_submodule(arg.target)):
                heads.add(arg)
                continue
            stack.append(arg)
    return heads


class ModuleReplacer:
    """Puts new modules in place of the ones graph nodes call, each module path at most once."""

    def __init__(self, gm: fx.GraphModule):
        self.gm = gm
        self.replaced: set[str] = set()

    def replace(self, node: fx.Node, module: nn.Module) -> None:
        """Make ``module`` the one ``node`` calls; refuse a module that another node called too."""
        if node.target in self.replaced:
            raise UnsupportedOpError("A layer module is called more than once in the graph", where=describe(node),
                                     fix="give every call its own module instance before converting")
        self.replaced.add(node.target)
        parent, _, name = node.target.rpartition(".")
        setattr(self.gm.get_submodule(parent) if parent else self.gm, name, module)
