"""Tied modules: ordinary torch modules whose parameters are tied by the group (docs/design.md §4–§5).

Conv, transposed conv and linear layers stay ``nn.Conv2d`` / ``nn.ConvTranspose2d`` /
``nn.Linear``; their weight (and bias) get a :class:`~orbify.symmetry.tying.TiedWeight` (or, for a spatial
kernel under an approximate group such as c8, a :class:`~orbify.symmetry.tying.ResampledWeight`)
parametrization (``torch.nn.utils.parametrize``), so the module tree, hooks and summaries keep
working and ``parametrize.cached()`` serves inference. Assigning a full-size weight to a tied
module stores its orbit average. Batch norm shares its statistics across the slots of an orbit
(:class:`OrbitBatchNorm`); :class:`OrbitPool` averages (or maxes) the slots away.
:func:`bake` turns any of them back into the plain module it stands for.
"""

from __future__ import annotations

import torch
from torch import nn
from torch.nn.utils import parametrize

from orbify.errors import WidthError
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout, Orbit, Plain
from orbify.symmetry.tying import TiedPerOrbit, tied_weight


def conv_fibre(group: Group, in_layout: Layout, out_layout: Layout, groups: int, where: str = "") -> Layout:
    """Layout of one conv group's input channels (the weight's second axis).

    Grouped convs are tied when every group holds whole orbits, or when every group holds a
    single channel on both sides (depthwise: a group then moves with its channel).
    """
    if groups == 1:
        return in_layout
    n = group.order
    in_per_group = in_layout.size(group) // groups
    out_per_group = out_layout.size(group) // groups
    out_moves = isinstance(out_layout, Orbit)
    if isinstance(in_layout, Plain) and (not out_moves or out_per_group % n == 0):
        return Plain(in_per_group)
    if isinstance(in_layout, Orbit):
        if in_per_group % n == 0 and (not out_moves or out_per_group % n == 0):
            return Orbit(in_per_group // n)
        if out_moves and in_per_group == 1 and out_per_group == 1:
            return Plain(1)
    raise WidthError(
        f"A grouped conv with {groups} groups ({in_per_group} in / {out_per_group} out channels each) "
        f"cannot be tied from {in_layout} to {out_layout} under {group.name}: each group must hold whole "
        f"orbits of {n} channels, or exactly one channel on both sides",
        where=where or None,
        fix="merge groups so each holds a multiple of |G| channels (the converter does this and records it), "
            "or choose a group whose order divides the group width",
    )


def _register(module: nn.Module, name: str, parametrization: nn.Module, project: bool = True) -> None:
    """Parametrize ``module.name``; its base is the projection of the current value, or uninitialised.

    Without ``project`` the current value is not projected (the caller overwrites the base anyway):
    the parametrization's ``right_inverse``, which registration calls, is shadowed for that call by
    one that returns an uninitialised base of the right shape, device and dtype.
    """
    if not project:
        current = getattr(module, name)
        shape = parametrization.base_shape
        parametrization.right_inverse = lambda _: current.new_empty(shape)
    try:
        parametrize.register_parametrization(module, name, parametrization, unsafe=True)
    finally:
        parametrization.__dict__.pop("right_inverse", None)


def _tie_bias(module: nn.Module, group: Group, out_layout: Layout, name: str = "bias") -> None:
    if getattr(module, name, None) is not None and isinstance(out_layout, Orbit):
        _register(module, name, TiedPerOrbit(group, out_layout.orbits))


def tie_conv(conv: nn.Conv2d | nn.ConvTranspose2d, group: Group, in_layout: Layout, out_layout: Layout,
             where: str = "", *, project: bool = True) -> nn.Conv2d | nn.ConvTranspose2d:
    """Tie ``conv`` in place from ``in_layout`` to ``out_layout``; its current weight is projected.

    With ``project=False`` the tied weight's base is left uninitialised instead, for a caller that
    loads weights into it next (projecting a value about to be overwritten costs a pass over it).

    ``conv`` must already have the channel counts of the layouts. Plain → plain 1×1 convs need no
    tying and are returned untouched. Under an approximate group (c8, d8, ...) spatial kernels are
    tied through filter resampling by ``group.resampling`` (:class:`~orbify.symmetry.tying.ResampledWeight`);
    the layer is then equivariant only approximately, but still exactly to quarter turns and the mirror.
    """
    transposed = isinstance(conv, nn.ConvTranspose2d)
    channels_in, channels_out = (conv.in_channels, conv.out_channels)
    if channels_in != in_layout.size(group) or channels_out != out_layout.size(group):
        raise WidthError(f"{type(conv).__name__} has {channels_in}→{channels_out} channels but the layouts "
                         f"{in_layout}→{out_layout} need {in_layout.size(group)}→{out_layout.size(group)}",
                         where=where or None, fix="resize the layer to the layout widths before tying it")
    if transposed and conv.groups != 1:
        raise WidthError("Grouped transposed convs are not tied", where=where or None,
                         fix="use groups=1 or keep this layer after an orbit pool")
    fibre = conv_fibre(group, in_layout, out_layout, conv.groups, where)
    tying = tied_weight(group, out_layout, fibre, tuple(conv.kernel_size), transposed)
    if not tying.is_trivial:
        _register(conv, "weight", tying, project)
    _tie_bias(conv, group, out_layout)
    return conv


def tie_linear(linear: nn.Linear, group: Group, in_layout: Layout, out_layout: Layout, where: str = "", *,
               project: bool = True) -> nn.Linear:
    """Tie ``linear`` in place (orbit→orbit, orbit→plain, flat→plain/orbit, plain→orbit); ``project`` as in
    :func:`tie_conv`."""
    if linear.in_features != in_layout.size(group) or linear.out_features != out_layout.size(group):
        raise WidthError(f"Linear has {linear.in_features}→{linear.out_features} features but the layouts "
                         f"{in_layout}→{out_layout} need {in_layout.size(group)}→{out_layout.size(group)}",
                         where=where or None, fix="resize the layer to the layout widths before tying it")
    tying = tied_weight(group, out_layout, in_layout, ())
    if not tying.is_trivial:
        _register(linear, "weight", tying, project)
    _tie_bias(linear, group, out_layout)
    return linear


def tie_affine(norm: nn.Module, group: Group, layout: Layout) -> nn.Module:
    """Tie the per-channel affine parameters of a LayerNorm/GroupNorm over an orbit layout."""
    if isinstance(layout, Orbit):
        for name in ("weight", "bias"):
            if getattr(norm, name, None) is not None:
                _register(norm, name, TiedPerOrbit(group, layout.orbits))
    return norm


class ChannelTensorTying(nn.Module):
    """Parametrization of a per-channel tensor (a layer scale): size 1 on every axis but one, which holds
    ``orbits``·|G| channels; one value per orbit (:class:`~orbify.symmetry.tying.TiedPerOrbit` on the flattened
    tensor), the tensor's shape kept."""

    def __init__(self, group: Group, orbits: int, shape: tuple[int, ...]):
        super().__init__()
        self.per_orbit = TiedPerOrbit(group, orbits)
        self.shape = shape
        self.base_shape = tuple(orbits if size > 1 else 1 for size in shape)

    def forward(self, base: torch.Tensor) -> torch.Tensor:
        return self.per_orbit(base.reshape(-1)).reshape(self.shape)

    def right_inverse(self, value: torch.Tensor) -> torch.Tensor:
        return self.per_orbit.right_inverse(value.reshape(-1)).reshape(self.base_shape)


@torch.no_grad()
def tie_channel_tensor(module: nn.Module, name: str, value: torch.Tensor, group: Group, layout: Orbit) -> None:
    """Make tensor ``name`` of ``module`` the orbit average of ``value`` (one axis of ``layout``'s channels).

    A parameter stays tied per orbit (parametrized, so training keeps it tied); a buffer or a plain tensor
    attribute (a constant) is stored averaged. The tensor's requires_grad and persistence are kept.
    """
    _store_tied(module, name, value, ChannelTensorTying(group, layout.orbits, tuple(value.shape)))


def _store_tied(module: nn.Module, name: str, value: torch.Tensor, tying: nn.Module) -> None:
    """Store ``value`` tied by ``tying`` as tensor ``name`` of ``module``: a parameter parametrized (its requires_grad
    kept), a buffer (its persistence kept) or a plain attribute stored projected."""
    old = getattr(module, name)
    if isinstance(old, nn.Parameter):
        setattr(module, name, nn.Parameter(value.clone(), requires_grad=old.requires_grad))
        _register(module, name, tying)
    elif name in module._buffers:
        module.register_buffer(name, tying(tying.right_inverse(value)),
                               persistent=name not in module._non_persistent_buffers_set)
    else:
        setattr(module, name, tying(tying.right_inverse(value)))


def tie_attention(attention: nn.MultiheadAttention, group: Group, layout: Layout, where: str = "", *,
                  project: bool = True) -> nn.MultiheadAttention:
    """Tie a self-attention module in place over token channels of ``layout`` (docs/design.md §5).

    The stacked q, k, v projection (3C × C) is tied orbit → orbit: with C = orbits·|G|, the stacked 3C outputs
    are themselves 3·orbits whole orbits. The output projection is tied orbit → orbit, the biases per orbit.
    On orbit channels every head must hold whole orbits (head width a multiple of |G|): a slot permutation
    then stays inside each head, so each head's q·k is unchanged by it and the attention matrix moves only
    with the tokens. ``project`` as in :func:`tie_conv`. Refuses (:class:`WidthError`) other widths, separate
    q/k/v projections and added key/value biases, naming the widths that work.
    """
    n, width = group.order, layout.size(group)
    if attention.embed_dim != width:
        raise WidthError(f"The attention has width {attention.embed_dim} but its tokens {layout} have {width} "
                         "channels", where=where or None,
                         fix="keep the attention's width: use the 'channels' budget on a width divisible by |G|")
    if not attention._qkv_same_embed_dim or attention.bias_k is not None:
        raise WidthError("Attention with separate key/value widths or added key/value biases is not tied",
                         where=where or None, fix="use kdim = vdim = embed_dim and add_bias_kv=False")
    if isinstance(layout, Orbit) and attention.head_dim % n:
        raise WidthError(head_width_refusal(attention.embed_dim, attention.num_heads, n), where=where or None,
                         fix=head_width_fix(attention.embed_dim, attention.num_heads, n))
    stacked = Orbit(3 * layout.orbits) if isinstance(layout, Orbit) else Plain(3 * width)
    tying = tied_weight(group, stacked, layout, ())
    if not tying.is_trivial:
        _register(attention, "in_proj_weight", tying, project)
    _tie_bias(attention, group, stacked, "in_proj_bias")
    tie_linear(attention.out_proj, group, layout, layout, where, project=project)
    return attention


def head_width_refusal(width: int, heads: int, order: int) -> str:
    """Why ``heads`` heads of a ``width``-wide attention cannot be tied under a group of ``order`` elements."""
    return (f"{heads} attention heads of width {width // heads} cannot each hold whole orbits of {order} channels "
            f"(the head width must be a multiple of {order})")


def head_width_fix(width: int, heads: int, order: int) -> str:
    """The widths and head counts that work instead."""
    counts = [h for h in range(1, width // order + 1) if width % (h * order) == 0]
    widths = [heads * order * k for k in range(1, 4)]
    return (f"use an embedding width that is a multiple of {heads}·{order} = {heads * order} (e.g. "
            f"{', '.join(map(str, widths))}), or, at width {width}, a head count among {counts}; or a group of "
            "smaller order")


class EntryTying(nn.Module):
    """Parametrization of a tensor whose entries a group permutes (a position embedding, a class token): one value
    per orbit of entries. ``permutation`` (|G|, numel) gives the source entry of every entry of g·t."""

    def __init__(self, permutation: torch.Tensor, shape: tuple[int, ...]):
        super().__init__()
        _, orbit = torch.unique(permutation.min(0).values, return_inverse=True)   # an orbit's smallest entry
        self.register_buffer("orbit", orbit, persistent=False)
        self.register_buffer("orbit_size", torch.bincount(orbit).to(torch.float64), persistent=False)
        self.shape = shape
        self.base_shape = (int(orbit.max()) + 1,)

    def forward(self, base: torch.Tensor) -> torch.Tensor:
        return base.index_select(0, self.orbit).reshape(self.shape)

    def right_inverse(self, value: torch.Tensor) -> torch.Tensor:
        sums = value.new_zeros(self.base_shape).index_add_(0, self.orbit, value.reshape(-1))
        return sums / self.orbit_size.to(value.dtype)


@torch.no_grad()
def tie_entries(module: nn.Module, name: str, value: torch.Tensor, permutation: torch.Tensor) -> None:
    """Make tensor ``name`` of ``module`` the orbit average of ``value`` under the entry ``permutation``.

    A parameter stays tied (parametrized by :class:`EntryTying`); a buffer or constant is stored averaged.
    """
    _store_tied(module, name, value, EntryTying(permutation, tuple(value.shape)))


class OrbitBatchNorm(nn.modules.batchnorm._BatchNorm):
    """Batch norm whose statistics and affine parameters are shared by the |G| slots of each orbit.

    ``num_features`` counts orbits; the input has ``num_features·order`` channels, and may be
    (B, C), (B, C, L) or (B, C, H, W). It normalises the reshaped (B, orbits, order·rest) tensor,
    which keeps the layer equivariant in training mode as well as in eval mode.
    """

    def __init__(self, orbits: int, order: int, spatial_dims: int = 2, **kwargs):
        super().__init__(orbits, **kwargs)
        self.order = order
        self.spatial_dims = spatial_dims

    def _check_input_dim(self, input: torch.Tensor) -> None:
        """Called by the base class on the (B, orbits, order·rest) view."""
        if input.dim() != 3 or input.shape[1] != self.num_features:
            raise ValueError(f"expected (B, {self.num_features}, L) inside OrbitBatchNorm, got {tuple(input.shape)}")

    def forward(self, input: torch.Tensor) -> torch.Tensor:
        if input.dim() < 2 or input.shape[1] != self.num_features * self.order:
            raise ValueError(f"expected {self.num_features * self.order} channels, got shape {tuple(input.shape)}")
        grouped = input.reshape(input.shape[0], self.num_features, -1)
        # Batch norm returns a new tensor, so its reshape back need not be an autograd view of it. As a
        # view, an in-place activation after this layer (ReLU(inplace=True)) would make autograd rebuild
        # the gradient of the whole output through CopySlices: extra activation-sized copies per step.
        return torch.ops.aten._unsafe_view(super().forward(grouped).contiguous(), input.shape)

    @classmethod
    def from_plain(cls, bn: nn.modules.batchnorm._BatchNorm, group: Group) -> "OrbitBatchNorm":
        """The orbit-shared counterpart of ``bn`` (same channel count, device and dtype); statistics and affine
        averaged per orbit."""
        n = group.order
        if bn.num_features % n:
            raise WidthError(f"{type(bn).__name__} has {bn.num_features} channels, not a multiple of |G|={n}",
                             fix="use a budget that rounds widths to whole orbits")
        spatial = {nn.BatchNorm1d: 0, nn.BatchNorm2d: 2, nn.BatchNorm3d: 3}.get(type(bn), 2)
        like = next((t for t in (bn.weight, bn.running_mean) if t is not None), None)
        factory = {} if like is None else {"device": like.device, "dtype": like.dtype}
        out = cls(bn.num_features // n, n, spatial, eps=bn.eps, momentum=bn.momentum, affine=bn.affine,
                  track_running_stats=bn.track_running_stats, **factory)
        out.load_orbit_average(bn)
        return out.train(bn.training)

    @torch.no_grad()
    def load_orbit_average(self, bn: nn.modules.batchnorm._BatchNorm) -> None:
        """Set statistics and affine from a plain batch norm of ``orbits·order`` channels, averaged per orbit.

        The variance is that of the pooled slots: the mean over the slots of each slot's variance plus
        the squared deviation of its mean from the orbit mean (summing deviations, not E[x²] − E[x]²,
        which cancels in float32 when the means are large beside the spread).
        """
        def per_slot(t: torch.Tensor) -> torch.Tensor:
            return t.reshape(self.num_features, self.order)

        if self.affine:
            self.weight.copy_(per_slot(bn.weight).mean(1))
            self.bias.copy_(per_slot(bn.bias).mean(1))
        if self.track_running_stats and bn.running_mean is not None:
            means = per_slot(bn.running_mean)
            mean = means.mean(1, keepdim=True)
            self.running_mean.copy_(mean.squeeze(1))
            self.running_var.copy_((per_slot(bn.running_var) + (means - mean) ** 2).mean(1))
            self.num_batches_tracked.copy_(bn.num_batches_tracked)

    def extra_repr(self) -> str:
        return f"{self.num_features} orbits × {self.order} slots, eps={self.eps}, momentum={self.momentum}"


class OrbitPool(nn.Module):
    """Orbit pooling: (B, f·|G|, ...) → (B, f, ...) by the mean or max over each orbit's slots (invariant)."""

    def __init__(self, order: int, mode: str = "mean"):
        super().__init__()
        if mode not in ("mean", "max"):
            raise ValueError(f"orbit pool mode must be 'mean' or 'max', got {mode!r}")
        self.order = order
        self.mode = mode

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return orbit_pool(x, self.order, self.mode)

    def extra_repr(self) -> str:
        return f"order={self.order}, mode={self.mode}"


def orbit_pool(x: torch.Tensor, order: int, mode: str = "mean") -> torch.Tensor:
    """Functional orbit pool, the plain-torch form that :func:`bake` leaves in a graph."""
    slots = x.unflatten(1, (-1, order))
    return slots.mean(2) if mode == "mean" else slots.amax(2)


def bake(module: nn.Module) -> nn.Module:
    """The plain module a tied module stands for, with expanded values and no parametrizations.

    Parametrized modules are baked in place (and returned); an :class:`OrbitBatchNorm` is replaced
    by a new ``nn.BatchNorm1d/2d/3d`` over all channels. Other modules are returned unchanged.
    """
    if isinstance(module, OrbitBatchNorm):
        return _bake_batch_norm(module)
    if parametrize.is_parametrized(module):
        # parametrize keeps the tensor properties on a class shared by every copy of the module
        # (deepcopy keeps the class) and deletes them on removal: give this instance its own class
        # first so that baking one copy leaves the others working.
        cls = type(module)
        module.__class__ = type(cls.__name__, cls.__bases__, dict(cls.__dict__))
        for name in list(module.parametrizations.keys()):
            parametrize.remove_parametrizations(module, name, leave_parametrized=True)
    return module


@torch.no_grad()
def _bake_batch_norm(bn: OrbitBatchNorm) -> nn.modules.batchnorm._BatchNorm:
    kind = {0: nn.BatchNorm1d, 2: nn.BatchNorm2d, 3: nn.BatchNorm3d}[bn.spatial_dims]
    n = bn.order
    plain = kind(bn.num_features * n, eps=bn.eps, momentum=bn.momentum, affine=bn.affine,
                 track_running_stats=bn.track_running_stats)
    if bn.affine:
        plain.weight.copy_(bn.weight.repeat_interleave(n))
        plain.bias.copy_(bn.bias.repeat_interleave(n))
    if bn.track_running_stats:
        plain.running_mean.copy_(bn.running_mean.repeat_interleave(n))
        plain.running_var.copy_(bn.running_var.repeat_interleave(n))
        plain.num_batches_tracked.copy_(bn.num_batches_tracked)
    return plain.train(bn.training)


__all__ = ["ChannelTensorTying", "EntryTying", "OrbitBatchNorm", "OrbitPool", "bake", "conv_fibre", "orbit_pool",
           "tie_affine", "tie_attention", "tie_channel_tensor", "tie_conv", "tie_entries", "tie_linear"]
