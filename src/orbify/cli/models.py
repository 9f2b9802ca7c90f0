"""Reading a model for a command: every SOURCE form the command line accepts."""

from __future__ import annotations

from pathlib import Path

from orbify.files.sources import LoadedSource, load_source


def read_model(source: str, weights: Path | None = None, trust_pickle: bool = False) -> LoadedSource:
    """Build the model a SOURCE names; ``example`` is the bundled example model with its shipped weights."""
    if source == "example":
        return load_source("orbify.example:load_example_model", weights=weights, trust_pickle=trust_pickle)
    return load_source(source, weights=weights, trust_pickle=trust_pickle)
