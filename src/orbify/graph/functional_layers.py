"""Functional layer calls on a model's own tensors, made into layer modules (docs/design.md §5).

Some libraries fuse a norm with what follows it in one module whose forward calls
``torch.nn.functional.batch_norm`` (or ``layer_norm``, ``group_norm``) with the module's own
statistics and affine parameters, or subclass ``nn.Linear`` / ``nn.Conv2d`` with a forward that
calls ``F.linear`` / ``F.conv2d`` itself. In a traced graph these are function calls whose tensor
arguments are ``get_attr`` nodes. :func:`modularise_functional_layers` replaces each such call by a
call of a plain ``nn.BatchNorm1d/2d``, ``nn.LayerNorm``, ``nn.GroupNorm``, ``nn.Linear`` or
``nn.Conv2d`` holding those very tensors, so the rules, weight transfer, recalibration and the
check treat it as they treat the module form. The tensors move from their owner to the new module,
registered as the owner's child ``norm`` / ``linear`` / ``conv``; the owner itself (whose forward
is no longer called) becomes a plain container of its children (e.g. the activation called after
the norm) and of its tensors that are still used, so no code that looks for norm or conv modules
mistakes it for one. Each new module's node records the call it was made from (:data:`FUNCTIONAL_CALL`), so
the original model's counterpart of the module can be built from the original's own tensors
(:func:`layer_from_call`), as calibration needs it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import torch.nn.functional as F
from torch import fx, nn

_TENSOR_ARGUMENTS = {
    F.batch_norm: ("input", "running_mean", "running_var", "weight", "bias", "training", "momentum", "eps"),
    F.layer_norm: ("input", "normalized_shape", "weight", "bias", "eps"),
    F.group_norm: ("input", "num_groups", "weight", "bias", "eps"),
    F.linear: ("input", "weight", "bias"),
    F.conv2d: ("input", "weight", "bias", "stride", "padding", "dilation", "groups"),
}
_CHILD_NAMES = {F.batch_norm: "norm", F.layer_norm: "norm", F.group_norm: "norm", F.linear: "linear",
                F.conv2d: "conv"}
_MODULE_TENSORS = ("running_mean", "running_var", "weight", "bias")

#: The node meta key under which a module made from a functional call keeps its :class:`FunctionalCall`.
FUNCTIONAL_CALL = "orbify_functional_call"


@dataclass(frozen=True)
class FunctionalCall:
    """A functional call made into a module: the ``function``, its constant ``settings`` (argument name → value),
    the model ``tensors`` it used (argument name → path in the model) and the ``rank`` of its input (if known)."""

    function: Callable
    settings: dict[str, object]
    tensors: dict[str, str]
    rank: int | None


def layer_from_call(call: FunctionalCall, model: nn.Module) -> nn.Module:
    """The plain module computing ``call`` with ``model``'s own tensors at the recorded paths (shared, not copied),
    in the mode of the module that owns them: what the traced copy's module was before the conversion replaced it."""
    tensors = {name: _tensor(model, path) for name, path in call.tensors.items()}
    owner = model.get_submodule(next(iter(call.tensors.values())).rpartition(".")[0])
    return _module_for(call.function, call.settings, tensors, call.rank).train(owner.training)


def modularise_functional_layers(gm: fx.GraphModule) -> list[str]:
    """Rewrite ``gm`` in place as the module docstring says; returns the names of the new modules.

    A call is rewritten only when every weight, bias and statistic it uses is a ``get_attr`` node (the
    model's own parameter or buffer) of one owner, its weight and bias are parameters and its other arguments are
    constants; other calls are left for the rules to judge.
    """
    made = []
    for node in list(gm.graph.nodes):
        if node.op != "call_function" or node.target not in _TENSOR_ARGUMENTS:
            continue
        arguments = _arguments(node)
        owned = {name: value for name, value in arguments.items() if name in _MODULE_TENSORS and value is not None}
        settings = [value for name, value in arguments.items() if name not in _MODULE_TENSORS and name != "input"]
        if (not owned or not all(isinstance(v, fx.Node) and v.op == "get_attr" for v in owned.values())
                or any(isinstance(value, fx.Node) for value in settings) or _fixed_weights(gm, owned)):
            continue
        owner = next(iter(owned.values())).target.rpartition(".")[0]
        if not owner or any(v.target.rpartition(".")[0] != owner for v in owned.values()):
            continue
        tensors = {name: _tensor(gm, v.target) for name, v in owned.items()}
        call = FunctionalCall(node.target, {name: value for name, value in arguments.items()
                                            if name not in _MODULE_TENSORS and name != "input"},
                              {name: v.target for name, v in owned.items()}, _rank(arguments["input"]))
        name = _rehome(gm, owner, _module_for(node.target, call.settings, tensors, call.rank),
                       [v.target for v in owned.values()], _CHILD_NAMES[node.target])
        with gm.graph.inserting_before(node):
            replacement = gm.graph.call_module(name, (arguments["input"],))
        replacement.meta = {**node.meta, FUNCTIONAL_CALL: call}
        node.replace_all_uses_with(replacement)
        gm.graph.erase_node(node)
        for attribute in owned.values():
            if not attribute.users:
                gm.graph.erase_node(attribute)
        made.append(name)
    if made:
        gm.recompile()
    return made


