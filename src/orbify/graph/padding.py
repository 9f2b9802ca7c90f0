"""Padding: fixed pads (``F.pad``, ``nn.ZeroPad2d`` and kin) and TensorFlow-style "same" padding that depends on the
input side (docs/design.md §6).

A pad fills (or crops) every channel alike, so it commutes with any permutation of channels; it commutes with the
grid motions when it is symmetric: as much on the left as on the right and on the top as on the bottom, and, for a
group that turns by a quarter (or less), as much along the height as along the width. A fixed pad that is not
symmetric is refused by :func:`fixed_pad` (hgnetv2's ``F.pad(x, (0, 1, 0, 1))``, nasnet's shifted
``nn.ZeroPad2d((-1, 1, -1, 1))``): no input size makes it exact.

"Same" padding (timm's ``pad_same``, used by its ``Conv2dSame``, ``MaxPool2dSame``, ``AvgPool2dSame`` and the
standardized ``...Same`` convs) pads a side ``n`` by ``total = max((⌈n/s⌉ − 1)·s + d·(k − 1) + 1 − n, 0)``, ``total
// 2`` before and the rest after (:func:`same_pads`). It is symmetric exactly when ``total`` is even, which depends
on ``n`` modulo the stride ``s``: with ``n = q·s − r`` (0 ≤ r < s), ``total = max(d·(k − 1) + 1 − s + r, 0)``. The
tracer keeps the helper as one graph node (:func:`same_padding_functions`), :func:`same_padding` lets its layout
through, and the size search (:mod:`orbify.graph.sizes`) counts a side where the pad is uneven as inexact
(:class:`PaddingViolation`). Where the pad is positive, the op that reads the padded map samples a symmetric grid:
the padded side ``(⌈n/s⌉ − 1)·s + d·(k − 1) + 1`` fits its window a whole number of strides; where it is 0 (a 1×1
kernel of stride 2) the op's own stride rule decides, as the size search checks for every strided op. A "same" conv
or pool kept whole (a leaf) is checked as its padding followed by its op (:func:`pads_same_itself`).
"""

from __future__ import annotations

import functools
import operator
import sys
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

import torch.nn.functional as F
from torch import fx, nn

from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout, Orbit, Plain

if TYPE_CHECKING:
    from orbify.graph.rules import Step

_SAME_PADDING = ("timm.layers.padding", "pad_same")   # (module, function) of the library's dynamic "same" padding

_ASYMMETRIC_FIX = ("pad as much on each side of an axis (and, under quarter turns, along both axes), e.g. a 3×3 "
                   "kernel with padding 1 instead of a pad (0, 1) before a 2×2 one; or convert under a group the pad "
                   "commutes with; or convert only up to the node before it (stop_at=... / --stop-at)")


def same_padding_functions() -> tuple[Callable, ...]:
    """The library's dynamic "same" padding helpers, when the library is imported: the tracer keeps each call as one
    node (``pad_same(x, kernel_size, stride, dilation, value)``) instead of tracing its arithmetic on sizes."""
    module = sys.modules.get(_SAME_PADDING[0])
    found = getattr(module, _SAME_PADDING[1], None)
    return (found,) if callable(found) else ()


def is_same_padding(node: fx.Node) -> bool:
    """True for a graph node that calls a dynamic "same" padding helper."""
    return node.op == "call_function" and node.target in same_padding_functions()


_PADS_SAME_ITSELF = {("timm.layers.conv2d_same", "Conv2dSame"), ("timm.layers.pool2d_same", "MaxPool2dSame"),
                     ("timm.layers.pool2d_same", "AvgPool2dSame")}


def pads_same_itself(module: nn.Module | None) -> bool:
    """True for a module kept whole (a leaf) that pads its input "same" itself before its conv or pool: the library's
    "same" convs and pools, and its weight-standardized convs built with a dynamic ``same_pad``."""
    if module is None:
        return False
    named = any((cls.__module__, cls.__name__) in _PADS_SAME_ITSELF for cls in type(module).__mro__)
    return named or (isinstance(module, nn.Conv2d) and getattr(module, "same_pad", False) is True)


