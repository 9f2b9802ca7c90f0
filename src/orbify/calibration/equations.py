"""The least-squares refit of one tied conv or linear layer, accumulated batch by batch (docs/design.md §9.2).

A tied layer's full weight is a linear function of its base (:mod:`orbify.symmetry.tying`). Calibration
fits base rows so that chosen output rows reproduce targets taken from the original:

* **orbit outputs**: the base row of orbit o *is* the slot-0 filter (docs/design.md §4), and
  slot s holds the same filter moved by s, ``W[o, s] = base[o][index_s]``. Row (o, s) on the
  input x computes what slot 0 computes on the input moved by s⁻¹, so fitting slot 0 on the
  images *and their transformed copies* is fitting every slot s on the images as given, with
  the features permuted back (``u[:, argsort(index_s)]``) and the target the original's output
  on the copy s⁻¹·x, its pixels moved back by s. Only the converted model's input on the
  images is needed: its Gram matrix is symmetrised over the slots instead of recomputed.
* **plain outputs** (heads, layers after an orbit pool): every output row is fitted; its weight is
  ``J @ base_row`` with the same J for every row, and its output does not change with the
  copy, so all copies share the features ``u J`` and the target is the original averaged over
  the copies (with pixels moved back): the original averaged over the group.

Every position is a sample: a conv's output pixels, and for a linear layer every position of
its input but the feature axis, exactly as a 1×1 conv's pixels: the pixels of a channels-last
map, the tokens of a sequence (their grid moved back by s like pixels,
:mod:`orbify.calibration.positions`).

Per batch only Gram matrices (features × features per conv group), feature sums and
feature-target products are kept; the unfolded input of one batch is the largest temporary.
The solve is ridge least squares in float64, with an intercept when the layer has a bias or
feeds a batch norm that can absorb it. Moving the products into base coordinates (the
permutations and J above) is :mod:`orbify.calibration.coordinates`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn

from orbify.calibration.coordinates import BaseCoordinates, NotRefittable
from orbify.symmetry.groups import Group

#: Largest number of features per output row that is refitted (its Gram matrix: 8192² float64 = 0.5 GB).
MAX_FEATURES = 8192


@dataclass
class Solution:
    """Fitted base rows, intercepts, and the statistics of the fit (per fitted row).

    ``fitted_mean``/``fitted_square`` are the mean and mean square of the fitted output,
    ``target_mean``/``target_square`` those of the target, over every position and copy.
    """

    base: torch.Tensor                  # (rows, base features)
    intercept: torch.Tensor | None      # (rows,)
    error: float                        # unexplained share of the targets' variance
    fitted_mean: torch.Tensor
    fitted_square: torch.Tensor
    target_mean: torch.Tensor
    target_square: torch.Tensor


class LayerEquations:
    """Normal equations of one layer's refit.

    Args:
        module: the tied ``nn.Conv2d`` or ``nn.Linear`` of the converted model.
        group: the conversion's group.
        targets: for every fitted row (orbit o for orbit outputs, output channel for plain
            outputs), the original output channel it must reproduce.
        slots: the slots fitted on the images as given (their copies' targets come from the
            original on s⁻¹·x); ``[0]`` fits the images only.
        intercept: fit a constant per row as well.

    Raises:
        NotRefittable: a transposed conv, more than :data:`MAX_FEATURES` features per row, or a
            tying that cannot be refitted (:class:`~orbify.calibration.coordinates.BaseCoordinates`).
    """

    def __init__(self, module: nn.Module, group: Group, targets: torch.Tensor, slots: list[int], intercept: bool):
        if isinstance(module, nn.ConvTranspose2d):
            raise NotRefittable("transposed convs are not refitted")
        self.module = module
        self.group = group
        self.intercept = intercept
        self.targets = targets.long()
        self.is_conv = isinstance(module, nn.Conv2d)
        self.channel_axis = 1 if self.is_conv else -1   # where the outputs hold their channels
        self.groups = module.groups if self.is_conv else 1
        out_channels = module.out_channels if self.is_conv else module.out_features
        in_channels = module.in_channels if self.is_conv else module.in_features
        kernel = tuple(module.kernel_size) if self.is_conv else ()
        self.features = in_channels // self.groups * math.prod(kernel)
        if self.features + 1 > MAX_FEATURES:
            raise NotRefittable(f"{self.features} features per output exceed the limit of {MAX_FEATURES}")
        self.out_per_group = out_channels // self.groups
        self.coordinates = BaseCoordinates(module, self.features, group.order, slots)
        self.slots = self.coordinates.slots
        rows = self.targets.numel()
        self.row_groups = torch.stack([self._row_group(torch.arange(rows), s) for s in self.slots])  # (slots, rows)
        self.gram: torch.Tensor | None = None
        self.sums = torch.zeros(self.groups, self.features, dtype=torch.float64)
        self.count = 0
        self.cross = torch.zeros(len(self.slots), rows, self.features, dtype=torch.float64)
        self.target_sums = torch.zeros(len(self.slots), rows, dtype=torch.float64)
        self.target_squares = torch.zeros(len(self.slots), rows, dtype=torch.float64)

    def _row_group(self, rows: torch.Tensor, slot: int) -> torch.Tensor:
        """The conv group whose inputs row ``rows`` reads in slot ``slot``."""
        channel = rows * self.group.order + slot if self.coordinates.orbit_out else rows
        return channel // self.out_per_group

    # -- accumulation ---------------------------------------------------------------------------
    def unfold(self, inputs: torch.Tensor) -> torch.Tensor:
        """The features of a batch: (batch, conv groups, features, positions).

        A conv's positions are its output pixels; a linear layer's are every position of its input
        but the last axis, which holds the features (one for (B, C) features; every pixel of a
        channels-last map; every token of a sequence).
        """
        if not self.is_conv:
            return inputs.movedim(-1, 1).reshape(inputs.shape[0], 1, self.features, -1)
        conv = self.module
        mode = "constant" if conv.padding_mode == "zeros" else conv.padding_mode
        padded = F.pad(inputs, conv._reversed_padding_repeated_twice, mode=mode)
        patches = F.unfold(padded, conv.kernel_size, dilation=conv.dilation, stride=conv.stride)
        return patches.reshape(inputs.shape[0], self.groups, self.features, -1)

    def add(self, inputs: torch.Tensor, outputs: dict[int, torch.Tensor]) -> None:
        """Accumulate one batch: the converted input, and per slot the original's aligned output (a conv's
        (B, C, H, W), a linear layer's with its channels last)."""
        u = self.unfold(inputs)
        batch, _, _, positions = u.shape
        samples = u.permute(1, 2, 0, 3).reshape(self.groups, self.features, batch * positions)   # (groups, f, n)
        if self.gram is None:   # in the model's precision: summing a few batches in float32 loses nothing that matters
            self.gram = torch.zeros(self.groups, self.features, self.features, dtype=u.dtype)
        self.gram.baddbmm_(samples, samples.transpose(1, 2))
        self.sums += samples.sum(2).double()
        self.count += batch * positions
        targets = []
        for slot in self.slots:
            output = outputs[slot].to(u.dtype).movedim(self.channel_axis, 1)
            target = output.reshape(batch, output.shape[1], -1)[:, self.targets]
            if target.shape[-1] != positions:
                raise NotRefittable(f"the original's output has {target.shape[-1]} positions, the refit {positions}")
            targets.append(target)
            self.target_sums[len(targets) - 1] += target.sum((0, 2)).double()
            self.target_squares[len(targets) - 1] += target.square().sum((0, 2)).double()
        if self.groups == 1:   # every slot's products in one matrix product
            stacked = torch.cat(targets, 1).permute(1, 0, 2).reshape(-1, batch * positions)
            self.cross += (stacked @ samples[0].T).reshape(self.cross.shape).double()
        else:
            for i, target in enumerate(targets):
                self.cross[i] += self._cross(u, target, self.row_groups[i]).double()

    def _cross(self, u: torch.Tensor, target: torch.Tensor, row_groups: torch.Tensor) -> torch.Tensor:
        """Σ over batch and positions of features × target, per row (rows, features), for grouped convs."""
        order = row_groups.argsort(stable=True)
        used, per_group = row_groups[order].unique_consecutive(return_counts=True)
        out = torch.empty(target.shape[1], self.features, dtype=u.dtype)
        if bool((per_group == per_group[0]).all()):
            arranged = target[:, order].reshape(target.shape[0], used.numel(), int(per_group[0]), -1)
            out[order] = torch.einsum("bjfl,bjml->jmf", u[:, used], arranged).reshape(-1, self.features)
            return out
        for group, rows in zip(used.tolist(), order.split(per_group.tolist())):
            out[rows] = torch.einsum("bfl,brl->rf", u[:, group], target[:, rows])
        return out

    # -- the solve ------------------------------------------------------------------------------
    def solve(self, ridge: float) -> Solution:
        """Ridge least squares per row: (G + λI) b = c with λ = ridge × mean diagonal of G (intercept unpenalised)."""
        if self.count == 0:
            raise NotRefittable("no calibration data reached this layer")
        rows, views = self.targets.numel(), len(self.slots)
        total = self.count * views
        width = self.coordinates.width
        cross = torch.stack([self.coordinates.move(i, self.cross[i]) for i in range(views)]).sum(0)   # (rows, width)
        target_sum, target_square = self.target_sums.sum(0), self.target_squares.sum(0)
        weights = torch.zeros(rows, width, dtype=torch.float64)
        intercept = torch.zeros(rows, dtype=torch.float64)
        fitted_sum = torch.zeros(rows, dtype=torch.float64)
        fitted_square = torch.zeros(rows, dtype=torch.float64)
        unique, which = self.row_groups.T.unique(dim=0, return_inverse=True)
        for k, key in enumerate(unique):
            members = torch.nonzero(which == k).flatten()
            gram, sums = self.coordinates.system(self.gram, self.sums, key)
            rhs = cross[members]
            if self.intercept:   # augment with the constant feature
                gram = torch.cat([torch.cat([gram, sums[:, None]], 1),
                                  torch.cat([sums, torch.tensor([float(total)], dtype=torch.float64)])[None]], 0)
                rhs = torch.cat([rhs, target_sum[members, None]], 1)
            solved = _ridge_solve(gram, rhs.T, ridge, width).T
            weights[members] = solved[:, :width]
            if self.intercept:
                intercept[members] = solved[:, width]
            fitted_square[members] = torch.einsum("ri,ij,rj->r", solved, gram, solved)
            fitted_sum[members] = solved[:, :width] @ sums + intercept[members] * total
        residual = target_square - 2 * ((weights * cross).sum(1) + intercept * target_sum) + fitted_square
        variance = target_square - target_sum.square() / total
        error = float(residual.sum() / variance.sum().clamp_min(1e-30))
        return Solution(weights, intercept if self.intercept else None, error, fitted_sum / total,
                        fitted_square / total, target_sum / total, target_square / total)


def _ridge_solve(gram: torch.Tensor, cross: torch.Tensor, ridge: float, penalised: int) -> torch.Tensor:
    """Solve (G + λ D) b = c, D the identity on the first ``penalised`` coordinates."""
    diagonal = gram.diagonal()[:penalised]
    scale = float(diagonal.mean()) if penalised else 0.0
    penalty = torch.zeros(gram.shape[0], dtype=gram.dtype)
    penalty[:penalised] = ridge * scale if scale > 0 else 1.0
    system = gram + torch.diag(penalty)
    factor, info = torch.linalg.cholesky_ex(system)
    if int(info) == 0:
        return torch.cholesky_solve(cross, factor)
    return torch.linalg.lstsq(system, cross).solution

