"""Shared test helpers: group actions on layouts and relative errors."""

import torch

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