def fold_same_padding_kernels(gm: fx.GraphModule) -> None:
    """Make the kernel size of each "same" padding node a constant where it is read from a model tensor's shape
    (``pad_same(x, weight.shape[-2:], ...)``), and drop the size reads left unused: the tensor may move when its
    conv becomes a module (:mod:`orbify.graph.functional_layers`), and the converted conv keeps its kernel size."""
    for node in gm.graph.nodes:
        if is_same_padding(node) and len(node.args) > 1 and isinstance(node.args[1], fx.Node):
            read = node.args[1]
            value = _model_tensor_size(gm, read)
            if isinstance(value, tuple) and all(isinstance(v, int) for v in value):
                node.args = (node.args[0], tuple(value), *node.args[2:])
                _erase_unused(gm.graph, read)
    gm.recompile()


def _model_tensor_size(gm: fx.GraphModule, node: fx.Node):
    """The value of ``node`` when it reads the shape of a model tensor (``getattr``/``getitem`` from a ``get_attr``),
    else None."""
    if node.op == "call_function" and node.target in (getattr, operator.getitem) and isinstance(node.args[0], fx.Node):
        base = node.args[0]
        held = functools.reduce(getattr, base.target.split("."), gm) if base.op == "get_attr" \
            else _model_tensor_size(gm, base)
        return None if held is None else node.target(held, node.args[1])
    return None


def _erase_unused(graph: fx.Graph, node: fx.Node) -> None:
    """Erase ``node`` and then those of its inputs it alone used, up to the model tensor it read."""
    while node.op == "call_function" and not node.users:
        source = node.args[0]
        graph.erase_node(node)
        node = source


