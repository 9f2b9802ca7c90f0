"""Tying a weight between two layouts: expand, project and the weight residual (docs/design.md §4).

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

**Approximate groups** (c8, c16, d8, ...; docs/design.md §11.3) move a spatial filter by a resampling matrix
``M_g`` (:meth:`Group.kernel_matrices`), so g acts on an in-fibre linearly,
``A_g = P_g ⊗ M_g`` (the exact channel permutation P_g times the filter resampling), and
:class:`ResampledWeight` replaces the gather by that linear map:

* **orbit out**: ``W[o, s] = A_s base[o]`` (gather the channels, then one einsum with the stacked
  M); projection is the least-squares inverse ``(Σ A_sᵀA_s)⁻¹ Σ A_sᵀ W_s``. As P_s is a
  permutation, Σ A_sᵀA_s = I ⊗ H with the small k²×k² matrix H = Σ_s M_sᵀM_s (H ⪰ I, as M_0 = I),
  whose inverse is computed once per (group, kernel size) and cached.
* **plain out, orbit fibre** (an orbit→plain map head): invariance ``w[i, t] = M_g w[i, g⁻¹t]``
  with g = t gives ``W[o, i, t] = M_t base[o, i]`` — the same construction on the input side,
  with the same H.
* **plain out, plain fibre** (spatial convs after an orbit pool): the kernels must satisfy
  ``M_g w = w``, which resampled rotations allow only approximately. The base holds coefficients
  in a basis U of the most invariant kernels: within the kernels the exactly acting elements fix,
  the eigenvectors of S = mean_g (M_g - I)ᵀ(M_g - I) with eigenvalue below 1 (an exactly invariant
  kernel has 0; a kernel of an angular frequency the group does not fix has 2 on average) and
  below :data:`INVARIANT_SPREAD`. Measured under c8, basis size and invariance defect
  max_g ‖M_g U - U‖₂: harmonic 3 / 5 / 7 kernels for 3×3 / 5×5 / 7×7, defect below 1e-12 (the
  radial kernels: the band-limited turn leaves them as they are); bilinear 2 / 0.26, 3 / 0.30,
  4 / 0.30 (bilinear rotation blurs, so even radial kernels change under it).
  Such a layer is the least exact part of a converted model: prefer 1×1 convs after an orbit pool.

In every case the elements that turn by whole quarter turns (and the mirror) act exactly, so a tied
layer is exactly equivariant to them; 1×1 kernels and Linear layers have nothing to resample and
keep the exact gather of :class:`TiedWeight`. :func:`tied_weight` picks the right class.
"""

from __future__ import annotations

import functools
import math

import torch
from torch import nn

from orbify.errors import GroupError, UnsupportedOpError
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout, Orbit, Plain


def fibre_index(group: Group, fibre: Layout, kernel: tuple[int, ...]) -> torch.Tensor:
    """Index (|G|, F) of the action on one in-fibre of shape (fibre channels, *kernel).

    The fibre channels move by ``fibre.permutation``; a 2-D kernel of more than one pixel moves
    like pixels (exact groups only: approximate groups resample such kernels, see :class:`ResampledWeight`).
    """
    channels = fibre.size(group)
    index = torch.arange(channels * math.prod(kernel)).view(channels, *kernel)
    perm = fibre.permutation(group)
    rows = []
    for g in range(group.order):
        moved = index[perm[g]]
        if len(kernel) == 2 and math.prod(kernel) > 1:
            moved = group.act_grid(g, moved)
        elif len(kernel) not in (0, 2):
            raise ValueError(f"only 2-D kernels are tied, got kernel {kernel}")
        rows.append(moved.flatten())
    return torch.stack(rows)


#: Largest mean squared change ‖M_g u - u‖² (u of unit norm) a kernel of the invariant basis may
#: have: an RMS change of about 0.22, the size of a resampled rotation's error on a smooth filter
#: (benchmarks/README.md, "Finer rotations").
INVARIANT_SPREAD = 0.05


def _resamples(group: Group, kernel: tuple[int, ...]) -> bool:
    """True when tying this kernel under this group needs filter resampling."""
    return not group.exact and math.prod(kernel) > 1


class WeightTying(nn.Module):
    """Shared shape bookkeeping of the weight parametrizations (:class:`TiedWeight`, :class:`ResampledWeight`).

    ``out`` is the output layout (:class:`Orbit` or :class:`Plain`); ``fibre`` the layout of the
    weight's second axis (per conv group); ``kernel`` the spatial kernel (empty for Linear).
    ``transposed`` marks ConvTranspose weights, stored (in, out, *kernel).
    """

    def __init__(self, group: Group, out: Layout, fibre: Layout, kernel: tuple[int, ...] = (),
                 transposed: bool = False):
        super().__init__()
        self.order = group.order
        self.out_count = out.orbits if isinstance(out, Orbit) else out.channels
        self.out_is_orbit = isinstance(out, Orbit)
        self.fibre_shape = (fibre.size(group), *kernel)
        self.transposed = transposed

    @property
    def full_shape(self) -> tuple[int, ...]:
        rows = self.out_count * (self.order if self.out_is_orbit else 1)
        shape = (rows, *self.fibre_shape)
        return (shape[1], shape[0], *shape[2:]) if self.transposed else shape

    @property
    def base_shape(self) -> tuple[int, ...]:
        raise NotImplementedError

    @property
    def is_trivial(self) -> bool:
        """True when tying imposes nothing (the base is the full weight)."""
        return False

    def _stored(self, full: torch.Tensor) -> torch.Tensor:
        """(out, in, ...) → the module's storage order."""
        return full.transpose(0, 1) if self.transposed else full

    def extra_repr(self) -> str:
        return f"base={tuple(self.base_shape)}, full={tuple(self.full_shape)}"


