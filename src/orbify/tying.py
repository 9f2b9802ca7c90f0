"""Tying a weight between two layouts: expand, project and the weight residual (design.md section 4).

A linear map with weight W (axes: out, in-fibre, kernel...) commutes with the group exactly when
``W[g·o, g·i, g·y] = W[o, i, y]`` for every g. The *in-fibre* of an output channel is the block
``W[o]`` of shape (fibre channels, *kernel); each element g permutes it by an index
``fibre_index[g]`` with ``(g·w).flatten() = w.flatten()[fibre_index[g]]``. Two output layouts cover
every layer:

* **orbit out**: every orbit of weight indices meets slot 0 of the output exactly once, so the
  base is ``W[:, slot 0]`` (f_out, *fibre) and ``W[o, s] = s·base[o]``: one gather.
* **plain out**: every ``W[o]`` must be invariant; the base holds one value per orbit of
  fibre indices, and expanding is a gather by orbit id.

Projection Π is the least-squares nearest tied weight (the orbit average); it is the
parametrization's ``right_inverse``, so assigning a pretrained weight stores its orbit average.
Index tensors are kept per in-fibre (|G|·fibre entries), never one per weight element.
"""

from __future__ import annotations

import torch
from torch import nn

from .groups import Group
from .layouts import Layout, Orbit, Plain


def fibre_index(group: Group, fibre: Layout, kernel: tuple[int, ...]) -> torch.Tensor:
    """Index (|G|, F) of the action on one in-fibre of shape (fibre channels, *kernel).

    The fibre channels move by ``fibre.permutation``; a 2-D kernel moves like pixels.
    """
    channels = fibre.size(group)
    index = torch.arange(channels * _prod(kernel)).view(channels, *kernel)
    perm = fibre.permutation(group)
    rows = []
    for g in range(group.order):
        moved = index[perm[g]]
        if len(kernel) == 2:
            moved = group.act_grid(g, moved)
        elif kernel:
            raise ValueError(f"only 2-D kernels are tied, got kernel {kernel}")
        rows.append(moved.flatten())
    return torch.stack(rows)


def _prod(shape: tuple[int, ...]) -> int:
    out = 1
    for s in shape:
        out *= s
    return out


class TiedWeight(nn.Module):
    """Parametrization: base weight → full tied weight; ``right_inverse`` is the projection Π.

    ``out`` is the output layout (:class:`Orbit` or :class:`Plain`); ``fibre`` the layout of the
    weight's second axis (per conv group); ``kernel`` the spatial kernel (empty for Linear).
    ``transposed`` marks ConvTranspose weights, stored (in, out, *kernel).
    """

    def __init__(self, group: Group, out: Layout, fibre: Layout, kernel: tuple[int, ...] = (),
                 transposed: bool = False):
        super().__init__()
        group._require_exact("Tying by index")
        self.order = group.order
        self.out_count = out.orbits if isinstance(out, Orbit) else out.channels
        self.out_is_orbit = isinstance(out, Orbit)
        self.fibre_shape = (fibre.size(group), *kernel)
        self.transposed = transposed
        index = fibre_index(group, fibre, tuple(kernel))
        if self.out_is_orbit:
            self.register_buffer("index", index.flatten(), persistent=False)
            self.register_buffer("inverse_index", index[group.inverses], persistent=False)
        else:
            representative = index.min(0).values
            _, orbit_id = torch.unique(representative, return_inverse=True)
            self.register_buffer("orbit_id", orbit_id, persistent=False)
            self.fibre_orbits = int(orbit_id.max()) + 1
            self.register_buffer("orbit_size", torch.bincount(orbit_id).to(torch.float32), persistent=False)

    @property
    def full_shape(self) -> tuple[int, ...]:
        rows = self.out_count * (self.order if self.out_is_orbit else 1)
        shape = (rows, *self.fibre_shape)
        return (shape[1], shape[0], *shape[2:]) if self.transposed else shape

    @property
    def base_shape(self) -> tuple[int, ...]:
        if self.out_is_orbit:
            return (self.out_count, *self.fibre_shape)
        return (self.out_count, self.fibre_orbits)

    def forward(self, base: torch.Tensor) -> torch.Tensor:
        flat = base.reshape(self.out_count, -1)
        if self.out_is_orbit:
            full = flat.index_select(1, self.index)
        else:
            full = flat.index_select(1, self.orbit_id)
        full = full.reshape(-1, *self.fibre_shape)
        return full.transpose(0, 1) if self.transposed else full

    def right_inverse(self, weight: torch.Tensor) -> torch.Tensor:
        """Π: the nearest tied weight, returned as its base."""
        if self.transposed:
            weight = weight.transpose(0, 1)
        if self.out_is_orbit:
            per_slot = weight.reshape(self.out_count, self.order, -1)
            index = self.inverse_index.to(weight.device).unsqueeze(0).expand(self.out_count, -1, -1)
            return per_slot.gather(2, index).mean(1).reshape(self.base_shape).contiguous()
        flat = weight.reshape(self.out_count, -1)
        sums = flat.new_zeros(self.base_shape).index_add_(1, self.orbit_id.to(weight.device), flat)
        return sums / self.orbit_size.to(weight.device, weight.dtype)

    @property
    def is_trivial(self) -> bool:
        """True when tying imposes nothing (plain out and every fibre orbit a single index)."""
        return not self.out_is_orbit and self.fibre_orbits == _prod(self.fibre_shape)

    def extra_repr(self) -> str:
        return f"base={tuple(self.base_shape)}, full={tuple(self.full_shape)}"


class TiedPerOrbit(nn.Module):
    """Parametrization for per-channel vectors (bias, norm affine): one value per orbit."""

    def __init__(self, group: Group, orbits: int):
        super().__init__()
        self.order = group.order
        self.orbits = orbits

    def forward(self, base: torch.Tensor) -> torch.Tensor:
        return base.repeat_interleave(self.order, dim=0)

    def right_inverse(self, value: torch.Tensor) -> torch.Tensor:
        return value.reshape(self.orbits, self.order).mean(1)


def project(group: Group, weight: torch.Tensor, out: Layout, fibre: Layout,
            transposed: bool = False) -> torch.Tensor:
    """Π(W): the orbit average of a full weight, returned at full shape."""
    tying = TiedWeight(group, out, fibre, tuple(weight.shape[2:]), transposed)
    return tying(tying.right_inverse(weight))


def weight_residual(group: Group, weight: torch.Tensor, out: Layout, fibre: Layout,
                    transposed: bool = False) -> float:
    """‖W − Π(W)‖ / ‖W‖ (0 for a zero weight)."""
    norm = weight.norm()
    if norm == 0:
        return 0.0
    return float((weight - project(group, weight, out, fibre, transposed)).norm() / norm)


__all__ = ["TiedWeight", "TiedPerOrbit", "fibre_index", "project", "weight_residual", "Orbit", "Plain"]
