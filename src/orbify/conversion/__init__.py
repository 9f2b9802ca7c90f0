"""Whole-model conversion: the walk over the graph that rewrites layers and carries their weights."""
