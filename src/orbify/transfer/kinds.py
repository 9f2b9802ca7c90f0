"""Which modules carry pretrained weights into a converted model, and how their channels behave.

Convs, transposed convs and linear layers carry weights (:data:`LAYER_TYPES`); most of them
choose their output channels (:func:`chooses_channels`), but a depthwise conv's output channels
follow its input channels (:func:`is_depthwise`).
"""

from __future__ import annotations

from torch import nn

#: The module types whose weights are carried over, tied and refitted.
LAYER_TYPES = (nn.Conv2d, nn.ConvTranspose2d, nn.Linear)


def is_depthwise(module: nn.Module) -> bool:
    """A conv with one channel per group on both sides: its output channels follow its input channels."""
    return isinstance(module, (nn.Conv2d, nn.ConvTranspose2d)) and \
        module.groups > 1 and module.groups == module.in_channels == module.out_channels


def chooses_channels(module: nn.Module | None) -> bool:
    """True for layers whose output channels the conversion assigns (conv and linear, not depthwise)."""
    return isinstance(module, LAYER_TYPES) and not is_depthwise(module)