def _arguments(node: fx.Node) -> dict[str, object]:
    """The call's arguments by name (positional ones named after the functional signature)."""
    names = _TENSOR_ARGUMENTS[node.target]
    given = dict(zip(names, node.args))
    given.update(node.kwargs)
    return given


def _fixed_weights(gm: nn.Module, owned: dict[str, fx.Node]) -> bool:
    """True when a weight or bias of the call is a buffer, not a parameter: a fixed filter (a blur pool's binomial
    kernel) that no layer learns, left for the rules to judge (:mod:`orbify.graph.fixed_filters`)."""
    return any(name in ("weight", "bias") and not _is_parameter(gm, node.target) for name, node in owned.items())


def _is_parameter(gm: nn.Module, target: str) -> bool:
    owner, _, attribute = target.rpartition(".")
    return attribute in gm.get_submodule(owner)._parameters


def _tensor(model: nn.Module, target: str) -> object:
    """The parameter or buffer at path ``target`` of ``model``."""
    return model.get_parameter(target) if _is_parameter(model, target) else model.get_buffer(target)


def _module_for(function: Callable, arguments: dict[str, object], tensors: dict[str, object],
                rank: int | None) -> nn.Module:
    """The plain module computing ``function`` with the constant ``arguments`` on an input of ``rank`` axes, holding
    ``tensors`` (the very objects, not copies)."""
    weight = tensors.get("weight")
    if function is F.linear:
        module = nn.Linear(weight.shape[1], weight.shape[0], bias="bias" in tensors)
    elif function is F.conv2d:
        groups = arguments.get("groups", 1)
        module = nn.Conv2d(weight.shape[1] * groups, weight.shape[0], tuple(weight.shape[2:]),
                           stride=arguments.get("stride", 1), padding=arguments.get("padding", 0),
                           dilation=arguments.get("dilation", 1), groups=groups, bias="bias" in tensors)
    elif function is F.batch_norm:
        features = tensors["running_mean"].numel() if "running_mean" in tensors else weight.numel()
        kind = nn.BatchNorm1d if rank in (2, 3) else nn.BatchNorm2d
        momentum = arguments.get("momentum", 0.1)
        module = kind(features, eps=arguments.get("eps", 1e-5), momentum=momentum, affine=weight is not None,
                      track_running_stats="running_mean" in tensors)
    elif function is F.layer_norm:
        module = nn.LayerNorm(arguments["normalized_shape"], eps=arguments.get("eps", 1e-5),
                              elementwise_affine=weight is not None, bias="bias" in tensors)
    else:
        module = nn.GroupNorm(arguments["num_groups"], next(iter(tensors.values())).numel(), eps=arguments.get("eps", 1e-5),
                              affine=weight is not None)
    for name, tensor in tensors.items():
        if isinstance(tensor, nn.Parameter):
            module.register_parameter(name, tensor)
        else:
            module.register_buffer(name, tensor)
    return module


def _rank(node: object) -> int | None:
    """The number of axes of a node's value, when shape propagation recorded it."""
    meta = node.meta.get("tensor_meta") if isinstance(node, fx.Node) else None
    return len(meta.shape) if meta is not None and hasattr(meta, "shape") else None


def _rehome(gm: fx.GraphModule, owner_name: str, module: nn.Module, moved: list[str], child: str) -> str:
    """Put ``module`` under ``owner_name`` as ``child`` (``child_1``, ... when taken), the owner replaced by a plain
    container of its children and of its tensors other than ``moved``; returns the new module's full name."""
    owner = gm.get_submodule(owner_name)
    container = owner if type(owner) is nn.Module else nn.Module()
    if container is not owner:
        for child_name, child in owner.named_children():
            container.add_module(child_name, child)
        for tensor_name, parameter in owner.named_parameters(recurse=False):
            container.register_parameter(tensor_name, parameter)
        for tensor_name, buffer in owner.named_buffers(recurse=False):
            container.register_buffer(tensor_name, buffer)
        if owner_name:
            parent_name, _, attribute = owner_name.rpartition(".")
            setattr(gm.get_submodule(parent_name), attribute, container)
    for target in moved:
        name = target.rpartition(".")[2]
        container._parameters.pop(name, None)
        container._buffers.pop(name, None)
    name, index = child, 0
    while hasattr(container, name):
        index += 1
        name = f"{child}_{index}"
    container.add_module(name, module.train(owner.training))
    return f"{owner_name}.{name}"
