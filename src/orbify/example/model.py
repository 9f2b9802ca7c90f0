"""The bundled example's plain CNN: the kind of model orbify is meant to convert.

Four conv-batchnorm-ReLU blocks, three of them stride 2, then global average pooling and a
linear classifier, written in the plain ``features`` / ``pool`` / ``classifier`` style of
common model zoos. Every width is a multiple of 8, so each layer splits into whole orbits
under d4 (8 elements). On 33-pixel tiles every strided conv sees (H + 2*1 - 3) divisible by 2
(33 -> 17 -> 9 -> 5), so quarter turns of the input stay exact through the network.
"""

from __future__ import annotations

import torch
from torch import nn

from orbify.errors import OptionError
from orbify.example.data import CLASS_NAMES

EXAMPLE_WIDTHS: tuple[int, ...] = (16, 32, 64, 64)
"""Output channels of the four conv blocks."""

EXAMPLE_STRIDES: tuple[int, ...] = (1, 2, 2, 2)
"""Stride of each conv block (3x3 kernels, padding 1)."""


def conv_block(in_channels: int, out_channels: int, stride: int) -> nn.Sequential:
    """A 3×3 conv (padding 1, no bias), batch norm and ReLU: the block every example model is made of."""
    return nn.Sequential(
        nn.Conv2d(in_channels, out_channels, kernel_size=3, stride=stride, padding=1, bias=False),
        nn.BatchNorm2d(out_channels),
        nn.ReLU(inplace=True),
    )


class ExampleCNN(nn.Module):
    """Plain CNN for (B, 3, H, W) tiles; returns (B, num_classes) logits.

    No data-dependent control flow, so ``torch.fx.symbolic_trace`` sees the whole graph.
    """

    def __init__(self, num_classes: int = len(CLASS_NAMES)):
        super().__init__()
        blocks = []
        in_channels = 3
        for width, stride in zip(EXAMPLE_WIDTHS, EXAMPLE_STRIDES):
            blocks.append(conv_block(in_channels, width, stride))
            in_channels = width
        self.features = nn.Sequential(*blocks)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.classifier = nn.Linear(in_channels, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.features(x)
        x = self.pool(x)
        x = torch.flatten(x, 1)
        return self.classifier(x)


def build_example_cnn(num_classes: int = len(CLASS_NAMES)) -> ExampleCNN:
    """A freshly initialised :class:`ExampleCNN` (random weights, training mode).

    Raises :class:`orbify.errors.OptionError` when ``num_classes`` is below 1.
    """
    require_classes(num_classes, "model.build_example_cnn", len(CLASS_NAMES))
    return ExampleCNN(num_classes)


def require_classes(num_classes: int, builder: str, usual: int) -> None:
    """Raise :class:`OptionError` naming ``orbify.example.<builder>`` unless ``num_classes`` is a positive integer."""
    if not isinstance(num_classes, int) or num_classes < 1:
        raise OptionError(
            f"num_classes must be a positive integer, got {num_classes!r}",
            where=f"orbify.example.{builder}(num_classes=...)",
            fix=f"pass the number of classes, {usual} for the bundled data",
        )
