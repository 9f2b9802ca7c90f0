"""Shared test helpers: group actions on layouts, relative errors, and references written independently of orbify
(the stride rule for safe input sizes, parameter counts from layer shapes)."""

from __future__ import annotations

import torch
from torch import nn

from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout, act


def relative_error(a: torch.Tensor, b: torch.Tensor) -> float:
    return float((a - b).norm() / b.norm().clamp_min(1e-30))


def max_equivariance_error(module, group: Group, x: torch.Tensor, in_layout: Layout, out_layout: Layout) -> float:
    """max over g of ‖f(g·x) − g·f(x)‖ / ‖f(x)‖."""
    with torch.no_grad():
        y = module(x)
        return max(relative_error(module(act(group, in_layout, g, x)), act(group, out_layout, g, y))
                   for g in range(group.order))


# -- safe input sizes, from the stride rule --------------------------------------------------------------------------
STRIDED = (nn.Conv2d, nn.MaxPool2d, nn.AvgPool2d)


def strided_inputs(model: nn.Module, size: int, channels: int = 3) -> list[tuple[int, bool]] | None:
    """For every strided conv or pool module that runs on a ``size``×``size`` input: the side it sees and whether
    the stride rule holds there, in the order they run; None when the model does not run at that size.

    The rule (common practice for strided sampling grids, docs/design.md §6): a conv or pool with kernel k,
    dilation d, stride s and padding p keeps its grid under quarter turns and mirrors iff (H + 2·p − d·(k − 1) − 1)
    is divisible by s, on both axes. Read off the modules by forward hooks on the model's own definition, with
    nothing from orbify; the model runs on the meta device (shapes only) when its parameters are there.
    """
    seen = []

    def pair(value):
        return value if isinstance(value, tuple) else (value, value)

    def hook(module, inputs, _):
        kernel, stride, padding = pair(module.kernel_size), pair(module.stride), pair(module.padding)
        dilation = pair(getattr(module, "dilation", 1))
        if max(stride) > 1:
            sides = inputs[0].shape[-2:]
            seen.append((min(sides), all((h + 2 * p - d * (k - 1) - 1) % s == 0
                                         for h, k, s, p, d in zip(sides, kernel, stride, padding, dilation))))

    handles = [m.register_forward_hook(hook) for m in model.modules() if isinstance(m, STRIDED)]
    device = next((parameter.device for parameter in model.parameters()), torch.device("cpu"))
    try:
        with torch.no_grad():
            model(torch.zeros(1, channels, size, size, device=device))
    except RuntimeError:       # too small for some kernel or pool
        return None
    finally:
        for handle in handles:
            handle.remove()
    return seen


def stride_rule_holds(model: nn.Module, size: int, channels: int = 3) -> bool:
    """The model runs at ``size`` and every strided conv/pool satisfies the stride rule (see ``strided_inputs``)."""
    seen = strided_inputs(model, size, channels)
    return seen is not None and all(ok for _, ok in seen)


def smallest_safe_size(model: nn.Module, start: int, stop: int, channels: int = 3) -> int | None:
    """The smallest size in [start, stop] at which the stride rule holds and every strided op sees at least 2
    pixels (below that the input is a point, which every rotation fixes, and invariance proves nothing)."""
    for size in range(start, stop + 1):
        seen = strided_inputs(model, size, channels)
        if seen is not None and all(ok and side >= 2 for side, ok in seen):
            return size
    return None


# -- parameter counts from layer shapes ------------------------------------------------------------------------------
EXAMPLE_WIDTHS = (3, 16, 32, 64, 64)
"""The bundled example CNN, read off src/orbify/example/model.py: 3×3 convs without bias between these channel
counts, a batch norm after each, global average pooling and a linear layer 64 → 6 classes."""
EXAMPLE_CLASSES = 6
EXAMPLE_KERNEL = 3


def example_params(group_order: int = 1) -> int:
    """Stored parameters of the example CNN, plain (``group_order`` 1) or converted under the channels budget to a
    group of that order, from the layer shapes and the budget formula of docs/design.md §4 and §7.

    Channels budget: every width C stays and holds C/n orbits. A tied weight stores one number per orbit of index
    tuples (output channel, input channel, kernel offset); the group moves the orbit slots of the output freely,
    so a conv stores C_out·C_in·k²/n (the lifting conv from the plain image and the orbit→orbit convs alike).
    A batch norm stores one weight and one bias per orbit (2·C/n), and the invariant head, a linear layer on
    pooled orbits, one weight per input orbit and class plus the biases.
    """
    n = group_order
    convs = sum(c_out * c_in * EXAMPLE_KERNEL ** 2 // n for c_in, c_out in zip(EXAMPLE_WIDTHS, EXAMPLE_WIDTHS[1:]))
    norms = sum(2 * c // n for c in EXAMPLE_WIDTHS[1:])
    head = EXAMPLE_WIDTHS[-1] // n * EXAMPLE_CLASSES + EXAMPLE_CLASSES
    return convs + norms + head
