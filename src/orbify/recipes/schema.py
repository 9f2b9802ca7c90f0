"""The recipe file format: its sections, keys, types and allowed values, and their validation.

A recipe file is TOML with five sections (see the README, "Recipes"):

``[recipe]``       ``description`` and the ``architectures`` it applies to;
``[convert]``      the options of :func:`orbify.convert` plus the ``input_size`` to convert at;
``[calibrate]``    how many of the user's images a calibrated conversion (``init = "calibrated"``) uses;
``[recalibrate]``  how many batches of the user's images re-estimate batch-norm statistics;
``[tune]``         defaults for :func:`orbify.tuning.loop.tune`.

:func:`validate` checks parsed TOML against :data:`SECTIONS` and fills in the defaults; every
problem is a :class:`~orbify.errors.RecipeError` that names the file, the key path (such as
``convert.budget``) and the allowed values.
"""

from __future__ import annotations

import difflib
import functools
import inspect
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

from orbify.conversion.converter import convert
from orbify.errors import GroupError, RecipeError
from orbify.files.source_arguments import TORCHVISION_PREFIX
from orbify.files.sources import EXAMPLE_SOURCE, FACTORY_PATTERN
from orbify.files.timm_source import TIMM_PREFIX
from orbify.graph.plan import BUDGETS, HEADS, INITS
from orbify.symmetry.groups import parse_group
from orbify.tuning.options import SCHEDULES, TuneOptions
from orbify.tuning.teacher import VIEW_COMBINATIONS

REQUIRED = object()
"""Marks a key without a default."""

_TYPE_NAMES = {str: "a string", int: "an integer", float: "a number", bool: "true or false",
               list: "a list of strings"}


@dataclass(frozen=True)
class Key:
    """One key of a section: its TOML type, default, allowed values and any further check.

    ``allowed`` is the text a user reads when the value is wrong. ``check`` returns a problem
    description for a value of the right type that is still not allowed (None when it is fine).
    """

    kind: type
    allowed: str
    default: object = REQUIRED
    check: Callable[[object], str | None] | None = None


def _choice(choices: tuple[str, ...]) -> Callable[[object], str | None]:
    return lambda value: None if value in choices else f"{value!r} is not one of them"


def _at_least(low: int) -> Callable[[object], str | None]:
    return lambda value: None if value >= low else f"{value} is below {low}"


def _positive(value: float) -> str | None:
    return None if math.isfinite(value) and value > 0 else f"{value} is not a positive finite number"


def _group(value: str) -> str | None:
    try:
        parse_group(value)
    except GroupError:
        return f"{value!r} is not a group name"
    return None


def _architectures(value: list) -> str | None:
    if not value:
        return "the list is empty"
    for entry in value:
        if not isinstance(entry, str):
            return f"{entry!r} is not a string"
        problem = _architecture(entry)
        if problem:
            return problem
    return None


def _architecture(entry: str) -> str | None:
    """None for a known torchvision name, ``example``, a ``timm:NAME`` that timm knows (any name when timm is not
    installed: it is checked when a model is built from it) or a ``package.module:factory`` reference."""
    if entry == EXAMPLE_SOURCE:
        return None
    if entry.startswith(TIMM_PREFIX):
        return _timm_problem(entry)
    name = entry[len(TORCHVISION_PREFIX):] if entry.startswith(TORCHVISION_PREFIX) else entry
    if ":" in name:
        return None if FACTORY_PATTERN.match(name) else f"{entry!r} is not of the form package.module:factory"
    known = _torchvision_names()
    if known is None or name in known:
        return None   # without torchvision, a name cannot be checked until a model is built from it
    close = difflib.get_close_matches(name, known, n=3)
    return f"torchvision has no model named {entry!r}" + (f" (close: {', '.join(close)})" if close else "")


def _timm_problem(entry: str) -> str | None:
    try:
        import timm
    except ImportError:
        return None
    name = entry[len(TIMM_PREFIX):]
    if timm.is_model(name):
        return None
    close = difflib.get_close_matches(name, timm.list_models(), n=3)
    return f"timm has no model named {name!r}" + (f" (close: {', '.join(close)})" if close else "")


@functools.cache
def _torchvision_names() -> frozenset[str] | None:
    try:
        import torchvision.models
    except ImportError:
        return None
    return frozenset(torchvision.models.list_models())


_TUNE = TuneOptions()

CONVERT_DEFAULTS: dict[str, object] = {
    name: inspect.signature(convert).parameters[name].default
    for name in ("group", "budget", "head", "init", "match", "stop_at", "repair_strides")}
"""The conversion options used where neither the command line nor a recipe sets them: the defaults of
:func:`orbify.convert` itself, read from its signature so that they have one home."""

#: Calibration images read when neither the command line nor the recipe says (docs/design.md §9: a few hundred).
CALIBRATION_IMAGES = 256

