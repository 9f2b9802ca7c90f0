"""The op rule table: what every graph op does to a layout (docs/design.md §5).

A rule takes a :class:`Step` (the node, the layouts of its tensor inputs and the conversion
context, a :class:`ConversionContext`) and returns the layout of the node's output, ``None`` for
non-tensor values. Rules that build tied layers (conv, linear, norms) ask the context to replace
the module. Unknown ops stop
the conversion with an :class:`~orbify.errors.UnsupportedOpError` naming the node.

To support a new op, add one entry to :data:`MODULE_RULES`, :data:`FUNCTION_RULES` or
:data:`METHOD_RULES` (see DEVELOPERS.md).
"""

from __future__ import annotations

import operator
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Protocol

import torch
import torch.nn.functional as F
from torch import fx, nn

from orbify.errors import UnsupportedOpError
from orbify.graph.attention_heads import (
    HEAD_FUNCTIONS,
    HEAD_METHODS,
    check_head_operands,
    reshape_heads,
    timm_attention_functions,
)
from orbify.graph.channel_attention import (
    CHANNEL_ATTENTION_MODULES,
    channel_attention_functions,
    channel_attention_methods,
)
from orbify.graph.channel_order import (
    channel_cut_functions,
    select_channels,
    shuffle_channels,
    split_channels,
    take_part,
)
from orbify.graph.channels_last import (
    CHANNELS_LAST_FUNCTIONS,
    CHANNELS_LAST_METHODS,
    ChannelParameter,
    tie_constant_operands,
)
from orbify.graph.fixed_filters import FIXED_FILTER_FUNCTIONS
from orbify.graph.padding import PADDING_FUNCTIONS, PADDING_MODULES, same_padding_rules
from orbify.graph.reductions import REDUCTION_FUNCTIONS, REDUCTION_METHODS
from orbify.graph.shape_decisions import SHAPE_DECISION_FUNCTIONS
from orbify.graph.tokens import (
    TOKEN_FUNCTIONS,
    TOKEN_METHODS,
    TOKEN_MODULES,
    TokenParameter,
    concatenate_tokens,
    tie_token_operands,
    timm_token_functions,
    tokens_from_channels_last,
    tokens_from_grid,
    windowed_attention_refusal,
)
from orbify.graph.tracing import describe, shape
from orbify.layers.shuffles import shuffle_blocks
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Flat, HeadValues, Layout, Orbit, Permuted, Plain, Tokens


@dataclass
class Step:
    node: fx.Node
    inputs: list[Layout | None]   # layouts of node.all_input_nodes, in order
    ctx: ConversionContext

    @property
    def layout(self) -> Layout | None:
        """Layout of the first tensor input."""
        return next((layout for layout in self.inputs if layout is not None), None)

    def arg_layout(self, arg) -> Layout | None:
        return self.ctx.layouts.get(arg) if isinstance(arg, fx.Node) else None

    def refuse(self, what: str, fix: str) -> UnsupportedOpError:
        refusal = windowed_attention_refusal(self.node)   # a clearer reason than the op's own
        if refusal is not None:
            return refusal
        seen = ", ".join(str(layout) for layout in self.inputs if layout is not None) or "none"
        return UnsupportedOpError(f"{what} (input layouts: {seen})", where=describe(self.node), fix=fix)


class ConversionContext(Protocol):
    """What the rules need from the conversion they run in (:mod:`orbify.conversion` provides it).

    The ``convert_*`` methods replace the module of ``step.node`` by its tied counterpart, carry the
    original's weights into it, record it in the plan and return its output layout.
    """

    @property
    def layouts(self) -> Mapping[fx.Node, Layout | None]:
        """The layout of every value walked so far (None: not a tensor)."""

    @property
    def group(self) -> Group:
        """The group converted to."""

    def convert_layer(self, step: Step) -> Layout:
        """A conv, transposed conv or linear layer."""

    def convert_batch_norm(self, step: Step) -> Layout:
        """A batch norm: an orbit batch norm on orbit channels, a plain one otherwise."""

    def convert_affine_norm(self, step: Step) -> Layout:
        """A group norm or layer norm, its affine parameters tied along orbits."""

    def tie_channel_parameter(self, step: Step, parameter: ChannelParameter) -> None:
        """A per-channel model tensor used by ``step``'s elementwise op: tied per orbit, its values carried."""

    def tie_token_parameter(self, step: Step, parameter: TokenParameter) -> None:
        """A model tensor meeting token values (a class token, a position embedding): tied over the joint orbits of
        tokens and channels, its values carried."""

    def convert_attention(self, step: Step) -> Layout:
        """An ``nn.MultiheadAttention`` over a token sequence: q, k, v and output projection tied orbit → orbit."""

    def keep_original_channels(self, step: Step, channels: int) -> None:
        """``step``'s value holds ``channels`` channels standing for the original's in its order (attention heads
        split from, or merged into, a value holding the original's channels in order); refused otherwise."""

    def add_note(self, text: str) -> None:
        """Add a line to the plan's notes (``orbify check`` and the summary list them): how the converted graph
        differs from the original beyond orbit averaging (a channel cut moved to an orbit boundary)."""

    def convert_channel_conv(self, step: Step) -> Layout:
        """A 1-D conv along the orbit channels of a (B, 1, C) pooled vector: the same kernel run along the orbits,
        slot by slot (:mod:`orbify.graph.channel_attention`); the plan notes how it differs from the original."""


