"""Whole-model conversion: the walk over the graph that rewrites layers and carries their weights.

:mod:`~orbify.conversion.converter` holds :func:`convert`, the entry point. The parts of one
conversion share a :class:`~orbify.conversion.state.ConversionState`:
:mod:`~orbify.conversion.walk` (the walk, node by node), :mod:`~orbify.conversion.graph_edits`
(orbit pools, module swaps), :mod:`~orbify.conversion.layer_converter` (what the op rules call),
:mod:`~orbify.conversion.layer_builder` and :mod:`~orbify.conversion.norms` (the new modules),
:mod:`~orbify.conversion.channel_choice` (output channel maps, channel matching),
:mod:`~orbify.conversion.weight_loading` (carrying the weights) and
:mod:`~orbify.conversion.recording` (the plan).
"""
