"""A small vision transformer written out for the tests: pre-norm blocks of ``nn.MultiheadAttention`` over patch-4
tokens with a class token."""

from __future__ import annotations

import torch
from torch import nn


class Block(nn.Module):
    def __init__(self, width: int, heads: int):
        super().__init__()
        self.norm1, self.norm2 = nn.LayerNorm(width), nn.LayerNorm(width)
        self.attention = nn.MultiheadAttention(width, heads, batch_first=True)
        self.mlp = nn.Sequential(nn.Linear(width, 2 * width), nn.GELU(), nn.Linear(2 * width, width))

    def forward(self, x):
        y = self.norm1(x)
        x = x + self.attention(y, y, y, need_weights=False)[0]
        return x + self.mlp(self.norm2(x))


class TinyViT(nn.Module):
    """Patch 4, two blocks, a class token and learned position embeddings (flatten(2).transpose(1, 2) to tokens),
    the class token's features classified; position embeddings drawn with standard deviation ``position_scale``."""

    def __init__(self, width: int = 32, heads: int = 2, size: int = 16, classes: int = 5, position_scale: float = 1.0):
        super().__init__()
        self.patches = nn.Conv2d(3, width, 4, stride=4)
        self.class_token = nn.Parameter(torch.randn(1, 1, width))
        self.positions = nn.Parameter(position_scale * torch.randn(1, 1 + (size // 4) ** 2, width))
        self.blocks = nn.Sequential(Block(width, heads), Block(width, heads))
        self.norm = nn.LayerNorm(width)
        self.head = nn.Linear(width, classes)

    def forward(self, x):
        x = self.patches(x).flatten(2).transpose(1, 2)
        x = torch.cat([self.class_token.expand(x.shape[0], -1, -1), x], dim=1) + self.positions
        return self.head(self.norm(self.blocks(x))[:, 0])
