"""Reading a model for a command: every SOURCE form the command line accepts, plain or converted."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import nn

from orbify.cli.app import console
from orbify.conversion.converter import convert
from orbify.data import ImageSet
from orbify.errors import OptionError
from orbify.files.saving import LoadedConversion, is_converted_file, load
from orbify.files.sources import LoadedSource, load_source, rebuild, usual_input_size
from orbify.graph.plan import ConversionPlan
from orbify.graph.sizes import choose_input_size, input_channels
from orbify.tuning.distributed import process_rank


@dataclass(frozen=True)
class Trust:
    """What the user allowed: unpickling a whole model (``--trust-pickle``) and running the code a converted
    file names (``--trust-source``)."""

    pickle: bool = False
    source: bool = False


def read_model(source: str, weights: Path | None = None, trust: Trust = Trust()) -> LoadedSource:
    """Build the model a SOURCE names; ``example`` is the bundled example model with its shipped weights.

    What loading the weights adapted (a wrapper's key prefix removed, entries that are not weights
    ignored) is printed as notes (see :func:`print_notes`)."""
    loaded = load_source(source, weights=weights, trust_pickle=trust.pickle, trust_source=trust.source)
    print_notes(loaded.notes)
    return loaded


def print_notes(notes: Iterable[str]) -> None:
    """Print each note of loading a weights file on the console, once: by the main process under ``torchrun``."""
    if process_rank() != 0:
        return
    for note in notes:
        console.print(f"[yellow]note:[/] {note}", highlight=False)


def read_converted(source: str, trust: Trust, original: str | None = None) -> LoadedConversion:
    """Read a converted file; ``original`` is the plain SOURCE the user typed beside it (consent for that factory)."""
    return load(source, trust_source=trust.source, original=original)


def is_converted_source(source: str) -> bool:
    """True when SOURCE names an existing converted-model file."""
    path = Path(source)
    return path.is_file() and is_converted_file(path)


@dataclass
class ModelPair:
    """A converted model with its plan and the plain original it is compared with."""

    converted: nn.Module
    plan: ConversionPlan
    original: nn.Module


def read_pair(source: str, original_source: str | None, weights: Path | None, trust: Trust, group: str,
              budget: str, head: str, init: str, input_size: int | None, channels: int | None,
              images: ImageSet | None = None) -> ModelPair:
    """The converted model, its plan and the original: converted in memory, or read from a converted file.

    A converted file without ``original_source`` comes with the plain architecture its recorded source
    rebuilds, with fresh weights (the file's consent rules apply, as in :func:`read_converted`): enough
    for cost and input-size safety, not for drift. ``weights`` then have no model to load into.
    """
    if is_converted_source(source):
        if original_source is None and weights is not None:
            raise OptionError("--weights with a converted file as SOURCE load into the plain model named by "
                              "--original, which is missing", where="option --weights",
                              fix="add --original SOURCE (the plain model the file came from), e.g. --original "
                                  "torchvision:resnet18 --weights resnet18.pt, or leave out --weights")
        loaded = read_converted(source, trust, original_source)
        if original_source is None:
            return ModelPair(loaded.module, loaded.plan, rebuild(str(loaded.metadata["source"])))
        original = read_model(original_source, weights, trust).module
        return ModelPair(loaded.module, loaded.plan, original)
    if original_source is not None:
        raise OptionError("--original is for a converted file as SOURCE; here SOURCE is converted in memory",
                          where="option --original", fix="leave out --original, or give a converted (.orb) file")
    original = read_model(source, weights, trust).module
    example = images.images[:1] if images is not None else example_input(original, source, input_size, channels)
    converted, plan = convert(original, group, budget, head, example, init=init)
    return ModelPair(converted, plan, original)


def example_input(model: nn.Module, source: str, input_size: int | None, channels: int | None) -> torch.Tensor:
    """A zero image (1, C, S, S) at the given size, or at the safe size nearest the architecture's usual one."""
    channels = channels or input_channels(model)
    size = choose_input_size(model, usual_input_size(source), requested=input_size, channels=channels).size
    return torch.zeros(1, channels, size, size)
