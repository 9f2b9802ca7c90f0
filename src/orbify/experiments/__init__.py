"""Reproducible experiments on data that packages ship (no downloads)."""
