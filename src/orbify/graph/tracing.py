"""Tracing a plain model into a ``torch.fx`` graph with shapes, and naming nodes in errors."""

from __future__ import annotations

import contextlib
import copy
import io
import re
import sys
import traceback
from collections.abc import Iterable

import torch
from torch import fx, nn
from torch.fx.passes.shape_prop import ShapeProp

from orbify.common.modes import module_mode
from orbify.errors import InputShapeError, TraceError
from orbify.graph.functional_layers import modularise_functional_layers
from orbify.graph.padding import fold_same_padding_kernels, same_padding_functions
from orbify.graph.shape_decisions import TRACE_FIX, ShapeDecisions, UndecidedCondition
from orbify.graph.standardized_convs import is_standardized_conv


class _Tracer(fx.Tracer):
    """Symbolic tracer that keeps the given module types (and torch's own leaves, and weight-standardized convs:
    :mod:`orbify.graph.standardized_convs`) as single nodes."""

    def __init__(self, leaf_types: tuple[type, ...], decisions: ShapeDecisions):
        super().__init__(autowrap_functions=_resampling_functions() + same_padding_functions())
        self.leaf_types = leaf_types
        self.decisions = decisions
        self.record_stack_traces = True

    def to_bool(self, obj: fx.Proxy) -> bool:
        """A Python branch on a traced value: decided at the example input's sizes (:mod:`orbify.graph.shape_decisions`)."""
        return self.decisions.decide(self, obj, source_line(obj.node))

    def is_leaf_module(self, m: nn.Module, qualname: str) -> bool:
        return (isinstance(m, self.leaf_types) or _decides_by_mode(m) or is_standardized_conv(m)
                or super().is_leaf_module(m, qualname))


def _resampling_functions() -> tuple:
    """Functions kept as single nodes: timm's resampling of position embeddings to the input's patch grid (models
    built with ``dynamic_img_size=True``) decides in Python from the grid's size, which tracing cannot follow; kept
    whole, it runs at the size it is given (its rule: :mod:`orbify.graph.tokens`)."""
    if "timm" not in sys.modules:
        return ()
    from timm.layers.pos_embed import resample_abs_pos_embed

    return (resample_abs_pos_embed,)


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
    (:mod:`orbify.graph.functional_layers`). A "same" padding helper stays one node (:mod:`orbify.graph.padding`);
    a branch on a size takes the way it takes at ``example_input`` and leaves a guard that refuses sizes deciding
    otherwise (:mod:`orbify.graph.shape_decisions`; without an example input such a model is refused). Untraceable
    models raise :class:`TraceError` naming the failing code.
    """
    model = copy.deepcopy(model)
    decisions = ShapeDecisions(example_input)
    try:
        while True:   # each branch on sizes met for the first time is settled, then traced again
            decisions.restart()
            tracer = _Tracer(tuple(leaf_types), decisions)
            try:
                graph = tracer.trace(model)
                break
            except UndecidedCondition as pending:
                decisions.settle(pending, describe(pending.node))
    except TraceError:
        raise
    except Exception as error:  # torch.fx raises many kinds; all mean "cannot trace"
        raise TraceError(
            f"The model cannot be traced symbolically: {type(error).__name__}: {_first_line(error)}",
            where=_user_frame(error),
            fix=TRACE_FIX,
        ) from error
    gm = fx.GraphModule(tracer.root, graph, type(model).__name__)
    fold_same_padding_kernels(gm)
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
