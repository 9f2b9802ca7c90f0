"""The conversion as the op rules see it (:class:`orbify.graph.rules.ConversionContext`): replacing layers, tying
per-channel tensors."""

from __future__ import annotations

from collections.abc import Mapping

import torch
from torch import fx, nn

from orbify.conversion.channel_choice import ChannelChooser
from orbify.conversion.graph_edits import ModuleReplacer
from orbify.conversion.layer_builder import LayerBuilder, TiedLayer
from orbify.conversion.norms import affine_norm_for, batch_norm_for
from orbify.conversion.recording import record_layer, record_norm
from orbify.conversion.state import ConversionState
from orbify.conversion.token_weights import TiedTensors, resampling_note
from orbify.conversion.weight_loading import carry_layer_weights
from orbify.graph.channel_attention import ORBITWISE_NOTE
from orbify.graph.channels_last import TENSOR_HOLDER, ChannelParameter
from orbify.graph.rules import Step
from orbify.graph.tokens import TokenParameter
from orbify.layers.orbitwise import orbitwise_conv1d
from orbify.layers.tied import tie_affine, tie_channel_tensor, tie_entries
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout, unpermuted
from orbify.transfer.attention import attention_residual, attention_weights, carry_attention, token_tensor_rows
from orbify.transfer.channels import ChannelMap, rows
from orbify.transfer.norms import load_norm_rows


class LayerConverter:
    """Replaces each conv / linear / norm the walk reaches by its tied counterpart, weights carried, and records it.

    ``plain_outputs``: the layer nodes whose output stays plain (head layers, layers after a stop).
    """

    def __init__(self, state: ConversionState, plain_outputs: set[fx.Node]):
        self.state = state
        self.builder = LayerBuilder(state, plain_outputs, self)
        self.chooser = ChannelChooser(state, self.builder)
        self.replacer = ModuleReplacer(state.gm)
        self.tied_tensors = TiedTensors(state.plan.notes)   # per-channel and token tensors tied so far

    @property
    def layouts(self) -> Mapping[fx.Node, Layout | None]:
        return self.state.layouts

    @property
    def group(self) -> Group:
        return self.state.group

    def convert_layer(self, step: Step) -> Layout:
        state, node = self.state, step.node
        layer = self.builder.layer(node, step)
        out_map, identity_map = self.chooser.output_maps(node, layer)
        residual = identity_residual = None
        if state.carry:
            residual, identity_residual = carry_layer_weights(state, layer, node.all_input_nodes[0], out_map,
                                                              identity_map)
        self.replacer.replace(node, layer.new)
        self.builder.done(node)
        state.maps[node], state.identity_maps[node] = out_map, identity_map
        record_layer(state, node, layer, residual, identity_residual)
        if layer.axes is not None:   # over the last axis of a channels-last value: recorded with its axes
            entry = state.plan.layers[-1]
            entry.layout_in, entry.layout_out = layer.permuted(layer.lin), layer.permuted(layer.lout)
        return layer.permuted(layer.lout)

    def convert_batch_norm(self, step: Step) -> Layout:
        old = self.state.module(step.node)
        new = batch_norm_for(old, step.layout, self._input_source(step), self.state.group, self.state.carry)
        self._put(step, old, new)
        return step.layout

    def convert_affine_norm(self, step: Step) -> Layout:
        old = self.state.module(step.node)
        new = affine_norm_for(step, old, self.state.group)
        source = self._input_source(step)
        if self.state.carry and getattr(old, "weight", None) is not None:
            load_norm_rows(new, old, source)
        tie_affine(new, self.state.group, unpermuted(step.layout))
        self._put(step, old, new)
        return step.layout

    def tie_channel_parameter(self, step: Step, parameter: ChannelParameter) -> None:
        """Tie a per-channel tensor (a layer scale) per orbit, its entries those of the channels it meets.

        The entries are picked by the channel map of the value it multiplies (so the widths may change)
        and averaged per orbit; a tensor used again must meet the same layout. The plan's notes list them.
        """
        state = self.state
        if self.tied_tensors.seen(step, parameter.attribute.target, parameter.layout):
            return
        owner, name = tensor_owner(self.state.gm, parameter.attribute)
        target = parameter.attribute.target   # changed when the tensor moved from the top module
        old = getattr(owner, name).detach()
        source = self._value_source(step)
        if source.numel() != old.numel() and any(old.numel() in _integers(node.args) for node in parameter.shaping):
            raise step.refuse(f"The per-channel tensor '{target}' is reshaped to its {old.numel()} channels by "
                              f"number, but the converted value has {source.numel()}",
                              "reshape it with -1 for the channel axis, or use the 'channels' budget")
        value = rows(old.reshape(-1), source).reshape(tuple(source.numel() if size > 1 else 1 for size in old.shape))
        tie_channel_tensor(owner, name, value, state.group, parameter.layout)
        self.tied_tensors.add("per-channel tensors tied per orbit (orbit-averaged)", target, parameter.layout)

    def tie_token_parameter(self, step: Step, parameter: TokenParameter) -> None:
        """Tie a class token or position embedding over the joint orbits of tokens and channels, its channel entries
        those of the channels of the tokens it meets; the plan's notes list them."""
        if self.tied_tensors.seen(step, parameter.attribute.target, parameter.layout):
            return
        owner, name = tensor_owner(self.state.gm, parameter.attribute)
        value = token_tensor_rows(getattr(owner, name).detach(), self._value_source(step), parameter.layout)
        tie_entries(owner, name, value, parameter.layout.entry_permutation(self.group, tuple(value.shape)))
        if parameter.resampling is not None:   # resampled to the input's grid: how exact elsewhere, measured
            self.state.plan.notes.append(resampling_note(parameter, getattr(owner, name).detach(), self.group))
        self.tied_tensors.add("token tensors averaged over the joint orbits of patch tokens and channels",
                        parameter.attribute.target, parameter.layout)

    def convert_attention(self, step: Step) -> Layout:
        """Replace a self-attention module by its tied counterpart (identity channel assignment inside it)."""
        state, node, layout = self.state, step.node, step.layout
        old, new = state.module(node), self.builder.attention(step, layout)
        residual = identity_residual = None
        if state.carry:
            in_node = node.all_input_nodes[0]
            residual = identity_residual = carry_attention(new, old, state.maps[in_node])
            if state.identity_maps[in_node] is not state.maps[in_node]:
                identity_residual = attention_residual(new, attention_weights(old, state.identity_maps[in_node]))
        self.replacer.replace(node, new)
        record_layer(state, node, TiedLayer(old, new, layout, layout), residual, identity_residual)
        return layout

    def convert_channel_conv(self, step: Step) -> Layout:
        """A 1-D conv along a pooled vector's orbit channels: :func:`convert_orbitwise`."""
        return convert_orbitwise(self.state, self.replacer, step)

    def add_note(self, text: str) -> None:
        """Add a line to the plan's notes."""
        self.state.plan.notes.append(text)

    def keep_original_channels(self, step: Step, channels: int) -> None:
        """Give ``step``'s value the identity map of ``channels`` channels (attention heads split from, or merged
        into, a value holding the original's channels in order); refused when its input holds others."""
        state = self.state
        held = state.maps[step.node.all_input_nodes[0]]
        if held.new != held.original or not torch.equal(held.source, torch.arange(held.new)):
            raise step.refuse("Attention heads split from channels that do not stand for the original's in order",
                              "keep the width of the layer before the heads (the 'channels' budget), or convert only "
                              "up to the node before it")
        state.maps[step.node] = state.identity_maps[step.node] = ChannelMap.identity(channels)

    def _value_source(self, step: Step) -> torch.Tensor:
        """The original channel of every channel of the value ``step``'s model tensor meets."""
        state = self.state
        return next(state.maps[arg] for arg in step.node.all_input_nodes if state.layouts.get(arg) is not None).source

    def _input_source(self, step: Step) -> torch.Tensor:
        """The original channel each channel of the step's (first) input carries."""
        return self.state.maps[step.node.all_input_nodes[0]].source

    def _put(self, step: Step, old: nn.Module, new: nn.Module) -> None:
        """Replace a norm layer and record it."""
        self.replacer.replace(step.node, new)
        record_norm(self.state, step.node, old, new, step.layout)


