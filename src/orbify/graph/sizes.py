"""Safe input sizes: where every strided op samples a grid that the rotations map onto itself.

A strided conv or pool commutes with 90° rotations exactly when ``H + 2·padding − dilation·(k−1) − 1``
is divisible by the stride, in both spatial axes (design.md section 6). A transposed conv is
symmetric when it has no output padding. Shapes are propagated on the ``meta`` device, so checking
a size costs no arithmetic.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import fx, nn

from orbify.errors import InputShapeError

from orbify.graph.tracing import describe, input_error, trace


@dataclass(frozen=True)
class StrideViolation:
    """One strided op whose sampling grid is not symmetric at the checked input size."""

    node: str
    where: str
    size: tuple[int, int]
    kernel: tuple[int, int]
    stride: tuple[int, int]
    padding: tuple[int, int]

    def __str__(self) -> str:
        return (f"{self.where}: input {self.size[0]}×{self.size[1]}, kernel {self.kernel}, stride {self.stride}, "
                f"padding {self.padding} — (H + 2·padding − kernel) is not divisible by the stride")


def _pair(v) -> tuple[int, int]:
    return (v, v) if isinstance(v, int) else tuple(v)


def _geometry(node: fx.Node, module: nn.Module | None) -> tuple | None:
    """(kernel, stride, padding, dilation) of a strided op node, or None when it is not one."""
    if isinstance(module, (nn.Conv2d, nn.MaxPool2d, nn.AvgPool2d)):
        dilation = getattr(module, "dilation", 1)
        return _pair(module.kernel_size), _pair(module.stride), _pair(module.padding), _pair(dilation)
    if node.op == "call_function" and node.target in (F.max_pool2d, F.avg_pool2d):
        args = list(node.args) + [None] * 4
        kernel = node.kwargs.get("kernel_size", args[1])
        stride = node.kwargs.get("stride", args[2]) or kernel
        padding = node.kwargs.get("padding", args[3] if args[3] is not None else 0)
        return _pair(kernel), _pair(stride), _pair(padding), (1, 1)
    return None


_SHAPE_KEEPING = (nn.modules.batchnorm._BatchNorm, nn.ReLU, nn.ReLU6, nn.SiLU, nn.GELU, nn.Hardswish,
                  nn.Hardsigmoid, nn.Sigmoid, nn.Dropout, nn.Identity)


class _FirstViolation(Exception):
    """Stops a check at the first violation when only safety is asked."""


class _Checker(fx.Interpreter):
    def __init__(self, gm: fx.GraphModule, first_only: bool = False):
        super().__init__(gm)
        self.violations: list[StrideViolation] = []
        self.first_only = first_only
        self.extra_traceback = not first_only

    def run_node(self, node: fx.Node):
        module = self.module.get_submodule(node.target) if node.op == "call_module" else None
        if isinstance(module, _SHAPE_KEEPING):
            return self.env[node.all_input_nodes[0]]   # shapes are all that matter here
        geometry = _geometry(node, module)
        if geometry is not None:
            x = self.env[node.all_input_nodes[0]] if node.all_input_nodes[0] in self.env else None
            if x is not None:
                self._check(node, tuple(x.shape[-2:]), *geometry)
        if isinstance(module, nn.ConvTranspose2d) and any(_pair(module.output_padding)):
            x = self.env[node.all_input_nodes[0]]
            self._add(StrideViolation(node.name, describe(node), tuple(x.shape[-2:]), _pair(module.kernel_size),
                                      _pair(module.stride), _pair(module.padding)))
        return super().run_node(node)

    def _check(self, node, size, kernel, stride, padding, dilation) -> None:
        if all(s == 1 for s in stride):
            return
        for h, k, s, p, d in zip(size, kernel, stride, padding, dilation):
            if (h + 2 * p - d * (k - 1) - 1) % s:
                self._add(StrideViolation(node.name, describe(node), size, kernel, stride, padding))
                return

    def _add(self, violation: StrideViolation) -> None:
        self.violations.append(violation)
        if self.first_only:
            raise _FirstViolation


class SizeChecker:
    """Checks input sizes of one model; trace once, check many sizes."""

    def __init__(self, model: nn.Module, channels: int = 3):
        gm = model if isinstance(model, fx.GraphModule) else trace(model)
        self.gm = copy.deepcopy(gm).to("meta").eval()
        self.channels = channels

    def violations(self, size: int | tuple[int, int], first_only: bool = False) -> list[StrideViolation]:
        """Strided ops that break equivariance at this input size (empty when the size is safe)."""
        h, w = _pair(size)
        checker = _Checker(self.gm, first_only)
        shape = (1, self.channels, h, w)
        try:
            with torch.no_grad():
                checker.run(torch.empty(shape, device="meta"))
        except _FirstViolation:
            pass
        except Exception as error:
            raise input_error(self.gm, shape, error) from error
        return checker.violations

    def is_safe(self, size: int | tuple[int, int]) -> bool:
        try:
            return not self.violations(size, first_only=True)
        except InputShapeError:
            return False   # the model does not run at this size at all

    def safe_sizes(self, near: int, count: int = 5, span: int = 128) -> list[int]:
        """Up to ``count`` safe square sizes nearest to ``near`` (ties: the smaller first)."""
        found: list[int] = []
        for size in sorted(range(max(near // 2, 8, near - span), near + span + 1), key=lambda s: (abs(s - near), s)):
            if self.is_safe(size):
                found.append(size)
                if len(found) == count:
                    break
        return found


def safe_sizes(model: nn.Module, near: int, count: int = 5, channels: int = 3) -> list[int]:
    """Square input sizes near ``near`` at which every strided op of ``model`` is exact."""
    return SizeChecker(model, channels).safe_sizes(near, count)