class TiedWeight(WeightTying):
    """Parametrization: base weight → full tied weight by one gather; ``right_inverse`` is the projection Π.

    For exact groups, and for any group when the kernel has no spatial extent (Linear, 1×1 conv).
    """

    def __init__(self, group: Group, out: Layout, fibre: Layout, kernel: tuple[int, ...] = (),
                 transposed: bool = False):
        if _resamples(group, tuple(kernel)):
            raise GroupError(f"Tying by index needs an exact group for a {kernel} kernel, but {group.name} "
                             f"rotates by {360 / group.rotations:g}°, which moves filters by resampling",
                             where="orbify.symmetry.tying.TiedWeight",
                             fix="use orbify.symmetry.tying.tied_weight(...), which picks ResampledWeight for "
                                 "approximate groups")
        super().__init__(group, out, fibre, kernel, transposed)
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
        return self._stored(full.reshape(-1, *self.fibre_shape))

    def right_inverse(self, weight: torch.Tensor) -> torch.Tensor:
        """Π: the nearest tied weight, returned as its base."""
        weight = self._stored(weight)
        if self.out_is_orbit:
            per_slot = weight.reshape(self.out_count, self.order, -1)
            index = self.inverse_index.to(weight.device).unsqueeze(0).expand(self.out_count, -1, -1)
            return per_slot.gather(2, index).mean(1).reshape(self.base_shape).contiguous()
        flat = weight.reshape(self.out_count, -1)
        sums = flat.new_zeros(self.base_shape).index_add_(1, self.orbit_id.to(weight.device), flat)
        return sums / self.orbit_size.to(weight.device, weight.dtype)

    @property
    def is_trivial(self) -> bool:
        return not self.out_is_orbit and self.fibre_orbits == math.prod(self.fibre_shape)


class ResampledWeight(WeightTying):
    """Parametrization for an approximate group and a square spatial kernel (see the module docstring).

    Expand is linear: the channel permutation of each element (exact) combined with its filter
    resampling matrix ``group.kernel_matrices(k)``; ``right_inverse`` is its least-squares inverse.
    The three forms — ``"orbit-out"``, ``"orbit-in"`` (plain out, orbit fibre) and ``"invariant"``
    (plain out, plain fibre) — are named by :attr:`form`.
    """

    def __init__(self, group: Group, out: Layout, fibre: Layout, kernel: tuple[int, ...],
                 transposed: bool = False):
        kernel = tuple(kernel)
        if len(kernel) != 2 or kernel[0] != kernel[1]:
            raise UnsupportedOpError(f"A {'×'.join(map(str, kernel))} kernel cannot be rotated by {group.name}: "
                                     "filter resampling needs square 2-D kernels",
                                     where="orbify.symmetry.tying.ResampledWeight",
                                     fix="use an exact group (c4, d4), or keep this layer after an orbit pool")
        super().__init__(group, out, fibre, kernel, transposed)
        self.group_name = group.name
        self.resampling = group.resampling
        self.channels = fibre.size(group)
        self.area = math.prod(kernel)
        matrices, gram_inverse, invariant_basis = _resampling_operators(group, kernel[0])
        self.register_buffer("matrices", matrices, persistent=False)
        if self.out_is_orbit:
            self.form = "orbit-out"
            perm = fibre.permutation(group)
            offsets = torch.arange(self.order).unsqueeze(1) * self.channels
            self.register_buffer("index", perm.flatten(), persistent=False)
            self.register_buffer("inverse_index", (perm.argsort(1) + offsets).flatten(), persistent=False)
        elif isinstance(fibre, Orbit):
            self.form = "orbit-in"
            self.fibre_orbits = fibre.orbits
        else:
            self.form = "invariant"
            self.register_buffer("basis", invariant_basis, persistent=False)
        if self.form != "invariant":
            self.register_buffer("gram_inverse", gram_inverse, persistent=False)

    @property
    def base_shape(self) -> tuple[int, ...]:
        if self.form == "orbit-out":
            return (self.out_count, *self.fibre_shape)
        if self.form == "orbit-in":
            return (self.out_count, self.fibre_orbits, *self.fibre_shape[1:])
        return (self.out_count, self.channels, self.basis.shape[1])

    def forward(self, base: torch.Tensor) -> torch.Tensor:
        if self.form == "invariant":
            full = torch.einsum("pr,ocr->ocp", self.basis.to(base.dtype), base)
        else:
            matrices = self.matrices.to(base.dtype)
            if self.form == "orbit-out":   # W[o, s] = A_s base[o]: gather channels, resample filters
                flat = base.reshape(self.out_count, self.channels, self.area)
                moved = flat.index_select(1, self.index).unflatten(1, (self.order, self.channels))
                full = torch.einsum("spq,oscq->oscp", matrices, moved)
            else:                          # W[o, i, t] = M_t base[o, i]
                flat = base.reshape(self.out_count, self.fibre_orbits, self.area)
                full = torch.einsum("tpq,oiq->oitp", matrices, flat)
        return self._stored(full.reshape(-1, *self.fibre_shape))

    def right_inverse(self, weight: torch.Tensor) -> torch.Tensor:
        """The least-squares nearest tied weight, returned as its base."""
        weight = self._stored(weight)
        if self.form == "invariant":
            flat = weight.reshape(self.out_count, self.channels, self.area)
            return torch.einsum("pr,ocp->ocr", self.basis.to(weight.dtype), flat)
        matrices = self.matrices.to(weight.dtype)
        if self.form == "orbit-out":       # Σ_s P_sᵀ M_sᵀ W_s
            per_slot = weight.reshape(self.out_count, self.order, self.channels, self.area)
            pulled = torch.einsum("sqp,oscq->oscp", matrices, per_slot).flatten(1, 2)
            summed = pulled.index_select(1, self.inverse_index).unflatten(1, (self.order, self.channels)).sum(1)
        else:                              # Σ_t M_tᵀ W[o, i, t]
            per_slot = weight.reshape(self.out_count, self.fibre_orbits, self.order, self.area)
            summed = torch.einsum("tqp,oitq->oip", matrices, per_slot)
        base = torch.einsum("pq,ocq->ocp", self.gram_inverse.to(weight.dtype), summed)
        return base.reshape(self.base_shape).contiguous()

    def extra_repr(self) -> str:
        return f"{self.form}, {self.group_name} {self.resampling}, " + super().extra_repr()


