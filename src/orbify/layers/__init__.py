"""Tied layers on torch.nn.utils.parametrize, and baking them back into plain modules."""
