"""scikit-learn's bundled handwritten digits as a small, offline rotation experiment.

Source: ``sklearn.datasets.load_digits`` — the UCI optical recognition of handwritten digits data,
1,797 images of 8×8 pixels, 10 classes (scikit-learn documentation). It ships with scikit-learn,
so nothing is downloaded. Images are zero-padded to 9×9 (odd, so the 3×3 stride-2 convs of the
small CNN below sample a symmetric grid: (9 + 2 − 3) is even) and scaled to [0, 1].

Under a half turn a handwritten 6 looks like a 9 (common practice, no source): a classifier that
is invariant to c2, c4 or d4 cannot separate them. :data:`SIX_NINE_POLICY` says how experiments
here handle it: the 9s are dropped, leaving nine classes (labels 0–8).
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import nn

SIX_NINE_POLICY = "digit 9 dropped (a half turn makes a 6 a 9), 9 classes remain"
NUM_CLASSES = 9
SIZE = 9


@dataclass
class DigitSplits:
    train_images: torch.Tensor
    train_labels: torch.Tensor
    test_images: torch.Tensor
    test_labels: torch.Tensor


def load_digit_splits(test_fraction: float = 0.3, seed: int = 0) -> DigitSplits:
    """Upright digits (9s dropped), as (N, 1, 9, 9) float tensors in [0, 1], split at random."""
    from sklearn.datasets import load_digits

    data = load_digits()
    keep = data.target != 9
    images = torch.tensor(data.images[keep], dtype=torch.float32) / 16.0
    images = nn.functional.pad(images, (0, 1, 0, 1)).unsqueeze(1)
    labels = torch.tensor(data.target[keep], dtype=torch.long)
    order = torch.randperm(len(labels), generator=torch.Generator().manual_seed(seed))
    cut = int(len(labels) * (1 - test_fraction))
    train, test = order[:cut], order[cut:]
    return DigitSplits(images[train], labels[train], images[test], labels[test])


def build_digits_cnn(width: int = 32, num_classes: int = NUM_CLASSES) -> nn.Sequential:
    """A small plain CNN for 9×9 digits: three conv-bn-relu blocks (the last two strided), pool, linear."""
    return nn.Sequential(
        nn.Conv2d(1, width, 3, padding=1), nn.BatchNorm2d(width), nn.ReLU(),
        nn.Conv2d(width, width, 3, stride=2, padding=1), nn.BatchNorm2d(width), nn.ReLU(),
        nn.Conv2d(width, width, 3, stride=2, padding=1), nn.BatchNorm2d(width), nn.ReLU(),
        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(width, num_classes),
    )


def train_digits_cnn(splits: DigitSplits, *, epochs: int = 30, seed: int = 0, augment_group=None,
                     width: int = 32) -> nn.Module:
    """Train :func:`build_digits_cnn` on the training split (seconds on a CPU); returns it in eval mode.

    With ``augment_group`` (a :class:`~orbify.symmetry.groups.Group`), every batch is moved by a random group
    element (rotation augmentation); without it the model only ever sees upright digits.
    """
    generator = torch.Generator().manual_seed(seed)
    torch.manual_seed(seed)
    model = build_digits_cnn(width)
    optimiser = torch.optim.Adam(model.parameters(), lr=3e-3)
    images, labels = splits.train_images, splits.train_labels
    model.train()
    for _ in range(epochs):
        order = torch.randperm(len(labels), generator=generator)
        for start in range(0, len(order), 64):
            batch = order[start:start + 64]
            x = images[batch]
            if augment_group is not None:
                g = int(torch.randint(augment_group.order, (1,), generator=generator))
                x = augment_group.act_grid(g, x)
            loss = nn.functional.cross_entropy(model(x), labels[batch])
            optimiser.zero_grad()
            loss.backward()
            optimiser.step()
    return model.eval()


@torch.no_grad()
def accuracy(model: nn.Module, images: torch.Tensor, labels: torch.Tensor) -> float:
    return float((model(images).argmax(1) == labels).float().mean())


@torch.no_grad()
def accuracy_every_element(model: nn.Module, group, images: torch.Tensor, labels: torch.Tensor) -> float:
    """Mean accuracy over the test set moved by every element of ``group``."""
    return sum(accuracy(model, group.act_grid(g, images), labels) for g in range(group.order)) / group.order
