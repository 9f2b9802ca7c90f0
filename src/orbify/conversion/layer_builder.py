"""The tied conv / linear layer that replaces an original one, built once per node.

:class:`LayerBuilder` chooses the output layout (orbits by the budget, plain for head layers and
after a stop), the group count of grouped convs and builds the tied module; :class:`TiedLayer`
keeps it with the original and what carrying weights into it needs.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import torch
from torch import fx, nn

from orbify.conversion.output_widths import output_width
from orbify.conversion.state import ConversionState
from orbify.errors import WidthError
from orbify.graph.attention_heads import head_projection
from orbify.graph.channel_attention import POSITION_WEIGHTS_NOTE, position_weights
from orbify.graph.rules import CONVERT_UP_TO, ConversionContext, Step
from orbify.graph.square_kernels import SquareKernel, square_kernel
from orbify.graph.standardized_convs import adopt_standardization, constructor_arguments
from orbify.graph.tracing import describe, shape
from orbify.layers.tied import OrbitBatchNorm, conv_fibre, tie_attention, tie_conv, tie_linear
from orbify.symmetry.layouts import Flat, Layout, Orbit, Permuted, Plain, Tokens
from orbify.transfer.channels import ChannelMap, rows
from orbify.transfer.kinds import is_depthwise
from orbify.transfer.loading import carried_weight, factory_kwargs


@dataclass
class FedWeight:
    """A layer's original weight, out-first, in original row order, its inputs fed through ``in_map``."""

    in_map: ChannelMap
    weight: torch.Tensor


@dataclass
class MatchedWeight:
    """What channel matching found for a layer: its output rows ``source``, tied ``base`` weight and ``residual``."""

    source: torch.Tensor
    base: torch.Tensor
    residual: float


@dataclass
class TiedLayer:
    """A conv or linear being converted: its new tied module and what carrying weights into it needs.

    ``fed`` is kept once matching has prepared the weight (to reuse it), ``matched`` once matching
    has found the tied weight for its chosen rows. ``axes``: the layout of the channels-last value (a
    :class:`Permuted` map or a :class:`Tokens` sequence) that a Linear over the last axis reads; it writes a
    value with the same axes (``lin`` and ``lout`` are the layouts of their channels). ``square``: the square kernel a
    conv's kernel grew to (:mod:`orbify.graph.square_kernels`; carried weights are embedded in it), None when kept.
    """

    old: nn.Module
    new: nn.Module
    lin: Layout
    lout: Layout
    groups: int = 1
    notes: list[str] = field(default_factory=list)
    fed: FedWeight | None = None
    matched: MatchedWeight | None = None
    axes: Permuted | None = None
    square: SquareKernel | None = None

    @property
    def transposed(self) -> bool:
        return isinstance(self.old, nn.ConvTranspose2d)

    @property
    def depthwise(self) -> bool:
        return is_depthwise(self.old)

    def permuted(self, layout: Layout) -> Layout:
        """``layout`` with this layer's axes (a channels-last value's layout with ``layout`` as its channels)."""
        return layout if self.axes is None else replace(self.axes, inner=layout)

    def weight(self, in_map: ChannelMap, source: torch.Tensor | None) -> torch.Tensor:
        """The original weight, out-first, output rows picked by ``source`` (None: original order), inputs fed."""
        if self.fed is not None and self.fed.in_map is in_map and source is not None and \
                (self.groups == 1 or source.numel() == self.fed.weight.shape[0]):
            return rows(self.fed.weight, source)   # rows and inputs commute; grouped blocks agree at equal widths
        weight = carried_weight(self.old, in_map, source, self.groups)
        return weight if self.square is None else self.square.embed(weight)