Rule = Callable[[Step], "Layout | None"]

CONVERT_UP_TO = ("convert only up to the node before it (stop_at=... / --stop-at), which pools the orbit there "
                 "and keeps the rest plain, or register a rule for this op (DEVELOPERS.md)")


def passthrough(step: Step) -> Layout | None:
    """Pointwise ops, pooling, dropout, upsampling: the layout is unchanged."""
    return step.layout


def elementwise(step: Step) -> Layout | None:
    """add / mul / sub / div / pow / addcmul of tensors: equal layouts, or one operand broadcast over channels."""
    tensors = [(arg, step.arg_layout(arg)) for arg in step.node.args if isinstance(arg, fx.Node)]
    layouts = [layout for _, layout in tensors if layout is not None]
    if not layouts:
        return None
    varying = [layout for arg, layout in tensors if layout is not None and not broadcasts_channel(arg, layout)]
    first = varying[0] if varying else layouts[0]
    if any(layout != first for layout in varying[1:]):
        raise step.refuse("An elementwise op combines tensors of different layouts",
                          "make both operands come from layers of the same width, or " + CONVERT_UP_TO)
    if isinstance(first, Tokens):   # position embeddings, class-token scales: tied over token and channel orbits
        tie_token_operands(step, first)
    elif isinstance(first, HeadValues):   # inside attention: tensors along tokens or channels refused
        check_head_operands(step, first)
    else:
        tie_constant_operands(step, first)   # parameters and constants: per-channel ones tied per orbit
    return first


def broadcasts_channel(node: fx.Node, layout: Layout | None = None) -> bool:
    """True when ``node``'s value has one channel (or none) and so broadcasts over every channel: its channel axis
    (axis 1, or where a channels-last ``layout`` holds it) has size one."""
    s = shape(node)
    axis = layout.channel_axis if isinstance(layout, Permuted) and not isinstance(layout, Tokens) else 1
    return s is not None and (len(s) < 2 or s[axis] == 1)


def concatenate(step: Step) -> Layout | None:
    dim = step.node.kwargs.get("dim", step.node.args[1] if len(step.node.args) > 1 else 0)
    parts = [step.arg_layout(a) for a in step.node.args[0]]
    if any(isinstance(p, Tokens) for p in parts):
        return concatenate_tokens(step)
    rank = len(shape(step.node) or ())
    if dim not in (1, 1 - rank):
        raise step.refuse(f"Concatenation along dim {dim} (only the channel dim 1 keeps layouts)", CONVERT_UP_TO)
    if all(isinstance(p, Orbit) for p in parts):
        return Orbit(sum(p.orbits for p in parts))
    if all(isinstance(p, Plain) for p in parts):
        return Plain(sum(p.channels for p in parts))
    raise step.refuse("Concatenation of orbit and plain channels", CONVERT_UP_TO)


