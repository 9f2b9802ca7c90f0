"""The conversion as the op rules see it (:class:`orbify.graph.rules.ConversionContext`): replacing layers."""

from __future__ import annotations

from collections.abc import Mapping

import torch
from torch import fx, nn

from orbify.conversion.channel_choice import ChannelChooser
from orbify.conversion.graph_edits import ModuleReplacer
from orbify.conversion.layer_builder import LayerBuilder
from orbify.conversion.norms import affine_norm_for, batch_norm_for
from orbify.conversion.recording import record_layer, record_norm
from orbify.conversion.state import ConversionState
from orbify.conversion.weight_loading import carry_layer_weights
from orbify.graph.rules import Step
from orbify.layers.tied import tie_affine
from orbify.symmetry.layouts import Layout
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

    @property
    def layouts(self) -> Mapping[fx.Node, Layout | None]:
        return self.state.layouts

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
        return layer.lout

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
        tie_affine(new, self.state.group, step.layout)
        self._put(step, old, new)
        return step.layout

    def _input_source(self, step: Step) -> torch.Tensor:
        """The original channel each channel of the step's (first) input carries."""
        return self.state.maps[step.node.all_input_nodes[0]].source

    def _put(self, step: Step, old: nn.Module, new: nn.Module) -> None:
        """Replace a norm layer and record it."""
        self.replacer.replace(step.node, new)
        record_norm(self.state, step.node, old, new, step.layout)