def same_pads(side: int, kernel: int, stride: int, dilation: int = 1) -> tuple[int, int]:
    """(before, after) of the "same" padding of one axis of length ``side`` (the module docstring's formula)."""
    total = max((-(-side // stride) - 1) * stride + dilation * (kernel - 1) + 1 - side, 0)
    return total // 2, total - total // 2


def _pair(value) -> tuple[int, int]:
    return (value, value) if isinstance(value, int) else tuple(int(v) for v in value)


def same_padding_geometry(args: tuple, kwargs: dict) -> tuple[tuple[int, int], ...]:
    """(kernel, stride, dilation) of a "same" padding call ``pad_same(x, kernel_size, stride, dilation=1, ...)``
    from its argument values."""
    values = dict(zip(("kernel_size", "stride", "dilation"), args[1:4]), **kwargs)
    return _pair(values["kernel_size"]), _pair(values["stride"]), _pair(values.get("dilation", (1, 1)))


def is_even(size: tuple[int, int], kernel: tuple[int, int], stride: tuple[int, int],
            dilation: tuple[int, int]) -> bool:
    """True when the "same" padding of an input of ``size`` is even along both axes and, on a square input, equal
    along both (a quarter turn swaps them)."""
    pads = [same_pads(*axis) for axis in zip(size, kernel, stride, dilation)]
    return all(before == after for before, after in pads) and (size[0] != size[1] or pads[0] == pads[1])


@dataclass(frozen=True)
class PaddingViolation:
    """A "same" padding that is uneven at the checked input size (more after than before along an axis)."""

    node: str
    where: str
    size: tuple[int, int]
    kernel: tuple[int, int]
    stride: tuple[int, int]
    dilation: tuple[int, int]

    def __str__(self) -> str:
        (top, bottom), (left, right) = (same_pads(*axis) for axis in zip(self.size, self.kernel, self.stride,
                                                                          self.dilation))
        return (f"{self.where}: input {self.size[0]}×{self.size[1]}, \"same\" padding for kernel {self.kernel}, "
                f"stride {self.stride} pads top/bottom {top}/{bottom}, left/right {left}/{right} — uneven, so the "
                "grid it pads is not symmetric")

    @property
    def needs(self) -> str:
        """The input sides on which the pad is even, as residues modulo the stride, in words."""
        kernel, stride, dilation = self.kernel[0], self.stride[0], self.dilation[0]
        geometry = f"kernel {kernel}×{self.kernel[1]}, stride {stride}" + (f", dilation {dilation}" if dilation > 1
                                                                           else "")
        residues = sorted(side % stride for side in range(stride, 2 * stride)
                          if is_even((side, side), self.kernel, self.stride, self.dilation))
        if not residues:
            return f"an even \"same\" padding, which it has at no input side ({geometry})"
        return (f"an input side ≡ {', '.join(map(str, residues))} (mod {stride}), where its \"same\" padding is even "
                f"({geometry})")


def same_padding(step: Step) -> Layout | None:
    """``pad_same``: every channel padded alike; whether the pad is even is the size search's to judge."""
    return _channels_first(step, "A \"same\" padding")


def fixed_pad(step: Step) -> Layout | None:
    """``F.pad`` and the pad modules: a symmetric pad of a map keeps the layout; an asymmetric one is refused."""
    node = step.node
    layout = _channels_first(step, "A pad")
    if node.op == "call_module":
        pads = tuple(node.graph.owning_module.get_submodule(node.target).padding)   # (left, right, top, bottom)
    else:
        pads = node.kwargs.get("pad", node.args[1] if len(node.args) > 1 else None)
    if not isinstance(pads, (tuple, list)) or not all(isinstance(p, int) for p in pads):
        raise step.refuse(f"A pad whose amounts are computed while running ({pads})", _ASYMMETRIC_FIX)
    pads = tuple(pads) + (0,) * max(0, 4 - len(pads))
    if any(pads[4:]):
        raise step.refuse(f"A pad {pads} of the channel or batch axis", "pad the two spatial axes only")
    why = _asymmetry(pads[:4], step.ctx.group)
    if why:
        raise step.refuse(f"A pad (left, right, top, bottom) = {pads[:4]} {why}, so no input size makes it commute "
                          "with the group's motions", _ASYMMETRIC_FIX)
    return layout


def _asymmetry(pads: tuple[int, ...], group: Group) -> str:
    """Why a pad (left, right, top, bottom) does not commute with ``group``'s motions, or ''."""
    left, right, top, bottom = pads
    if left != right or top != bottom:
        return "pads one side of an axis more than the other"
    swaps = not group.exact or any(group.quarter_turns(g) % 2 for g in range(group.order))
    if swaps and left != top:
        return "pads the width and the height differently, which a quarter turn swaps"
    return ""


def _channels_first(step: Step, what: str) -> Layout | None:
    """The layout of a value padded along its last axes: plain channels (which no group element moves) or an orbit
    map whose last two axes are the spatial ones; refused for channels-last values, tokens and orbit vectors (a
    (B, C) value, whose last axis holds the orbits' slots)."""
    meta = step.node.args[0].meta.get("tensor_meta")   # its shape (graph/tracing.py imports this module)
    rank = len(meta.shape) if hasattr(meta, "shape") else 0
    if step.layout is None or isinstance(step.layout, Plain) or (isinstance(step.layout, Orbit) and rank == 4):
        return step.layout
    raise step.refuse(f"{what} of a value whose last two axes are not the spatial ones",
                      "pad (batch, channels, height, width) maps only, or convert only up to the node before it "
                      "(stop_at=... / --stop-at)")


_PAD_MODULES = (nn.ZeroPad2d, nn.ConstantPad2d, nn.ReflectionPad2d, nn.ReplicationPad2d, nn.CircularPad2d)

#: Rules by module class and by function (registered in :mod:`orbify.graph.rules`).
PADDING_MODULES = {cls: fixed_pad for cls in _PAD_MODULES}
PADDING_FUNCTIONS = {F.pad: fixed_pad}


def same_padding_rules() -> dict:
    """Rules for the library's "same" padding helpers (empty when the library is not imported)."""
    return {function: same_padding for function in same_padding_functions()}