class LayerBuilder:
    """Builds the tied layer of each conv/linear node once: matching may need it before the walk reaches it.

    ``plain_outputs``: the nodes whose output stays plain (head layers, layers after a stop).
    ``ctx`` is the conversion the rules see (for refusals of layers built ahead of their turn).
    """

    def __init__(self, state: ConversionState, plain_outputs: set[fx.Node], ctx: ConversionContext):
        self.state = state
        self.plain_outputs = plain_outputs
        self.ctx = ctx
        self.layers: dict[fx.Node, TiedLayer] = {}

    def layer(self, node: fx.Node, step: Step | None) -> TiedLayer:
        """The tied layer of ``node``; ``step`` None when built for matching ahead of its turn."""
        if node in self.layers:
            return self.layers[node]
        state = self.state
        old = state.module(node)
        lin = state.layouts[node.all_input_nodes[0]]
        step = step or Step(node, [lin], self.ctx)
        if isinstance(old, nn.Linear):
            axes = self._linear_axes(step, lin)
            lin = lin.inner if axes is not None else lin
            lout = self._output_layout(node, old.out_features)
            new = self._new(nn.Linear, lin.size(state.group), lout.size(state.group), bias=old.bias is not None,
                            **factory_kwargs(old.weight))
            tie_linear(new, state.group, lin, lout, where=describe(node), project=not state.carry)
            layer = TiedLayer(old, new, lin, lout, axes=axes)
        else:
            layer = self._conv(node, step, old, lin)
        self.layers[node] = layer
        return layer

    def done(self, node: fx.Node) -> None:
        """Forget ``node``'s layer once converted (it holds weights kept for matching)."""
        self.layers.pop(node)

    def _linear_axes(self, step: Step, lin: Layout) -> Permuted | None:
        """The layout of the channels-last value a Linear reads over its last axis (None: (B, C) features).

        Refuses a Linear over another axis than the channels.
        """
        rank = len(shape(step.node.all_input_nodes[0]) or ())
        if isinstance(lin, Permuted) and lin.channel_axis == rank - 1:
            return lin
        if rank > 2 or isinstance(lin, Permuted) or not isinstance(lin, (Plain, Orbit, Flat)):
            raise step.refuse("A Linear over an axis that does not hold the channels",
                              "apply it to (B, C) features or over the last axis of a channels-last map, or "
                              + CONVERT_UP_TO)
        return None

    def attention(self, step: Step, layout: Tokens) -> nn.MultiheadAttention:
        """A new self-attention module like ``step``'s, tied over the channels of ``layout`` (batch first only)."""
        old = self.state.module(step.node)
        if not old.batch_first:
            raise step.refuse("Attention over (N, B, C) sequences (batch_first=False)",
                              "build the attention with batch_first=True, or " + CONVERT_UP_TO)
        new = self._new(nn.MultiheadAttention, old.embed_dim, old.num_heads, dropout=old.dropout,
                        bias=old.in_proj_bias is not None, add_bias_kv=old.bias_k is not None,
                        kdim=old.kdim, vdim=old.vdim, batch_first=True, **factory_kwargs(old.out_proj.weight))
        return tie_attention(new, self.state.group, layout.inner, where=describe(step.node),
                             project=not self.state.carry)

    def _conv(self, node: fx.Node, step: Step, old: nn.Module, lin: Layout) -> TiedLayer:
        group = self.state.group
        if not isinstance(lin, (Plain, Orbit)):
            raise step.refuse("A conv reads a flattened tensor", CONVERT_UP_TO)
        square = square_kernel(step, old, group, CONVERT_UP_TO)   # None: the kernel is kept
        notes = [] if square is None else [square.note]
        if is_depthwise(old):
            lout, groups = lin, lin.size(group)
        else:
            lout = self._output_layout(node, old.out_channels)
            if position_weights(node):
                notes.append(POSITION_WEIGHTS_NOTE)
            groups = self._groups(step, old.groups, lin, lout, notes)
        new = self._new(type(old), lin.size(group), lout.size(group), **_conv_geometry(old, groups, square))
        tie_conv(new, group, lin, lout, where=describe(node), project=not self.state.carry)
        notes.extend(adopt_standardization(step, old, new, group, (lin, lout), self.state.init))   # weight-standardized
        return TiedLayer(old, new, lin, lout, groups, notes, square=square)

    def _output_layout(self, node: fx.Node, channels: int) -> Layout:
        if node in self.plain_outputs or position_weights(node):   # heads; one invariant weight per position
            return Plain(channels)
        if head_projection(node) and channels % self.state.group.order == 0:   # split into heads: width kept
            return Orbit(channels // self.state.group.order)
        return Orbit(output_width(node, channels, self.state).orbits)   # the budget, or as the graph around needs

    def _new(self, kind: type, *args, **kwargs) -> nn.Module:
        """A new layer; its parameters are left uninitialised when the original weights overwrite them."""
        if self.state.carry:
            return nn.utils.skip_init(kind, *args, **kwargs)
        return kind(*args, **kwargs)

    def _groups(self, step: Step, groups: int, lin: Layout, lout: Layout, notes: list[str]) -> int:
        """The largest divisor of the original group count that keeps whole orbits per group."""
        group = self.state.group
        for candidate in sorted((d for d in range(1, groups + 1) if groups % d == 0), reverse=True):
            if lin.size(group) % candidate or lout.size(group) % candidate:
                continue
            try:
                conv_fibre(group, lin, lout, candidate)
            except WidthError:
                continue
            if candidate != groups:
                notes.append(f"merged {groups} conv groups into {candidate} so each holds whole orbits")
            return candidate
        raise step.refuse("No grouping of this conv keeps whole orbits", "use a group whose order divides the widths")


def _conv_geometry(old: nn.Module, groups: int, square: SquareKernel | None) -> dict:
    """Keyword arguments for a conv of the same type and geometry as ``old`` with a new group count (and the square
    kernel and padding ``square`` when it grew to one)."""
    kernel, padding = (old.kernel_size, old.padding) if square is None else (square.kernel_size, square.padding)
    kwargs = dict(kernel_size=kernel, stride=old.stride, padding=padding, dilation=old.dilation,
                  groups=groups, bias=old.bias is not None, padding_mode=old.padding_mode, **factory_kwargs(old.weight))
    if isinstance(old, nn.ConvTranspose2d):
        kwargs["output_padding"] = old.output_padding
    return constructor_arguments(old, kwargs)


def channels_of(module: nn.Module) -> tuple[int, int]:
    """Input and output channels of a conv, linear or norm layer ((0, 0) for other modules)."""
    if isinstance(module, nn.Linear):
        return (module.in_features, module.out_features)
    if isinstance(module, (nn.Conv2d, nn.ConvTranspose2d)):
        return (module.in_channels, module.out_channels)
    if isinstance(module, OrbitBatchNorm):
        return (module.num_features * module.order,) * 2
    if isinstance(module, nn.modules.batchnorm._BatchNorm):
        return (module.num_features,) * 2
    if isinstance(module, nn.GroupNorm):
        return (module.num_channels,) * 2
    if isinstance(module, nn.MultiheadAttention):
        return (module.embed_dim,) * 2
    if isinstance(module, nn.LayerNorm):
        return (module.normalized_shape[0],) * 2
    return (0, 0)
