"""The arguments of a ``torchvision:NAME?ARG=VALUE&ARG=VALUE`` source: their grammar and their checks.

:class:`TorchvisionSource` reads a source by its grammar alone (nothing imported or called) and writes
its canonical reference, arguments sorted. :func:`build_torchvision` then looks the name up in
torchvision's registry, checks every argument against the builder's signature
(:func:`builder_arguments`), counts the model's size on the meta device, and only then builds it,
with every ``weights*`` argument None: nothing is downloaded and nothing in a SOURCE is evaluated.
"""

from __future__ import annotations

import difflib
import inspect
import math
import re
import typing
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Callable, Union

import torch
from torch import nn

from orbify.errors import SourceError

TORCHVISION_PREFIX = "torchvision:"

ArgumentValue = Union[bool, int, float, str]
"""The value of an architecture argument in a SOURCE: a literal the grammar reads, never evaluated code."""

_ARGUMENT = re.compile(r"(?P<name>[A-Za-z_][A-Za-z0-9_]*)=(?P<value>[^&=]*)")
_INTEGER = re.compile(r"-?[0-9]{1,18}")
_NUMBER = re.compile(r"-?(?:[0-9]+\.[0-9]*|\.[0-9]+|[0-9]+(?=[eE]))(?:[eE][-+]?[0-9]+)?")
_WORD = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_BOOLEANS = {"true": True, "false": False}
_LITERAL_FORMS = "an integer (6), a decimal number (0.5, 1e-3), true or false, or a plain word (letters, digits, _)"
_TYPE_NAMES = {bool: "true or false", int: "an integer", float: "a number", str: "a plain word"}
_NOT_GIVEN = frozenset({"progress"})
"""Builder parameters a SOURCE may not set although their values are literals: the download progress bar."""
MOST_ELEMENTS = 2**31
"""The most numbers (parameters and buffers) a model built with arguments may hold, about 8 GiB in float32.
torchvision's largest classification models hold about 0.65e9 (its documentation's model table; from memory)."""


@dataclass(frozen=True)
class TorchvisionSource:
    """A ``torchvision:NAME?ARG=VALUE&...`` source read by its grammar alone: nothing is imported or called.

    ``name`` is lower case; ``arguments`` holds (name, value) pairs sorted by name, so that
    :attr:`reference` writes the same architecture one way only.
    """

    name: str
    arguments: tuple[tuple[str, ArgumentValue], ...] = ()

    @classmethod
    def parse(cls, spec: str) -> TorchvisionSource:
        """Read ``spec`` (starting ``torchvision:``); raise :class:`SourceError` for text outside the grammar.

        Argument names are identifiers; each value is an integer, a decimal number, ``true``/``false``
        or a plain word; arguments are joined with ``&`` and none may repeat.
        """
        name, marked, query = spec[len(TORCHVISION_PREFIX):].partition("?")
        values: dict[str, ArgumentValue] = {}
        for item in query.split("&") if marked else ():
            match = _ARGUMENT.fullmatch(item)
            if match is None:
                raise SourceError(f"{item!r} in the model source {spec!r} is not an argument NAME=VALUE",
                                  fix="write torchvision:NAME?NAME=VALUE, several joined with &, e.g. "
                                      "torchvision:resnet18?num_classes=6")
            if match["name"] in values:
                raise SourceError(f"The model source {spec!r} gives the argument {match['name']!r} twice",
                                  fix="give each argument once")
            values[match["name"]] = _literal(match["value"], match["name"], spec)
        return cls(name.lower(), tuple(sorted(values.items())))

    @property
    def reference(self) -> str:
        """The canonical source: ``torchvision:NAME`` and the arguments sorted, values written one way."""
        query = "&".join(f"{name}={format_argument(value)}" for name, value in self.arguments)
        return f"{TORCHVISION_PREFIX}{self.name}" + (f"?{query}" if query else "")

    def with_arguments(self, changes: Mapping[str, ArgumentValue]) -> TorchvisionSource:
        """The same architecture with ``changes`` set (added or replacing the values given)."""
        return TorchvisionSource(self.name, tuple(sorted({**dict(self.arguments), **changes}.items())))


def format_argument(value: ArgumentValue) -> str:
    """A value as the grammar reads it back: ``true``/``false``, ``6``, ``0.5`` (shortest round trip), a word."""
    if isinstance(value, bool):
        return "true" if value else "false"
    return repr(value) if isinstance(value, float) else str(value)


def _literal(text: str, name: str, spec: str) -> ArgumentValue:
    """The value ``text`` reads as, by :class:`TorchvisionSource`'s grammar."""
    if text.lower() in _BOOLEANS:
        return _BOOLEANS[text.lower()]
    if _INTEGER.fullmatch(text):
        return int(text)
    if _NUMBER.fullmatch(text) and math.isfinite(float(text)):
        return float(text)
    if _WORD.fullmatch(text):
        return text
    raise SourceError(f"The value {text!r} of the argument {name!r} in the model source {spec!r} is not a literal",
                      fix=f"write {_LITERAL_FORMS}; nothing in a SOURCE is evaluated")


def builder_arguments(builder: Callable[..., nn.Module]) -> dict[str, tuple[type, ...]]:
    """The arguments a SOURCE may give a torchvision ``builder``, each with the literal types it takes.

    They are the builder's keyword parameters with a default and, where it passes ``**kwargs`` on,
    those of the model class its return annotation names (and of that class's bases while their
    ``__init__`` passes ``**kwargs`` on too). Left out: the ``weights*`` parameters (nothing is
    downloaded), ``progress``, and parameters whose values are no literal (callables, lists).
    """
    accepted: dict[str, tuple[type, ...]] = {}
    for signature in _signatures(builder):
        for parameter in signature.parameters.values():
            kinds = _literal_kinds(parameter)
            if kinds and parameter.name not in _NOT_GIVEN and not _chooses_weights(parameter.name):
                accepted.setdefault(parameter.name, kinds)
    return accepted


