"""Distilling the group-averaged original into the converted model, in one process or many."""
