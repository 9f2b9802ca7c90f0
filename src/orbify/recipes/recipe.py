"""A loaded recipe: its settings, the options it gives to convert and tune, and its checks on a model."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType

from torch import nn

from orbify.errors import OptionError, SourceError
from orbify.files.source_arguments import TORCHVISION_PREFIX, TorchvisionSource
from orbify.files.sources import EXAMPLE_SOURCE
from orbify.graph.sizes import SizeChecker
from orbify.graph.stride_repair import repaired_model
from orbify.recipes.schema import recipe_error


@dataclass(frozen=True)
class Recipe:
    """How a family of architectures is best converted and tuned, read from one TOML file.

    ``name`` is the file name without ``.toml``; ``text`` the file as written (for display).
    ``settings`` maps each section ("recipe", "convert", "calibrate", "recalibrate", "tune") to its keys,
    defaults filled in (see :mod:`orbify.recipes.schema`).
    """

    name: str
    path: Path
    text: str
    settings: Mapping[str, Mapping[str, object]]

    def __post_init__(self):
        frozen = {section: MappingProxyType(dict(keys)) for section, keys in self.settings.items()}
        object.__setattr__(self, "settings", MappingProxyType(frozen))

    @property
    def description(self) -> str:
        return self.settings["recipe"]["description"]

    @property
    def architectures(self) -> tuple[str, ...]:
        """The architectures as written: torchvision names, ``timm:NAME`` or ``package.module:factory``."""
        return self.settings["recipe"]["architectures"]

    @property
    def sources(self) -> tuple[str, ...]:
        """Each architecture as a model SOURCE (``torchvision:NAME``, ``timm:NAME`` or ``package.module:factory``)."""
        return tuple(_source(architecture) for architecture in self.architectures)

    @property
    def group(self) -> str:
        return self.settings["convert"]["group"]

    @property
    def budget(self) -> str:
        return self.settings["convert"]["budget"]

    @property
    def input_size(self) -> int:
        return self.settings["convert"]["input_size"]

    @property
    def calibration_images(self) -> int:
        """How many of the user's images a calibrated conversion reads."""
        return self.settings["calibrate"]["images"]

    @property
    def recalibrate_batches(self) -> int:
        """How many batches of the user's images re-estimate the batch-norm statistics (0: none)."""
        return self.settings["recalibrate"]["batches"]

    def applies_to(self, architecture: str) -> bool:
        """Whether ``architecture`` (a name, ``torchvision:NAME`` or ``package.module:factory``) is listed.

        A torchvision source counts by its name alone: ``torchvision:resnet18?num_classes=6`` is resnet18.
        """
        return _without_arguments(_source(architecture)) in self.sources

    def convert_options(self) -> dict[str, object]:
        """Keyword arguments for :func:`orbify.convert` (group, budget, head, init, match, stop_at) plus
        ``input_size``, the square size of the example input to convert at."""
        return dict(self.settings["convert"])

    def tune_options(self) -> dict[str, object]:
        """Keyword arguments for :func:`orbify.tuning.loop.tune`: epochs, lr, batch_size, view_combination, schedule and
        ``recalibrate`` (whether batch-norm statistics are re-estimated before the first epoch)."""
        return {**self.settings["tune"], "recalibrate": self.recalibrate_batches > 0}

    def check_input_size(self, model: nn.Module, size: int | None = None, channels: int = 3) -> None:
        """Raise RecipeError (key ``convert.input_size``) unless ``size`` (default: the recipe's) is safe
        for ``model`` (repaired first when the recipe says ``repair_strides``): every strided and resampling
        op samples a grid the rotations map onto itself."""
        size = self.input_size if size is None else size
        if self.settings["convert"]["repair_strides"]:
            model, _ = repaired_model(model, channels, size)
        checker = SizeChecker(model, channels)
        if checker.is_safe(size):
            return
        try:
            reason = f"the first strided or resampling op that breaks is {checker.violations(size)[0]}"
        except Exception as error:   # the model does not run at this size at all
            reason = f"the model does not run at it ({type(error).__name__}: {error})"
        raise recipe_error(self.path, "convert.input_size", f"is {size}, not a safe size for this model: {reason}",
                           f"the safe sizes nearest {size}: {checker.nearby(size, 5)}")


def merge_options(recipe: Recipe, overrides: Mapping[str, object], section: str = "convert") -> dict[str, object]:
    """The recipe's options for ``section`` ("convert" or "tune") with ``overrides`` applied on top.

    An override of ``None`` means "not given" and keeps the recipe's value; any other value wins,
    as an explicit command-line option overrides the recipe. Raises OptionError for a key the
    section does not have.
    """
    options = {"convert": recipe.convert_options, "tune": recipe.tune_options}
    if section not in options:
        raise OptionError(f"Unknown recipe option section {section!r}", where="merge_options",
                          fix="use section='convert' or section='tune'")
    merged = options[section]()
    for key, value in overrides.items():
        if key not in merged:
            raise OptionError(f"{key!r} is not a {section} option of a recipe", where="merge_options",
                              fix=f"use one of: {', '.join(merged)}")
        if value is not None:
            merged[key] = value
    return merged


def _source(architecture: str) -> str:
    if architecture == EXAMPLE_SOURCE or architecture.startswith(TORCHVISION_PREFIX) or ":" in architecture:
        return architecture
    return TORCHVISION_PREFIX + architecture


def _without_arguments(source: str) -> str:
    """``torchvision:NAME`` for a torchvision source with arguments (read by its grammar, name in lower case);
    any other source, or text outside the grammar, as it is."""
    if not source.startswith(TORCHVISION_PREFIX):
        return source
    try:
        return TORCHVISION_PREFIX + TorchvisionSource.parse(source).name
    except SourceError:
        return source