def _signatures(builder: Callable[..., nn.Module]) -> Iterator[inspect.Signature]:
    """The builder's signature, then those its ``**kwargs`` reach (see :func:`builder_arguments`)."""
    signature = inspect.signature(builder)
    yield signature
    model_class = signature.return_annotation
    if not isinstance(model_class, type):
        return
    for base in model_class.__mro__:
        if not _passes_keywords(signature) or base in (nn.Module, object):
            return
        if "__init__" in vars(base):
            signature = inspect.signature(vars(base)["__init__"])
            yield signature


def _passes_keywords(signature: inspect.Signature) -> bool:
    return any(parameter.kind is inspect.Parameter.VAR_KEYWORD for parameter in signature.parameters.values())


def _chooses_weights(name: str) -> bool:
    """True for the builder parameters that choose pretrained weights to download."""
    return name == "weights" or name.startswith("weights_")


def _literal_kinds(parameter: inspect.Parameter) -> tuple[type, ...]:
    """The literal types a keyword parameter takes: its default's type, else its ``Optional[...]`` annotation's."""
    if parameter.kind not in (parameter.POSITIONAL_OR_KEYWORD, parameter.KEYWORD_ONLY) \
            or parameter.default is parameter.empty:
        return ()
    if parameter.default is None:
        annotation = parameter.annotation
        kinds = tuple(kind for kind in typing.get_args(annotation) or (annotation,) if kind in _TYPE_NAMES)
    else:
        kinds = tuple(kind for kind in _TYPE_NAMES if type(parameter.default) is kind)
    return kinds + (int,) if float in kinds and int not in kinds else kinds


def build_torchvision(spec: str) -> tuple[nn.Module, str]:
    """The model a torchvision source names, with every ``weights*`` argument None, and its canonical reference.

    Order of checks: the grammar, the name in torchvision's registry, each argument against the
    builder's signature, the model's size built on the meta device; only then the real build.
    """
    source = TorchvisionSource.parse(spec)
    builder = torchvision_builder(source.name)
    checked = TorchvisionSource(source.name, tuple(_checked_arguments(source, builder).items()))
    no_download = {name: None for name in inspect.signature(builder).parameters if _chooses_weights(name)}
    arguments = {**no_download, **dict(checked.arguments)}
    if checked.arguments:
        _refuse_oversized(builder, arguments, checked.reference)
    try:
        return builder(**arguments), checked.reference
    except Exception as error:
        raise SourceError(f"Building {checked.reference!r} raised {type(error).__name__}: {error}",
                          fix=f"check the arguments against the documentation of torchvision's {source.name}") \
            from error


def torchvision_builder(name: str) -> Callable[..., nn.Module]:
    """``torchvision.models.get_model_builder(name)``, once the name is found in torchvision's registry."""
    try:
        import torchvision.models
    except ImportError as error:
        raise SourceError(
            "torchvision:NAME sources need the torchvision package, which is not installed",
            fix="pip install torchvision",
        ) from error
    known = torchvision.models.list_models()
    if name not in known:
        close = difflib.get_close_matches(name, known, n=5)
        hint = f"close names: {', '.join(close)}" if close else "see torchvision.models.list_models()"
        raise SourceError(
            f"torchvision has no model named {name!r}", where=TORCHVISION_PREFIX + name, fix=hint
        )
    return torchvision.models.get_model_builder(name)


def _checked_arguments(source: TorchvisionSource, builder: Callable[..., nn.Module]) -> dict[str, ArgumentValue]:
    """The source's arguments, each one the builder accepts with a value of a type it takes (ints made floats
    where it takes numbers); raise :class:`SourceError` before anything is called otherwise."""
    accepted = builder_arguments(builder)
    checked: dict[str, ArgumentValue] = {}
    for name, value in source.arguments:
        if _chooses_weights(name):
            raise SourceError(f"The argument {name!r} would choose pretrained weights to download, and orbify "
                              "downloads nothing", where=source.reference,
                              fix="leave it out and give the weights file with --weights")
        if name not in accepted:
            listed = ", ".join(sorted(accepted)) or "none"
            raise SourceError(f"torchvision's {source.name} takes no argument {name!r}", where=source.reference,
                              fix=f"the arguments it accepts from a SOURCE: {listed}")
        kinds = accepted[name]
        if type(value) not in kinds:
            wanted = " or ".join(dict.fromkeys(_TYPE_NAMES[kind] for kind in kinds))
            raise SourceError(f"The argument {name}={format_argument(value)} of torchvision's {source.name} must "
                              f"be {wanted}", where=source.reference, fix=f"give {name} {wanted}")
        checked[name] = float(value) if float in kinds and type(value) is int else value
    return checked


def _refuse_oversized(builder: Callable[..., nn.Module], arguments: dict[str, object], reference: str) -> None:
    """Refuse arguments that make a model of more than :data:`MOST_ELEMENTS` numbers, counted on the meta
    device (no memory is taken). A builder that cannot run there (it reads tensor values) is let through."""
    try:
        with torch.device("meta"):
            state = builder(**arguments).state_dict()
    except Exception:
        return
    elements = sum(value.numel() for value in state.values() if isinstance(value, torch.Tensor))
    if elements > MOST_ELEMENTS:
        raise SourceError(f"{reference!r} would build a model of {elements:,} numbers, more than the "
                          f"{MOST_ELEMENTS:,} orbify builds from a source", where=reference,
                          fix="check the arguments' values")
