"""Weight-standardized convs: timm's ``StdConv2d`` and ``ScaledStdConv2d`` and their "same" forms.

Such a conv standardizes every output filter before convolving: it subtracts the filter's mean and divides by
its standard deviation, both over the filter's input channels and kernel taps, and the scaled form then
multiplies filter c by ``gain[c]·scale`` (``scale`` = gamma/√fan-in). Under the tying the filters of one orbit
are copies of each other turned (and mirrored) by the group, their input channels permuted along: the same
numbers in other places, so with the same mean and variance. Standardizing a tied weight therefore leaves it
tied, and the module stays equivariant when it standardizes the tied weight in its own forward.

So each such conv is traced as a whole (:func:`is_standardized_conv`) and converted by the conv rule (it
subclasses ``nn.Conv2d``) into a new module of its own class (:func:`constructor_arguments`) whose stored weight is
tied: the weights carried are the ones the module stores (orbit-averaged, then standardized by the module as in the
original). The scaled form's ``gain`` is tied per orbit and carried by output channel (:func:`tie_gain`,
:func:`load_gain`), and its ``scale`` follows the new fan-in with gamma kept (equal to the original's when the
width is kept). A 'same' form whose padding depends on the input size (timm's dynamic ``same_pad``) keeps it;
the input sizes at which that padding is symmetric, and so exact, are judged by :mod:`orbify.graph.sizes`.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import torch
from torch import nn
from torch.nn.utils import parametrize

from orbify.layers.tied import tie_channel_tensor
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout, Orbit

if TYPE_CHECKING:
    from orbify.graph.rules import Step

_STANDARDIZED = {("timm.layers.std_conv", name)
                 for name in ("StdConv2d", "StdConv2dSame", "ScaledStdConv2d", "ScaledStdConv2dSame")}


def is_standardized_conv(module: nn.Module) -> bool:
    """True for one of timm's weight-standardized convs (or a subclass), recognised without importing timm."""
    return any((cls.__module__, cls.__name__) in _STANDARDIZED for cls in type(module).__mro__)


def constructor_arguments(old: nn.Module, arguments: dict) -> dict:
    """``arguments`` (the keywords building a plain conv like ``old``) as ``old``'s class takes them: a
    standardized conv takes its ``eps`` and no padding mode (it always pads with zeros), and one that pads "same"
    by the input's size (timm's dynamic ``same_pad``) is asked for that padding again."""
    if not is_standardized_conv(old):
        return arguments
    kept = {name: value for name, value in arguments.items() if name != "padding_mode"}
    if getattr(old, "same_pad", False):
        kept["padding"] = "same"
    return {**kept, "eps": old.eps}


def adopt_standardization(step: Step, old: nn.Module, new: nn.Module, group: Group, layouts: tuple[Layout, Layout],
                          init: str) -> list[str]:
    """Finish ``new``, the converted counterpart of the standardized conv ``old`` from ``layouts`` (in, out); returns
    notes for the plan.

    The scaled form's ``scale`` is gamma/√(new fan-in) with ``old``'s gamma, and its ``gain`` is tied per orbit of
    the output layout. Refuses the calibrated initialisation (its refit solves for the weight a plain conv applies,
    which this module would standardize again) and the embedding on orbit inputs (the embedded filters are zero on
    all input slots but the first, and standardizing them counts those zeros: the converted model would no longer
    equal the original averaged over the group).
    """
    if not is_standardized_conv(old):
        return []
    name = type(old).__name__
    if init == "calibrated":
        raise step.refuse(f"Calibration does not refit a weight-standardized conv ({name}) yet",
                          "convert with init='orbit-average' (--init orbit-average) and tune, or convert only up "
                          "to the node before it")
    if init == "embed" and isinstance(layouts[0], Orbit):
        raise step.refuse(f"The 'embed' initialisation cannot reproduce a weight-standardized conv ({name}) reading "
                          "orbit channels: its embedded filters are zero on every input slot but the first, and the "
                          "standardization counts those zeros",
                          "convert with init='orbit-average' (--init orbit-average), or convert only up to the node "
                          "before it")
    if not has_gain(old):
        return []
    old_fan_in, new_fan_in = _fan_in(old), _fan_in(new)
    new.scale = old.scale * math.sqrt(old_fan_in / new_fan_in)
    tie_gain(new, group, layouts[1])
    if old_fan_in == new_fan_in:
        return []
    return [f"weight-standardized conv: scale {old.scale:.4g} → {new.scale:.4g} for the fan-in {old_fan_in} → "
            f"{new_fan_in} (gamma kept)"]


def _fan_in(conv: nn.Module) -> int:
    """The number of weights in one output filter of ``conv``."""
    return conv.in_channels // conv.groups * math.prod(conv.kernel_size)


def has_gain(module: nn.Module) -> bool:
    """True for a scaled weight-standardized conv (one with a per-output-channel ``gain``)."""
    return is_standardized_conv(module) and isinstance(getattr(module, "gain", None), nn.Parameter)


def tie_gain(conv: nn.Module, group: Group, layout: Layout) -> None:
    """Tie ``conv.gain`` (out, 1, 1, 1) per orbit of its output ``layout`` (left as it is on plain outputs)."""
    if isinstance(layout, Orbit):
        tie_channel_tensor(conv, "gain", conv.gain.detach(), group, layout)


@torch.no_grad()
def load_gain(new: nn.Module, old: nn.Module, source: torch.Tensor) -> None:
    """Give ``new`` the gain of ``old``'s output channels ``source`` (tied: their orbit average); 1 where ``source``
    is −1 (a channel standing for no original one). Nothing for a conv without gain."""
    if not has_gain(old):
        return
    gain = old.gain.detach()
    picked = gain[source.clamp_min(0)]
    value = torch.where((source >= 0).reshape(-1, 1, 1, 1), picked, torch.ones_like(picked))
    if parametrize.is_parametrized(new, "gain"):
        new.gain = value   # stores the orbit average
    else:
        new.gain.copy_(value)
