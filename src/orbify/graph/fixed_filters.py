"""Fixed filters: blur pools (docs/design.md §5, §6).

Anti-aliased networks downsample with a *blur pool*: the map is padded on every side
(``F.pad(x, [p, p, p, p], mode="reflect")``) and filtered by ``F.conv2d(x, filt, stride=2,
groups=C)`` with a binomial filter ``filt`` that the model holds as a buffer and never learns. Such a
call is not made into a layer (:mod:`orbify.graph.functional_layers` leaves calls on buffers alone):
nothing is tied or carried, and :func:`fixed_filter` only checks that the filter already commutes
with the group, so the op keeps its input's layout unchanged. On orbit channels the filter must be
the same on every channel (a group element permutes the slots of an orbit, and which original
channel each converted channel holds is the conversion's choice) and unchanged by every quarter
turn and mirror of the group; on plain channels each channel's filter must be. A binomial filter
(an outer product of one symmetric row with itself) passes under d4; a filter that differs between
channels of orbits, is not symmetric, mixes channels (not depthwise) or holds another number of
channels than the converted value (a budget that changes the width) is refused. Under an
approximate group (c8, ...) only its quarter turns and mirrors are checked, as everywhere else.

The padding before the filter is :mod:`orbify.graph.padding`'s concern, and whether the stride samples a
symmetric grid the safe input size's (:mod:`orbify.graph.sizes`).

The rules here are registered in :mod:`orbify.graph.rules` (:data:`FIXED_FILTER_FUNCTIONS`); this module does not
import it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import torch
import torch.nn.functional as F
from torch import fx

from orbify.graph.tracing import shape
from orbify.symmetry.layouts import Layout, Orbit, Plain

if TYPE_CHECKING:
    from orbify.graph.rules import Step

_CONV_ARGUMENTS = ("input", "weight", "bias", "stride", "padding", "dilation", "groups")
_STOP = "convert only up to the node before it (--stop-at)"


def fixed_filter(step: Step) -> Layout | None:
    """``F.conv2d(x, filt, ...)`` with a depthwise filter held as a model buffer: checked against the group, layout
    kept (see the module docstring)."""
    arguments = dict(zip(_CONV_ARGUMENTS, step.node.args))
    arguments.update(step.node.kwargs)
    layout, group = step.layout, step.ctx.group
    if not isinstance(layout, (Plain, Orbit)):
        raise step.refuse(f"A functional conv2d on a {layout} value", f"filter channels-first maps, or {_STOP}")
    weight = _fixed_tensor(step, arguments["weight"])
    bias = _fixed_tensor(step, arguments["bias"]) if isinstance(arguments.get("bias"), fx.Node) else None
    name, channels, groups = arguments["weight"].name, layout.size(group), arguments.get("groups", 1)
    if weight.shape[1] != 1 or groups != weight.shape[0]:
        raise step.refuse(f"The fixed filter '{name}' of shape {tuple(weight.shape)} in {groups} groups mixes "
                          "channels", "filter each channel by itself (groups = channels), or make the filter a "
                          f"layer's parameter (nn.Conv2d), or {_STOP}")
    if weight.shape[0] != channels:
        raise step.refuse(f"The fixed filter '{name}' holds {weight.shape[0]} channels where the converted value "
                          f"has {channels}", f"keep the width (the 'channels' budget), or {_STOP}")
    if isinstance(layout, Orbit) and not _shared(weight, bias):
        raise step.refuse(f"The fixed filter '{name}' differs between channels, and the conversion chooses which "
                          "original channel each converted channel holds", f"use one filter for every channel, or "
                          f"{_STOP}")
    moved = [g for g in range(group.order) if group.acts_exactly(g) and not _same(group.act_grid(g, weight), weight)]
    if moved:
        raise step.refuse(f"The fixed filter '{name}' does not commute with the group element(s) {moved}, which move "
                          "it", "use a filter symmetric under the group's quarter turns and mirrors (a binomial blur "
                          f"is), or {_STOP}")
    return layout


def _fixed_tensor(step: Step, node: object) -> torch.Tensor:
    """The model buffer behind ``node``, a ``get_attr`` or one expanded (``filt.expand(C, 1, k, k)``); refused for
    a parameter (learned, so a layer the conversion ties) or a computed tensor."""
    expanded = isinstance(node, fx.Node) and node.op == "call_method" and node.target == "expand"
    source = node.args[0] if expanded else node
    gm = step.node.graph.owning_module
    if not isinstance(source, fx.Node) or source.op != "get_attr" or source.target in dict(gm.named_parameters()):
        raise step.refuse("A functional conv2d whose filter is not a fixed model buffer (a parameter or a computed "
                          "tensor): no rule ties it", f"write the layer as nn.Conv2d, or {_STOP}")
    tensor = gm.get_buffer(source.target).detach()
    return tensor.expand(shape(node)) if expanded else tensor


def _shared(weight: torch.Tensor, bias: torch.Tensor | None) -> bool:
    """True when every channel has the same filter (and bias)."""
    return _same(weight, weight[:1].expand_as(weight)) and (bias is None or _same(bias, bias[:1].expand_as(bias)))


def _same(a: torch.Tensor, b: torch.Tensor) -> bool:
    """Equal up to float rounding of the larger entries."""
    return torch.allclose(a, b, rtol=0.0, atol=1e-6 * (float(b.abs().max()) or 1.0))


FIXED_FILTER_FUNCTIONS = {F.conv2d: fixed_filter}
"""Function rules of this module, added to :data:`orbify.graph.rules.FUNCTION_RULES`."""
