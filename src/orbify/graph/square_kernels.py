"""Convs whose kernel differs between the axes (1×7, 7×1, 1×5, ...), grown to a square kernel (docs/design.md §5).

A quarter turn swaps the two axes, so it turns a 1×7 kernel into a 7×1 one: no tying of a 1×7 weight can be
equivariant to it. But a k×1 (or 1×k, or a×b) kernel whose padding centres it on each axis (padding =
dilation·(k − 1)/2 per axis), with equal stride and dilation on both axes, computes exactly what a square
s×s kernel (s = max(a, b)) computes that holds the original's taps in its middle rows and columns, is zero
elsewhere, and is padded by dilation·(s − 1)/2 on both axes: every output pixel reads the same input pixels
through the same weights (the centred padding keeps the output size), and the extra taps read zero weights.
The converted model gets that square kernel (:class:`SquareKernel`); the tying then averages it with its turns
as it averages any square kernel (a bar averaged with its quarter turn becomes a plus). The original model is
never changed. The layer then costs s²/(a·b) times the multiply-accumulates and weights of an a×b kernel of its
widths, which the plan notes on the layer (the tied weight is free on the whole square: tuning may use every tap).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import torch
import torch.nn.functional as F
from torch import nn

from orbify.symmetry.groups import Group

if TYPE_CHECKING:
    from orbify.graph.rules import Step

_SWAP_FIX = "convert under a group without quarter turns (c2 or d2), or {up_to}"


@dataclass(frozen=True)
class SquareKernel:
    """The square ``side``×``side`` kernel an ``original`` (rows, columns) kernel grows to, padded by ``padding``."""

    original: tuple[int, int]
    side: int
    padding: tuple[int, int] | str

    @property
    def kernel_size(self) -> tuple[int, int]:
        return (self.side, self.side)

    @property
    def mac_factor(self) -> float:
        """How many times the original's multiply-accumulates the grown layer costs."""
        return self.side * self.side / (self.original[0] * self.original[1])

    @property
    def note(self) -> str:
        """The note the plan keeps on the layer."""
        rows, columns = self.original
        return (f"kernel grown from {rows}×{columns} to {self.side}×{self.side} (zero outside the original's rows and "
                f"columns, so a quarter turn can be tied): this layer's MACs and weights ×{self.mac_factor:g} against "
                f"a {rows}×{columns} kernel")

    def embed(self, weight: torch.Tensor) -> torch.Tensor:
        """``weight`` (any leading axes, the original kernel last) in the middle of the square kernel, zero around."""
        return centred_in(weight, self.kernel_size)


def centred_in(weight: torch.Tensor, kernel_size: tuple[int, int]) -> torch.Tensor:
    """``weight`` (its kernel on the last two axes) in the middle of a ``kernel_size`` kernel, zero around: a layer's
    original weight in the terms of its converted layer when its kernel grew to a square (else ``weight`` itself)."""
    rows, columns = (size - original for size, original in zip(kernel_size, weight.shape[-2:]))
    if rows == columns == 0:
        return weight
    return F.pad(weight, (columns // 2, columns // 2, rows // 2, rows // 2))


def square_kernel(step: Step, conv: nn.Module, group: Group, up_to: str) -> SquareKernel | None:
    """The square kernel ``conv`` grows to under ``group``, or None when its kernel is kept as it is.

    Kept: under a group without quarter turns (c2, d2: a half turn and the mirror keep each axis), and for a
    kernel that is square with equal padding. Refused (``step.refuse``, ``up_to`` the usual way out) under
    quarter turns: strides, dilations or output paddings that differ between the axes, a padding that does not
    centre the kernel on each axis, padding other than zeros, and subclasses of the torch convs (their own
    forward may use the weight in ways the added zero taps change, as weight standardization does).
    """
    if not _swaps_axes(group):
        return None
    kernel, padding = tuple(conv.kernel_size), conv.padding
    unequal = {name: value for name in ("stride", "dilation", "output_padding")
               if len(set(value := tuple(getattr(conv, name, (0, 0))))) > 1}
    if unequal:
        described = ", ".join(f"{name} {value}" for name, value in unequal.items())
        raise step.refuse(f"A conv with {described} differs between the axes, which a quarter turn swaps",
                          _SWAP_FIX.format(up_to=up_to))
    if len(set(kernel)) == 1 and (isinstance(padding, str) or len(set(padding)) == 1):
        return None
    dilation = conv.dilation[0]
    side = max(kernel)
    centred = padding == "same" or (not isinstance(padding, str)
                                    and all(2 * p == dilation * (k - 1) for p, k in zip(padding, kernel)))
    if not centred or any(dilation * (k - 1) % 2 or (side - k) % 2 for k in kernel):
        raise step.refuse(f"A conv with kernel_size {kernel}, padding {padding} is not centred on each axis, so no "
                          "square kernel computes what it computes, and a quarter turn swaps the axes",
                          "pad it by dilation·(k − 1)/2 on each axis (a centred kernel grows to a square one), or "
                          + _SWAP_FIX.format(up_to=up_to))
    if type(conv) not in (nn.Conv2d, nn.ConvTranspose2d) or conv.padding_mode != "zeros":
        raise step.refuse(f"A {type(conv).__name__} with kernel_size {kernel} and padding mode "
                          f"'{conv.padding_mode}' differs between the axes; only a plain torch conv padded with "
                          "zeros grows to a square kernel computing the same", _SWAP_FIX.format(up_to=up_to))
    square_padding = padding if isinstance(padding, str) else (dilation * (side - 1) // 2,) * 2
    return SquareKernel(kernel, side, square_padding)


def _swaps_axes(group: Group) -> bool:
    """True when some element of ``group`` swaps the two axes (an odd number of quarter turns, or a finer turn)."""
    return not group.exact or any(group.quarter_turns(g) % 2 for g in range(group.order))