SECTIONS: dict[str, dict[str, Key]] = {
    "recipe": {
        "description": Key(str, "one line saying what the recipe is for"),
        "architectures": Key(list, "torchvision model names (e.g. \"resnet18\"), \"timm:NAME\" or \"package.module:factory\"",
                             check=_architectures),
    },
    "convert": {
        "group": Key(str, "cN or dN, e.g. \"c4\", \"d4\"", check=_group),
        "input_size": Key(int, "a safe square input size in pixels, ≥ 8 (every strided and resampling op exact); "
                               "`orbify sizes SOURCE` lists them", check=_at_least(8)),
        "budget": Key(str, ", ".join(BUDGETS), CONVERT_DEFAULTS["budget"], _choice(BUDGETS)),
        "head": Key(str, ", ".join(HEADS), CONVERT_DEFAULTS["head"], _choice(HEADS)),
        "init": Key(str, ", ".join(INITS), CONVERT_DEFAULTS["init"], _choice(INITS)),
        "match": Key(bool, "true or false", CONVERT_DEFAULTS["match"]),
        "stop_at": Key(str, "a graph node name or module path of the model, e.g. \"layer4\"",
                       CONVERT_DEFAULTS["stop_at"]),
        "repair_strides": Key(bool, "true or false: replace one op of each pair needing input sides of opposite "
                                    "parity (orbify convert --repair-strides)", CONVERT_DEFAULTS["repair_strides"]),
    },
    "calibrate": {
        "images": Key(int, "an integer ≥ 1: how many calibration images init = \"calibrated\" reads (evenly spaced)",
                      CALIBRATION_IMAGES, _at_least(1)),
    },
    "recalibrate": {
        "batches": Key(int, "an integer ≥ 0 (0: keep the converted statistics)", 8, _at_least(0)),
    },
    "tune": {
        "epochs": Key(int, "an integer ≥ 1", _TUNE.epochs, _at_least(1)),
        "lr": Key(float, "a positive number", _TUNE.lr, _positive),
        "batch_size": Key(int, "an integer ≥ 2", _TUNE.batch_size, _at_least(2)),
        "view_combination": Key(str, ", ".join(VIEW_COMBINATIONS), _TUNE.view_combination,
                                _choice(VIEW_COMBINATIONS)),
        "schedule": Key(str, ", ".join(SCHEDULES), _TUNE.schedule, _choice(SCHEDULES)),
    },
}


def validate(data: Mapping[str, object], path: Path) -> dict[str, dict[str, object]]:
    """Check parsed TOML against :data:`SECTIONS`; return every section with its defaults filled in."""
    for section in data:
        if section not in SECTIONS:
            raise _unknown(path, section, "table", "tables", tuple(SECTIONS))
    sections = {}
    for section, keys in SECTIONS.items():
        given = data.get(section, {})
        if not isinstance(given, Mapping):
            raise recipe_error(path, section, f"is {_type_name(given)}, not a table",
                               f"a [{section}] table with the keys {', '.join(keys)}")
        for key in given:
            if key not in keys:
                raise _unknown(path, f"{section}.{key}", "key", f"keys in [{section}]", tuple(keys))
        sections[section] = {key: _value(path, f"{section}.{key}", spec, given.get(key, REQUIRED))
                             for key, spec in keys.items()}
    convert = sections["convert"]
    if convert["init"] == "embed" and convert["budget"] != "fields":
        raise recipe_error(path, "convert.init", "\"embed\" needs budget = \"fields\"",
                           "init = \"orbit-average\" with any budget, or \"embed\" with budget = \"fields\"")
    return sections


def _value(path: Path, key_path: str, spec: Key, value: object) -> object:
    """The validated value of one key (its default when absent)."""
    if value is REQUIRED:
        if spec.default is REQUIRED:
            raise recipe_error(path, key_path, "is missing", spec.allowed)
        return spec.default
    if spec.kind is float and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)
    if not isinstance(value, spec.kind) or (spec.kind is int and isinstance(value, bool)):
        raise recipe_error(path, key_path, f"must be {_TYPE_NAMES[spec.kind]}, got {_type_name(value)} {value!r}",
                           spec.allowed)
    problem = spec.check(value) if spec.check else None
    if problem:
        raise recipe_error(path, key_path, f"has a value that is not allowed: {problem}", spec.allowed)
    return tuple(value) if isinstance(value, list) else value


def _unknown(path: Path, key_path: str, noun: str, kind: str, allowed: tuple[str, ...]) -> RecipeError:
    name = key_path.rpartition(".")[2]
    close = difflib.get_close_matches(name, allowed, n=1)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    return recipe_error(path, key_path, f"is not a known {noun}{hint}", f"{kind}: {', '.join(allowed)}")


def recipe_error(path: Path | str, key_path: str, problem: str, allowed: str) -> RecipeError:
    """A RecipeError for one key: what is wrong with it, where (file and key path) and the allowed values."""
    return RecipeError(f"Recipe key {key_path} {problem}", where=f"recipe file {path}, key {key_path}",
                       fix=f"allowed: {allowed}")


def _type_name(value: object) -> str:
    return {dict: "a table", list: "a list", str: "a string", bool: "a boolean", int: "an integer",
            float: "a number"}.get(type(value), type(value).__name__)
