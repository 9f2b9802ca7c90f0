"""Small plain models that a user might hand to orbify, each with one problem (for the robustness tests)."""

import torch
from torch import nn


class Branchy(nn.Module):
    """Data-dependent control flow: cannot be traced symbolically."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3)
        self.fc = nn.Linear(8, 2)

    def forward(self, x):
        y = self.conv(x)
        if y.mean() > 0:
            y = -y
        return self.fc(y.mean((2, 3)))


class Shuffle(nn.Module):
    """A channel shuffle of 12 channels, 3 orbits under c4, in 4 groups: it cannot be made to move whole orbits."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 12, 3, padding=1)
        self.fc = nn.Linear(12, 2)

    def forward(self, x):
        y = self.conv(x)
        b, c, h, w = y.shape
        y = y.view(b, 4, c // 4, h, w).transpose(1, 2).reshape(b, c, h, w)
        return self.fc(y.mean((2, 3)))


class ChannelSplit(nn.Module):
    """Picks single channels by a list of indices (an arbitrary selection of channels)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 16, 3, padding=1)
        self.fc = nn.Linear(3, 2)

    def forward(self, x):
        return self.fc(self.conv(x)[:, [0, 2, 5]].mean((2, 3)))


def small() -> nn.Module:
    return nn.Sequential(nn.Conv2d(3, 16, 3, padding=1), nn.BatchNorm2d(16), nn.ReLU(), nn.AdaptiveAvgPool2d(1),
                         nn.Flatten(), nn.Linear(16, 4))


def branchy() -> nn.Module:
    return Branchy()


def shuffle() -> nn.Module:
    return Shuffle()


def channel_split() -> nn.Module:
    return ChannelSplit()


def not_a_module():
    return torch.zeros(3)