@functools.lru_cache(maxsize=64)
def _resampling_operators(group: Group, size: int) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """(M, H⁻¹, U) for size×size filters: the element matrices, the inverse of H = Σ_g M_gᵀM_g and
    the basis of the most invariant kernels (module docstring). Cached; never modify the results."""
    matrices = group.kernel_matrices(size)
    gram_inverse = torch.linalg.inv(torch.einsum("gqp,gqr->pr", matrices, matrices))
    exact = matrices[[a for a in range(group.order) if group.acts_exactly(a)]]
    values, vectors = torch.linalg.eigh(exact.mean(0))   # symmetric: the exact elements form a group
    fixed = vectors[:, values > 0.5]
    defect = matrices - torch.eye(size * size, dtype=matrices.dtype)
    spread = fixed.T @ torch.einsum("gqp,gqr->pr", defect, defect) @ fixed / group.order
    values, vectors = torch.linalg.eigh(spread)
    return matrices, gram_inverse, fixed @ vectors[:, values < INVARIANT_SPREAD]


def tied_weight(group: Group, out: Layout, fibre: Layout, kernel: tuple[int, ...] = (),
                transposed: bool = False) -> TiedWeight | ResampledWeight:
    """The parametrization that ties a weight from ``fibre`` to ``out``.

    :class:`TiedWeight` (one gather) for exact groups and kernels without spatial extent;
    :class:`ResampledWeight` for approximate groups with a spatial kernel.
    """
    kind = ResampledWeight if _resamples(group, tuple(kernel)) else TiedWeight
    return kind(group, out, fibre, tuple(kernel), transposed)


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
    """Π(W): the nearest tied weight (the orbit average for exact groups), returned at full shape."""
    tying = tied_weight(group, out, fibre, tuple(weight.shape[2:]), transposed)
    return tying(tying.right_inverse(weight))


def relative_residual(weight: torch.Tensor, tied: torch.Tensor) -> float:
    """‖W − T‖ / ‖W‖ of a weight W and its tied counterpart T (same shape and orientation); 0 when W is zero.

    With T = Π(W) this is the weight residual that the conversion records for every layer.
    """
    norm = weight.norm()
    return float((weight - tied).norm() / norm) if norm > 0 else 0.0


def weight_residual(group: Group, weight: torch.Tensor, out: Layout, fibre: Layout,
                    transposed: bool = False) -> float:
    """‖W − Π(W)‖ / ‖W‖ (0 for a zero weight)."""
    return relative_residual(weight, project(group, weight, out, fibre, transposed))


__all__ = ["ResampledWeight", "TiedWeight", "TiedPerOrbit", "WeightTying", "fibre_index", "project",
           "relative_residual", "tied_weight", "weight_residual", "Orbit", "Plain"]