def flatten(step: Step) -> Layout | None:
    """flatten(x, 1) / x.view(B, -1): a spatial map becomes a flat layout, a 1×1 map keeps its layout."""
    source = step.node.args[0]
    in_shape = shape(source)
    out_shape = shape(step.node)
    layout = step.layout
    if in_shape is None or out_shape is None or layout is None:
        return layout
    if isinstance(layout, Tokens):
        raise step.refuse("Flattening a token sequence", "read a class token (x[:, 0]) or the mean over the tokens, "
                          "or " + CONVERT_UP_TO)
    if len(in_shape) == 4 and len(out_shape) == 3 and out_shape[:2] == in_shape[:2]:
        return tokens_from_grid(step)   # flatten(2) of a patch map
    if len(out_shape) != 2 or out_shape[0] != in_shape[0]:
        raise step.refuse(f"A reshape from {in_shape} to {out_shape} moves channels across the batch axis",
                          "only flatten from dim 1 on is supported; " + CONVERT_UP_TO)
    if len(in_shape) == 2:
        return layout
    height, width = (in_shape[2], in_shape[3]) if len(in_shape) == 4 else (in_shape[2], 1)
    if height * width == 1:
        return layout
    if isinstance(layout, Flat) or height != width:
        raise step.refuse(f"Flattening a {height}×{width} map", "flatten square spatial maps only, or " + CONVERT_UP_TO)
    return Flat(layout, height, width)


def reshape(step: Step) -> Layout | None:
    """view/reshape: allowed as a flatten, or when it leaves the channel axis alone."""
    in_shape, out_shape = shape(step.node.args[0]), shape(step.node)
    if step.layout is None:   # a parameter shaped to broadcast
        return None
    if isinstance(step.layout, (Tokens, HeadValues)) and in_shape != out_shape:
        return reshape_heads(step)   # splitting channels into attention heads, or merging them back
    if in_shape is not None and out_shape is not None and in_shape[:2] == out_shape[:2]:
        if len(in_shape) == 4 and len(out_shape) == 3 and in_shape[2] == in_shape[3]:
            return tokens_from_grid(step)   # a patch map flattened into tokens
        if _sides(in_shape) == _sides(out_shape):   # only axes of length 1 added or removed
            return step.layout
        raise step.refuse(f"A reshape from {in_shape} to {out_shape} rearranges the spatial grid, which the group's "
                          "turns would not move as they move the image", "keep the grid's axes as they are, or "
                          + CONVERT_UP_TO)
    if out_shape is not None and len(out_shape) == 2:
        return flatten(step)
    if isinstance(step.layout, Permuted) and out_shape is not None and len(out_shape) == 3:
        return tokens_from_channels_last(step)   # a (B, h, w, C) patch map to (B, h·w, C) tokens
    raise step.refuse(f"A reshape from {in_shape} to {out_shape} splits or shuffles channels",
                      "reshape only at orbit granularity (keep the channel axis intact), or " + CONVERT_UP_TO)


def _sides(shape_: tuple[int, ...]) -> list[int]:
    """The spatial axes of a channels-first shape that are longer than 1."""
    return [side for side in shape_[2:] if side != 1]


def no_tensor(step: Step) -> None:
    """size(), shape, getattr: not a tensor in a layout."""
    return None


def tied_layer(step: Step) -> Layout:
    return step.ctx.convert_layer(step)


def batch_norm(step: Step) -> Layout:
    return step.ctx.convert_batch_norm(step)


def affine_norm(step: Step) -> Layout:
    return step.ctx.convert_affine_norm(step)


def orbit_pool(step: Step) -> Layout:
    if not isinstance(step.layout, Orbit):
        raise step.refuse("An orbit pool needs an orbit layout", "pool only after converted layers")
    return Plain(step.layout.orbits)


def _add_library_rules() -> None:
    """Rules for torchvision's and timm's own ops, added once the library is in use (both are optional and slow to
    import)."""
    if "torchvision" in sys.modules and "torchvision" not in _libraries_added:
        from torchvision.ops import StochasticDepth, stochastic_depth

        MODULE_RULES[StochasticDepth] = passthrough
        FUNCTION_RULES[stochastic_depth] = passthrough
        _libraries_added.add("torchvision")
    if "timm" in sys.modules and "timm" not in _libraries_added:
        from timm.layers import DropPath

        MODULE_RULES[DropPath] = passthrough
        FUNCTION_RULES.update(timm_attention_functions())
        FUNCTION_RULES.update(timm_token_functions())
        FUNCTION_RULES.update(same_padding_rules())
        _libraries_added.add("timm")


_libraries_added: set[str] = set()


_POINTWISE_MODULES = (nn.ReLU, nn.ReLU6, nn.SiLU, nn.GELU, nn.Hardswish, nn.Hardsigmoid, nn.Sigmoid, nn.Tanh,
                      nn.LeakyReLU, nn.ELU, nn.Mish, nn.PReLU, nn.Dropout, nn.Dropout2d, nn.Identity, nn.MaxPool2d,
                      nn.AvgPool2d, nn.AdaptiveAvgPool2d, nn.AdaptiveMaxPool2d, nn.Upsample,
                      nn.UpsamplingNearest2d, nn.UpsamplingBilinear2d)

