"""How the features of a tied layer's output rows map to its base coordinates, slot by slot.

A tied layer's full weight is a linear function of its base (:mod:`orbify.symmetry.tying`), so the
normal equations of a refit, accumulated on the layer's input features, are moved into base
coordinates before they are solved (:mod:`orbify.calibration.equations`):

* **orbit outputs**: row (o, s) of the weight is the slot-0 filter of orbit o moved by s, a
  permutation of the features: per slot, the features are permuted back to slot 0.
* **plain outputs**: every row is ``J @ base_row`` with the same matrix J (features × base).
* **untied layers**: the base is the weight; nothing moves.
"""

from __future__ import annotations

import math

import torch
from torch import nn
from torch.nn.utils import parametrize


class NotRefittable(Exception):
    """Raised for a layer that calibration cannot refit; the message says why."""


class BaseCoordinates:
    """The map from a layer's input features to its base coordinates.

    Args:
        module: the tied (or untied) ``nn.Conv2d`` or ``nn.Linear``.
        features: input features per output row (in channels per conv group × kernel area).
        order: the group's order.
        slots: the slots asked for; ``slots`` keeps those whose filters are permuted, not
            resampled (all of them for plain outputs and untied layers).

    Raises:
        NotRefittable: transposed weights, or a tying whose base is not the slot-0 filter.
    """

    def __init__(self, module: nn.Module, features: int, order: int, slots: list[int]):
        self.tying = module.parametrizations.weight[0] if parametrize.is_parametrized(module, "weight") else None
        self.orbit_out = self.tying is not None and self.tying.out_is_orbit
        self.features = features
        self.order = order
        self.permutations: list[torch.Tensor] | None = None
        self.design: torch.Tensor | None = None
        if self.tying is None:
            self.slots = slots
            return
        if self.tying.transposed:
            raise NotRefittable("transposed weights are not refitted")
        base_shape = module.parametrizations.weight.original.shape
        if self.orbit_out:
            self.slots, self.permutations = self._permutations(base_shape, slots)
        else:
            self.slots, self.design = slots, self._design(base_shape)

    def _permutations(self, base_shape: torch.Size, slots: list[int]) -> tuple[list[int], list[torch.Tensor]]:
        """Orbit outputs: the slots kept and, per slot, the index that permutes its features back to slot 0."""
        count = base_shape[0]
        probe = torch.arange(self.features, dtype=torch.float64).expand(count, -1).reshape(base_shape)
        moved = self.tying(probe).reshape(count, self.order, self.features)[0]
        identity = torch.arange(self.features, dtype=torch.float64)
        if not torch.equal(moved[0], identity):
            raise NotRefittable("the base of this tying is not the slot-0 filter")
        kept = [s for s in slots if torch.equal(moved[s].sort().values, identity)]
        return kept, [moved[s].long().argsort() for s in kept]

    def _design(self, base_shape: torch.Size) -> torch.Tensor:
        """Plain outputs: the matrix J (features × base) of ``row = J base``, probed a block of columns at a time."""
        count, width = base_shape[0], math.prod(tuple(base_shape[1:]))
        design = torch.zeros(self.features, width, dtype=torch.float64)
        for start in range(0, width, count):
            columns = torch.arange(start, min(start + count, width))
            probe = torch.zeros(count, width, dtype=torch.float64)
            probe[torch.arange(columns.numel()), columns] = 1.0
            full = self.tying(probe.reshape(base_shape)).reshape(count, self.features)
            design[:, columns] = full[:columns.numel()].T
        return design

    @property
    def width(self) -> int:
        """Base coordinates per row."""
        return self.features if self.design is None else self.design.shape[1]

    def move(self, view: int, cross: torch.Tensor) -> torch.Tensor:
        """Feature-side products (rows, features) of the ``view``-th kept slot in base coordinates."""
        if self.design is not None:
            return cross @ self.design
        if self.permutations is not None:
            return cross[:, self.permutations[view]]
        return cross

    def system(self, gram: torch.Tensor, sums: torch.Tensor, key: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Gram matrix and feature sums in base coordinates, summed over the slots, of rows reading conv groups ``key``.

        ``gram`` (conv groups, features, features) and ``sums`` (conv groups, features) are the
        accumulated statistics; ``key`` holds the conv group a row reads in each kept slot.
        """
        total_gram, total_sums = 0, 0
        for view, group in enumerate(key.tolist()):
            g, s = gram[group], sums[group]
            if self.design is not None:
                g = self.design.T @ g.double() @ self.design
                s = s @ self.design
            elif self.permutations is not None:
                index = self.permutations[view]
                g, s = g.index_select(0, index).index_select(1, index), s[index]
            total_gram, total_sums = total_gram + g, total_sums + s
        return total_gram.double(), total_sums
