"""Baking a whole converted model into plain torch modules, so inference needs no orbify (docs/design.md §14).

:func:`bake_model` copies the model, turns every tied module into the plain module it stands for
(:func:`orbify.layers.tied.bake`: parametrizations removed with the expanded weights kept, orbit
batch norms widened to ``nn.BatchNorm1d/2d/3d``) and, in every ``torch.fx`` graph, replaces
orbit pooling by the plain tensor methods ``x.unflatten(1, (-1, n)).mean(2)`` (or ``.amax(2)``).
The result computes the same function with the same arithmetic as the tied model, and pickles
(``torch.save``) without referring to any orbify class or function.
"""

from __future__ import annotations

import copy

from torch import fx, nn
from torch.nn.utils import parametrize

from orbify.errors import UnsupportedOpError
from orbify.layers.tied import OrbitBatchNorm, OrbitPool, bake, orbit_pool


def bake_model(module: nn.Module) -> nn.Module:
    """A plain copy of ``module`` with every tied part expanded; ``module`` is left untouched.

    Works on the GraphModule :func:`orbify.convert` returns, on single tied modules and on module
    trees built from them. The copy keeps the training mode and ``requires_grad`` flags. Raises
    :class:`UnsupportedOpError` for an orbit pool outside a ``torch.fx`` graph (trace the model
    first).

    Example (the baked copy computes what the converted model computes, with plain layers):

    >>> import torch
    >>> from torch import nn
    >>> import orbify
    >>> model = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
    ...                       nn.Linear(8, 4)).eval()
    >>> converted, plan = orbify.convert(model, "c4", example_input=torch.zeros(1, 3, 9, 9))
    >>> baked = orbify.bake_model(converted)
    >>> any(torch.nn.utils.parametrize.is_parametrized(m) for m in baked.modules())
    False
    >>> x = torch.randn(2, 3, 9, 9)
    >>> torch.allclose(baked(x), converted(x), atol=1e-6)
    True
    """
    baked = copy.deepcopy(module)
    graphs = [m for m in baked.modules() if isinstance(m, fx.GraphModule)]
    for graph_module in graphs:
        _replace_pool_nodes(graph_module)
    if _is_tied(baked):
        baked = bake(baked)
    for name, submodule in list(baked.named_modules()):
        if name and _is_tied(submodule):
            _set_submodule(baked, name, bake(submodule))
    for graph_module in graphs:
        graph_module.graph._tracer_cls = None   # the tracer class may be orbify's; pickles would import it
        graph_module._tracer_cls = None
        graph_module.recompile()
    leftover = sorted({name or "the model itself" for name, m in baked.named_modules()
                       if isinstance(m, OrbitPool)})
    if leftover:
        raise UnsupportedOpError(f"Orbit pools outside a torch.fx graph cannot be baked: {', '.join(leftover)}",
                                 fix="bake the GraphModule that orbify.convert returned (orbit pools are "
                                     "replaced only inside a torch.fx graph)")
    return baked


def _is_tied(module: nn.Module) -> bool:
    return isinstance(module, OrbitBatchNorm) or parametrize.is_parametrized(module)


def _set_submodule(root: nn.Module, name: str, replacement: nn.Module) -> None:
    parent, _, leaf = name.rpartition(".")
    setattr(root.get_submodule(parent) if parent else root, leaf, replacement)


def _replace_pool_nodes(graph_module: fx.GraphModule) -> None:
    """Rewrite orbit-pool nodes (module calls and function calls) as plain unflatten + mean/amax."""
    graph = graph_module.graph
    pools: set[str] = set()
    for node in list(graph.nodes):
        if node.op == "call_module" and isinstance(graph_module.get_submodule(node.target), OrbitPool):
            pool = graph_module.get_submodule(node.target)
            value, order, mode = node.args[0], pool.order, pool.mode
            pools.add(node.target)
        elif node.op == "call_function" and node.target is orbit_pool:
            arguments = dict(zip(("x", "order", "mode"), node.args), **node.kwargs)
            value, order, mode = arguments["x"], arguments["order"], arguments.get("mode", "mean")
        else:
            continue
        with graph.inserting_before(node):
            slots = graph.call_method("unflatten", (value, 1, (-1, order)))
            pooled = graph.call_method("mean" if mode == "mean" else "amax", (slots, 2))
        pooled.meta = dict(node.meta)
        node.replace_all_uses_with(pooled)
        graph.erase_node(node)
    graph.lint()
    for target in pools:
        graph_module.delete_submodule(target)


__all__ = ["bake_model"]
