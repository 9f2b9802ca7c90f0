"""The bundled example's plain vision transformer: the kind of ViT orbify is meant to convert.

The tiles (:mod:`orbify.example.data`) are rendered at :data:`VIT_TILE_SIZE` = 32 pixels, a multiple of the
patch (4), so the patch grid is 8×8 and a quarter turn or a mirror of a tile only permutes its patches. A
patch-embedding conv (kernel = stride = 4), a class token and learned position embeddings, pre-norm blocks of
``torch.nn.MultiheadAttention`` and a GELU MLP, a final LayerNorm and a linear classifier on the class token:
the layout of torchvision's ViT, written small. The width (64) is 8 orbits of d4 and each of the 4 heads is 16
wide, two whole d4 orbits, so every head keeps its channels when the group moves them.
"""

from __future__ import annotations

import torch
from torch import nn

from orbify.example.data import CLASS_NAMES
from orbify.example.model import require_classes

VIT_TILE_SIZE = 32
"""Tile side of the ViT example: a multiple of :data:`VIT_SHAPE` ``patch`` (the example CNN's 33 is not)."""
VIT_SHAPE = {"patch": 4, "width": 64, "heads": 4, "layers": 3, "mlp": 128}
"""Patch side, token width, attention heads, encoder blocks and the hidden width of each block's MLP."""


class EncoderBlock(nn.Module):
    """Pre-norm transformer block on (B, N, width) tokens: x + attention(norm(x)), then x + mlp(norm(x))."""

    def __init__(self, width: int, heads: int, mlp: int):
        super().__init__()
        self.norm1 = nn.LayerNorm(width)
        self.attention = nn.MultiheadAttention(width, heads, batch_first=True)
        self.norm2 = nn.LayerNorm(width)
        self.mlp = nn.Sequential(nn.Linear(width, mlp), nn.GELU(), nn.Linear(mlp, width))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.norm1(x)
        x = x + self.attention(y, y, y, need_weights=False)[0]
        return x + self.mlp(self.norm2(x))


class ExampleViT(nn.Module):
    """Plain ViT for (B, 3, 32, 32) tiles; returns (B, num_classes) logits.

    No data-dependent control flow, so ``torch.fx.symbolic_trace`` sees the whole graph. The position
    embeddings fit the 8×8 patch grid of 32-pixel tiles only.
    """

    def __init__(self, num_classes: int = len(CLASS_NAMES)):
        super().__init__()
        patch, width = VIT_SHAPE["patch"], VIT_SHAPE["width"]
        tokens = 1 + (VIT_TILE_SIZE // patch) ** 2
        self.patches = nn.Conv2d(3, width, kernel_size=patch, stride=patch)
        self.class_token = nn.Parameter(torch.zeros(1, 1, width))
        self.positions = nn.Parameter(torch.empty(1, tokens, width).normal_(std=0.02))
        self.blocks = nn.Sequential(*(EncoderBlock(width, VIT_SHAPE["heads"], VIT_SHAPE["mlp"])
                                      for _ in range(VIT_SHAPE["layers"])))
        self.norm = nn.LayerNorm(width)
        self.classifier = nn.Linear(width, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.patches(x).flatten(2).transpose(1, 2)
        x = torch.cat([self.class_token.expand(x.shape[0], -1, -1), x], dim=1) + self.positions
        return self.classifier(self.norm(self.blocks(x))[:, 0])


def build_example_vit(num_classes: int = len(CLASS_NAMES)) -> ExampleViT:
    """A freshly initialised :class:`ExampleViT` (random weights, training mode).

    Raises :class:`orbify.errors.OptionError` when ``num_classes`` is below 1.
    """
    require_classes(num_classes, "vit_model.build_example_vit", len(CLASS_NAMES))
    return ExampleViT(num_classes)
