"""Python control flow on input sizes, decided at the example input's sizes while tracing.

Some models branch on the size of a map (timm's VGG head pools a map smaller than its 7×7 kernel up to 7×7
first: ``if x.shape[-2] < self.input_kernel_size ...``). A symbolic trace cannot follow such a branch. With an
example input, the tracer asks :class:`ShapeDecisions`: a condition met for the first time stops the trace
(:class:`UndecidedCondition`); :meth:`ShapeDecisions.settle` evaluates it on the example input from the graph traced
so far, and the trace starts again, taking the recorded branch where the condition comes back. Each decision leaves
a :func:`shape_guard` node in the graph, so the traced model — and the model converted from it — is fixed to the
branches taken at the example's sizes: at a size where a condition comes out otherwise it stops with an
:class:`~orbify.errors.InputShapeError` naming the code, never silently computing something else than the original.
Conditions on tensor values (not on sizes) stay refused.
"""

from __future__ import annotations

import itertools
from typing import TYPE_CHECKING

import torch
from torch import fx, nn
from torch.fx.node import has_side_effect

from orbify.common.modes import module_mode
from orbify.errors import InputShapeError, TraceError

if TYPE_CHECKING:
    from orbify.graph.rules import Step

#: Decisions one trace may take; past this the model is refused (each one costs a new trace).
MAX_DECISIONS = 32

_SHAPE_ATTRIBUTES = ("shape", "ndim")
_SHAPE_METHODS = ("size", "dim", "numel")

#: What to do about a model that cannot be traced.
TRACE_FIX = ("make the forward free of data-dependent control flow, mark the offending submodule as a leaf "
             "(leaf_types=... / --leaf), or convert a traceable sub-model (e.g. the backbone)")


@has_side_effect
def shape_guard(condition: bool, taken: bool, traced_at: str, where: str | None = None) -> None:
    """Stops a model fixed to the branch ``taken`` where its size ``condition`` (the code at ``where``) comes out
    otherwise."""
    if bool(condition) != taken:
        raise InputShapeError(
            f"The model decides by its input size, and was traced at {traced_at}, where a condition on the size came "
            f"out {taken}; at this input size it comes out {not taken}, so the traced (and converted) model, fixed to "
            "the branches taken at that size, does not run here", where=where,
            fix="convert (trace) the model again at this input size: example_input=... / --input-size")


class UndecidedCondition(Exception):
    """Raised inside a trace at a size condition with no decision yet; carries the partial graph."""

    def __init__(self, graph: fx.Graph, root: nn.Module, node: fx.Node):
        super().__init__("a condition on sizes to decide")
        self.graph, self.root, self.node = graph, root, node


class ShapeDecisions:
    """The branches taken at the size conditions of one trace, in the order the trace meets them."""

    def __init__(self, example_input: torch.Tensor | None):
        self.example_input = example_input
        self.taken: list[bool] = []
        self.met = 0

    @property
    def traced_at(self) -> str:
        return "×".join(map(str, self.example_input.shape[2:])) if self.example_input is not None else "no size"

    def restart(self) -> None:
        """A new trace begins: conditions are met again from the first."""
        self.met = 0

    def decide(self, tracer: fx.Tracer, condition: fx.Proxy, where: str | None) -> bool:
        """The branch of the ``met``-th condition (the code at ``where``): recorded (with a guard node), else the
        trace stops to settle it."""
        index, self.met = self.met, self.met + 1
        if index == len(self.taken):
            raise UndecidedCondition(tracer.graph, tracer.root, condition.node)
        tracer.create_proxy("call_function", shape_guard, (condition, self.taken[index], self.traced_at, where), {})
        return self.taken[index]

    def settle(self, pending: UndecidedCondition, where: str | None) -> None:
        """Evaluate the condition of ``pending`` on the example input and record it; :class:`TraceError` when there
        is no example input, the condition reads tensor values, or the trace keeps meeting new conditions."""
        if reads_values(pending.node):
            raise TraceError("The model cannot be traced symbolically: its control flow depends on tensor values",
                             where=where, fix=TRACE_FIX)
        if self.example_input is None:
            raise TraceError("The model decides by its input size while tracing, and no example input says which "
                             "branch to take", where=where,
                             fix="give an example input at the size the model will run at (example_input=...; the "
                                 "command line passes one at the chosen --input-size)") from pending
        if len(self.taken) == MAX_DECISIONS:
            raise TraceError(f"The model decides by its input size more than {MAX_DECISIONS} times while tracing",
                             where=where, fix=TRACE_FIX)
        self.taken.append(evaluate(pending, self.example_input))


def decides_by_size(error: TraceError) -> bool:
    """True for the refusal of a model that decides by its input size, traced without an example input."""
    return isinstance(error.__cause__, UndecidedCondition)


def reads_values(node: fx.Node) -> bool:
    """True when ``node`` depends on a tensor's values, not only on sizes: some path up from it reaches the input or
    a model tensor without passing a size read (``x.shape``, ``x.size()``, ``x.dim()``, ...)."""
    seen: set[fx.Node] = set()
    todo = [node]
    while todo:
        current = todo.pop()
        if current in seen or _reads_size(current):
            continue
        seen.add(current)
        if current.op in ("placeholder", "get_attr"):
            return True
        todo.extend(current.all_input_nodes)
    return False


def _reads_size(node: fx.Node) -> bool:
    if node.op == "call_function" and node.target in (getattr, torch.numel):
        return node.target is torch.numel or (len(node.args) > 1 and node.args[1] in _SHAPE_ATTRIBUTES)
    return node.op == "call_method" and node.target in _SHAPE_METHODS


def evaluate(pending: UndecidedCondition, example_input: torch.Tensor) -> bool:
    """The value of ``pending``'s condition on ``example_input``: the graph traced so far, cut down to what the
    condition needs, run in eval mode on the meta device (a condition on sizes needs shapes only)."""
    prefix = fx.Graph()
    values: dict[fx.Node, fx.Node] = {}
    prefix.graph_copy(pending.graph, values)
    prefix.output(values[pending.node])
    gm = fx.GraphModule(pending.root, prefix)
    gm.graph.eliminate_dead_code()
    gm.recompile()
    on_meta = {name: torch.empty_like(tensor, device="meta")
               for name, tensor in [*gm.named_parameters(), *gm.named_buffers()]}
    with module_mode(gm, training=False), torch.no_grad():
        return bool(torch.func.functional_call(gm, on_meta, (example_input.to("meta"),)))


def fixed_branch(step: Step) -> None:
    """The rule of a :func:`shape_guard` node: no value; the plan notes that the converted model is fixed to the
    branch taken at the example's sizes (once per line of code)."""
    _, taken, traced_at, where = step.node.args
    earlier = itertools.takewhile(lambda node: node is not step.node, step.node.graph.nodes)
    if any(node.target is shape_guard and node.args[3] == where for node in earlier):
        return None   # one note per line of code
    step.ctx.add_note(f"a branch on the input size ({where or step.node.name}) is fixed as taken at "
                      f"{traced_at} (the condition came out {taken}); input sizes where it comes out otherwise are "
                      "refused")
    return None


#: Rules by function (registered in :mod:`orbify.graph.rules`).
SHAPE_DECISION_FUNCTIONS = {shape_guard: fixed_branch}
