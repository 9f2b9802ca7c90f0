"""Tracing a plain model into a ``torch.fx`` graph with shapes, and naming nodes in errors."""

from __future__ import annotations

import contextlib
import copy
import io
import re
import traceback
from collections.abc import Iterable

import torch
from torch import fx, nn
from torch.fx.passes.shape_prop import ShapeProp

from orbify.common.modes import module_mode
from orbify.errors import InputShapeError, TraceError
from orbify.graph.functional_layers import modularise_functional_layers


class _Tracer(fx.Tracer):
    """Symbolic tracer that keeps the given module types (and torch's own leaves) as single nodes."""

    def __init__(self, leaf_types: tuple[type, ...]):
        super().__init__()
        self.leaf_types = leaf_types
        self.record_stack_traces = True

    def is_leaf_module(self, m: nn.Module, qualname: str) -> bool:
        return isinstance(m, self.leaf_types) or _decides_by_mode(m) or super().is_leaf_module(m, qualname)


_MODE_DEPENDENT = {("torchvision.ops.stochastic_depth", "StochasticDepth"), ("timm.layers.drop", "DropPath")}


def _decides_by_mode(module: nn.Module) -> bool:
    """Stochastic depth decides in Python whether it is training: traced through, the mode at tracing time would be
    fixed in the graph, so it stays a module (its rule passes the layout through)."""
    return (type(module).__module__, type(module).__name__) in _MODE_DEPENDENT


def trace(model: nn.Module, example_input: torch.Tensor | None = None,
          leaf_types: Iterable[type] = ()) -> fx.GraphModule:
    """Trace a *copy* of ``model`` symbolically and, given an example input, record every node's shape.

    The returned GraphModule owns its submodules, so the caller may replace them without touching
    ``model``. Functional norm, linear and conv calls on the model's own tensors become modules
    (:mod:`orbify.graph.functional_layers`). Untraceable models raise :class:`TraceError` naming the failing code.
    """
    model = copy.deepcopy(model)
    tracer = _Tracer(tuple(leaf_types))
    try:
        graph = tracer.trace(model)
    except Exception as error:  # torch.fx raises many kinds; all mean "cannot trace"
        raise TraceError(
            f"The model cannot be traced symbolically: {type(error).__name__}: {_first_line(error)}",
            where=_user_frame(error),
            fix="make the forward free of data-dependent control flow, mark the offending submodule as a "
                "leaf (leaf_types=... / --leaf), or convert a traceable sub-model (e.g. the backbone)",
        ) from error
    gm = fx.GraphModule(tracer.root, graph, type(model).__name__)
    if example_input is not None:
        propagate_shapes(gm, example_input)
    modularise_functional_layers(gm)
    return gm


def propagate_shapes(gm: fx.GraphModule, example_input: torch.Tensor) -> None:
    """Run ``example_input`` through ``gm`` (eval, no grad) and store each node's tensor metadata."""
    try:   # torch's ShapeProp prints the traceback of a failing node itself: keep it off the terminal
        with module_mode(gm, training=False), torch.no_grad(), contextlib.redirect_stderr(io.StringIO()):
            ShapeProp(gm).propagate(example_input)
    except Exception as error:
        raise input_error(gm, tuple(example_input.shape), error) from error


def input_error(gm: fx.GraphModule, input_shape: tuple[int, ...], error: Exception) -> InputShapeError:
    """The error for an input that does not run through ``gm``, naming the node where it failed."""
    node = _failing_node(gm, error)
    return InputShapeError(
        f"An input of shape {input_shape} does not run through the model: {_first_line(error)}",
        where=describe(node) if node is not None else None,
        fix="give an input of shape (batch, channels, height, width) with the channel count the first layer "
            "expects (--channels), at a size every layer accepts",
    )


def _failing_node(gm: fx.GraphModule, error: Exception) -> fx.Node | None:
    """The node an fx.Interpreter was running when ``error`` happened (from the message it appends)."""
    names = {node.name: node for node in gm.graph.nodes}
    for text in [str(error), *getattr(error, "__notes__", [])]:
        match = re.search(r"While executing %(\w+)", text)
        if match and match.group(1) in names:
            return names[match.group(1)]
    return None


def _first_line(error: Exception) -> str:
    """The first line of the error's message; of the error it wraps when torch's shape propagation wrapped it (its
    wrapper repeats the node's metadata, stack traces included)."""
    if str(error).startswith("ShapeProp error") and error.__cause__ is not None:
        error = error.__cause__
    text = str(error).strip().splitlines()
    return text[0] if text else type(error).__name__


def _user_frame(error: Exception) -> str | None:
    """The innermost traceback frame outside torch, as 'file:line in function: code'."""
    frames = [f for f in traceback.extract_tb(error.__traceback__) if "/torch/" not in f.filename]
    if not frames:
        return None
    f = frames[-1]
    return f"{f.filename}:{f.lineno} in {f.name}: {(f.line or '').strip()}"


def source_line(node: fx.Node) -> str | None:
    """The user's source line that created ``node`` (from the trace's stack record), if known."""
    stack = node.meta.get("stack_trace")
    if not stack:
        return None
    lines = [line.strip() for line in stack.strip().splitlines()]
    for i in range(len(lines) - 1, -1, -1):
        if lines[i].startswith("File ") and "/torch/" not in lines[i]:
            code = lines[i + 1] if i + 1 < len(lines) else ""
            return f"{lines[i]}: {code}"
    return None


def describe(node: fx.Node) -> str:
    """'node NAME (op TARGET) at SOURCE' for error messages."""
    target = node.target if isinstance(node.target, str) else getattr(node.target, "__name__", str(node.target))
    text = f"graph node '{node.name}' ({node.op} {target})"
    line = source_line(node)
    return f"{text} at {line}" if line else text


def shape(node: fx.Node) -> tuple[int, ...] | None:
    """The output shape recorded by :func:`propagate_shapes`, or None for non-tensor values."""
    meta = node.meta.get("tensor_meta")
    return tuple(meta.shape) if meta is not None and hasattr(meta, "shape") else None