MODULE_RULES: dict[type, Rule] = {
    **{cls: passthrough for cls in _POINTWISE_MODULES},
    nn.Conv2d: tied_layer,
    nn.ConvTranspose2d: tied_layer,
    nn.Linear: tied_layer,
    nn.BatchNorm1d: batch_norm,
    nn.BatchNorm2d: batch_norm,
    nn.GroupNorm: affine_norm,
    nn.LayerNorm: affine_norm,
    nn.Flatten: flatten,
}

FUNCTION_RULES: dict[object, Rule] = {
    **{fn: passthrough for fn in (F.relu, F.relu6, F.silu, F.gelu, F.hardswish, F.hardsigmoid, F.leaky_relu, F.elu,
                                  torch.relu, torch.sigmoid, torch.tanh, F.dropout, F.max_pool2d, F.avg_pool2d,
                                  F.adaptive_avg_pool2d, F.adaptive_max_pool2d, F.interpolate, torch.clone,
                                  torch.rsqrt, torch.sqrt, torch.square, torch.abs, torch.exp)},
    **{fn: elementwise for fn in (operator.add, operator.iadd, operator.mul, operator.imul, operator.sub,
                                  operator.truediv, torch.add, torch.mul, torch.sub, operator.pow, torch.pow,
                                  torch.addcmul)},
    torch.cat: concatenate,
    torch.flatten: flatten,
    operator.getitem: take_part,
    torch.split: split_channels,
    torch.chunk: split_channels,
    torch.index_select: select_channels,
    shuffle_blocks: shuffle_channels,
    getattr: no_tensor,
}

METHOD_RULES: dict[str, Rule] = {
    **{name: passthrough for name in ("relu", "relu_", "sigmoid", "sigmoid_", "tanh", "clone", "contiguous",
                                      "rsqrt", "sqrt", "square", "abs", "exp")},
    **{name: elementwise for name in ("add", "add_", "mul", "mul_", "sub", "div", "pow", "addcmul")},
    "flatten": flatten,
    "split": split_channels,
    "chunk": split_channels,
    "view": reshape,
    "reshape": reshape,
    "size": no_tensor,
    "dim": no_tensor,
}



def rule_for(node: fx.Node, module: nn.Module | None) -> Rule | None:
    """The rule of a node: by module class (most derived first), function or method name."""
    _add_library_rules()
    if node.op == "call_module":
        for cls in type(module).__mro__:
            if cls in MODULE_RULES:
                return MODULE_RULES[cls]
        return None
    if node.op == "call_function":
        return FUNCTION_RULES.get(node.target)
    if node.op == "call_method":
        return METHOD_RULES.get(node.target)
    return None


def _register_orbify_modules() -> None:
    from orbify.layers.tied import OrbitPool

    MODULE_RULES[OrbitPool] = orbit_pool


_register_orbify_modules()
FUNCTION_RULES.update(CHANNELS_LAST_FUNCTIONS)
METHOD_RULES.update(CHANNELS_LAST_METHODS)
MODULE_RULES.update(TOKEN_MODULES)
FUNCTION_RULES.update(TOKEN_FUNCTIONS)   # token values first, then the channels-last and channel-part rules
METHOD_RULES.update(TOKEN_METHODS)
FUNCTION_RULES.update(HEAD_FUNCTIONS)   # attention written out with head reshapes
METHOD_RULES.update(HEAD_METHODS)
MODULE_RULES.update(CHANNEL_ATTENTION_MODULES)   # pooled channel vectors, convs along channels, weighted pooling
FUNCTION_RULES.update(channel_attention_functions(FUNCTION_RULES))
METHOD_RULES.update(channel_attention_methods(METHOD_RULES))
FUNCTION_RULES.update(channel_cut_functions(FUNCTION_RULES))   # channels-last concatenation
MODULE_RULES.update(PADDING_MODULES)   # symmetric pads; timm's "same" padding: _add_library_rules
FUNCTION_RULES.update(PADDING_FUNCTIONS)
FUNCTION_RULES.update(REDUCTION_FUNCTIONS)   # means, sums, variances, norms over all spatial axes or the channels
METHOD_RULES.update(REDUCTION_METHODS)
FUNCTION_RULES.update(FIXED_FILTER_FUNCTIONS)   # functional conv2d on a fixed buffer (blur pools)
FUNCTION_RULES.update(SHAPE_DECISION_FUNCTIONS)   # branches on input sizes fixed while tracing