def convert_orbitwise(state: ConversionState, replacer: ModuleReplacer, step: Step) -> Layout:
    """Replace the 1-D conv along the orbit channels of a pooled vector by the same kernel run along the orbits,
    slot by slot; recorded (as a layer its layout passes through) with the note of how it differs from the original,
    on the layer and in the plan's notes, which list every such conv in one note."""
    old = state.module(step.node)
    new = orbitwise_conv1d(old, state.group.order)
    replacer.replace(step.node, new)
    record_norm(state, step.node, old, new, step.layout)
    state.plan.layers[-1].notes.append(ORBITWISE_NOTE)
    notes = state.plan.notes
    listed = next((i for i, note in enumerate(notes) if note.startswith(ORBITWISE_NOTE)), None)
    if listed is None:
        notes.append(f"{ORBITWISE_NOTE}: '{step.node.target}'")
    else:
        notes[listed] += f", '{step.node.target}'"
    return step.layout


def _integers(args) -> set[int]:
    """The integers among (nested) node arguments."""
    found: set[int] = set()
    for arg in args:
        if isinstance(arg, (tuple, list)):
            found |= _integers(arg)
        elif isinstance(arg, int) and not isinstance(arg, bool):
            found.add(arg)
    return found


def tensor_owner(gm: fx.GraphModule, attribute: fx.Node) -> tuple[nn.Module, str]:
    """The module holding a ``get_attr`` node's tensor, and the tensor's name there.

    A tensor of the top module moves into its child :data:`TENSOR_HOLDER` first (every ``get_attr`` of it
    follows): a GraphModule cannot be parametrized itself.
    """
    owner_name, _, name = attribute.target.rpartition(".")
    if owner_name:
        return gm.get_submodule(owner_name), name
    if TENSOR_HOLDER not in gm._modules:
        gm.add_module(TENSOR_HOLDER, nn.Module())
    holder = gm.get_submodule(TENSOR_HOLDER)
    if name in gm._parameters:
        holder.register_parameter(name, gm._parameters.pop(name))
    elif name in gm._buffers:
        holder.register_buffer(name, gm._buffers.pop(name), persistent=name not in gm._non_persistent_buffers_set)
    else:
        setattr(holder, name, getattr(gm, name))
        delattr(gm, name)
    for node in gm.graph.find_nodes(op="get_attr", target=name):
        node.target = f"{TENSOR_HOLDER}.{name}"
    return holder, name
