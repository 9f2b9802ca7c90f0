"""Carrying pretrained weights into tied layers: channel maps, channel matching, batch-norm re-estimation."""
