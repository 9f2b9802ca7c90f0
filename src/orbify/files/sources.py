"""Building a model from a SOURCE string, the way every command accepts it.

A SOURCE is one of, tried in this order:

``torchvision:NAME`` or ``torchvision:NAME?ARG=VALUE&ARG=VALUE``
    A torchvision architecture, e.g. ``torchvision:resnet18``, built with random weights
    (never downloaded; pretrained weights come from a separate weights file). Arguments set what
    the builder takes, e.g. ``torchvision:resnet18?num_classes=6`` for a fine-tuned head; each
    value is a literal (``6``, ``0.5``, ``true``, a plain word), never evaluated.
``timm:NAME``
    An architecture of the timm library, built with ``pretrained=False`` (never downloaded;
    :mod:`orbify.files.timm_source`); needs ``orbify[timm]``.
``example``, ``example-segment``, ``example-vit``
    The bundled example CNN (:mod:`orbify.example`), the bundled segmentation model, or the bundled
    vision transformer, with its shipped weights; rebuilt from a reference, the architecture alone.
a path to an existing file
    First offered to the file loaders added with :func:`register_file_loader` (the extension
    point for orbify's own file formats), then read as a whole model pickled with
    ``torch.save(model, path)``. Unpickling runs arbitrary code from the file, so that needs
    ``trust_pickle=True`` (``--trust-pickle`` on the command line).
``package.module:factory``
    An importable callable that takes no arguments and returns an ``nn.Module``; ``factory``
    may be a dotted attribute path such as ``Class.build``.

:func:`load_source` builds the model and optionally loads a weights file into it
(:func:`orbify.files.weights.load_weights_file`, which adapts training checkpoints and reports how);
:func:`rebuild` builds the architecture again from the ``reference`` string it reported. A SOURCE
the user typed may name a module in the working directory; a reference read from a file never
searches it (docs/design.md §16). Torchvision sources and their arguments are read and checked in
:mod:`orbify.files.source_arguments`.
"""

from __future__ import annotations

import difflib
import importlib
import os
import re
import sys
from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Callable

import torch
from torch import nn

from orbify.common.safe_io import PathLike, damaged_file_error, load_torch_weights, unsafe_globals
from orbify.errors import SourceError, TrustError
from orbify.files.source_arguments import TORCHVISION_PREFIX, build_torchvision
from orbify.files.timm_source import TIMM_PREFIX, build_timm
from orbify.files.weights import load_weights_file

EXAMPLE_SOURCE = "example"
EXAMPLE_SEGMENT_SOURCE = "example-segment"
EXAMPLE_VIT_SOURCE = "example-vit"
BUNDLED_FACTORIES = {
    EXAMPLE_SOURCE: "orbify.example.model:build_example_cnn",
    EXAMPLE_SEGMENT_SOURCE: "orbify.example.segment_model:build_example_segmenter",
    EXAMPLE_VIT_SOURCE: "orbify.example.vit_model:build_example_vit",
    "orbify.example.model:build_example_cnn": "orbify.example.model:build_example_cnn",
    "orbify.example:load_example_model": "orbify.example:load_example_model",
}
"""References to orbify's own examples, with the factory each calls: ``example``, ``example-segment``, ``example-vit``
and the two factory references that files written before ``example`` was a reference of its own record."""
_BUNDLED_WITH_WEIGHTS = {
    EXAMPLE_SOURCE: "orbify.example:load_example_model",
    EXAMPLE_SEGMENT_SOURCE: "orbify.example:load_example_segmenter",
    EXAMPLE_VIT_SOURCE: "orbify.example:load_example_vit",
}
"""The factory that builds each bundled example with its shipped weights (a SOURCE the user types)."""
FACTORY_PATTERN = re.compile(r"^(?P<module>[A-Za-z_][\w.]*):(?P<attribute>[A-Za-z_][\w.]*)$")
_ACCEPTED_FORMS = (
    "give torchvision:NAME (e.g. torchvision:resnet18), timm:NAME, example, example-segment, example-vit, "
    "package.module:factory, or the path of a model file"
)

IMAGENET_SIZE = 224
"""The usual input side of ImageNet backbones (torchvision's classification models; common practice)."""

EXAMPLE_SIZE = 33
"""The tile side of the bundled example, the SOURCE ``example`` (see :mod:`orbify.example.data`)."""
EXAMPLE_SEGMENT_SIZE = 49
"""The scene side of the bundled segmentation example, the SOURCE ``example-segment`` (see
:mod:`orbify.example.scenes`)."""
EXAMPLE_VIT_SIZE = 32
"""The tile side of the bundled vision transformer, the SOURCE ``example-vit``: a multiple of its patch (4; see
:mod:`orbify.example.vit_model`)."""


@dataclass(frozen=True)
class LoadedSource:
    """A model built from a SOURCE.

    ``module`` is in eval mode. ``reference`` rebuilds the architecture with :func:`rebuild`
    (``'torchvision:resnet18'``, ``'pkg.mod:factory'``); it is ``None`` for a model that only
    its file can recreate, such as a pickled whole model. ``notes`` come from
    :func:`orbify.files.weights.load_weights_file`.
    """

    module: nn.Module
    reference: str | None
    notes: tuple[str, ...] = ()
    """One line each on what loading the weights adapted (a wrapper's key prefix removed), for the caller to show."""


FileClaim = Callable[[Path], bool]
FileLoader = Callable[[Path, bool], LoadedSource]
_file_loaders: list[tuple[FileClaim, FileLoader]] = []


def register_file_loader(claims: FileClaim, load: FileLoader) -> Callable[[], None]:
    """Teach :func:`load_source` to read a file format; return a function that undoes it.

    For a SOURCE that names an existing file, loaders are asked in the order they were
    registered: the first whose ``claims(path)`` is true builds the model with
    ``load(path, trust_source)``. ``claims`` should look only at cheap signs (suffix, a magic
    header) and never raise; ``load`` should read with ``weights_only=True``, run code the file
    names only with ``trust_source`` (docs/design.md §16) and raise :class:`CheckpointError` for a
    damaged file. Files no loader claims are read as pickled whole models.
    """
    entry = (claims, load)
    _file_loaders.append(entry)

    def unregister() -> None:
        if entry in _file_loaders:
            _file_loaders.remove(entry)

    return unregister


def load_source(
    spec: str,
    *,
    weights: PathLike | None = None,
    trust_pickle: bool = False,
    trust_source: bool = False,
) -> LoadedSource:
    """Build the model that ``spec`` names, load ``weights`` into it and put it in eval mode.

    ``weights`` is a ``torch.save`` file read with ``weights_only=True``: a state dict, or a
    checkpoint holding one. Every key and shape must match the model, once a prefix that all its
    keys carry is removed (see :func:`orbify.files.weights.load_weights_file`, whose notes the
    result keeps). ``spec`` counts as typed by the user: a factory module may come
    from the working directory. ``trust_source`` lets a converted file given as ``spec`` run the
    factory and leaf types it records. Raises :class:`SourceError` for a SOURCE that cannot be built,
    :class:`TrustError` for a pickled model without ``trust_pickle`` or a converted file naming
    code without ``trust_source``, and :class:`CheckpointError` for an unreadable or mismatched file.
    """
    loaded = _build(spec, trust_pickle=trust_pickle, trust_source=trust_source)
    if weights is not None:
        loaded = replace(loaded, notes=load_weights_file(loaded.module, weights, reference=loaded.reference))
    loaded.module.eval()
    return loaded


def rebuild(reference: str, *, working_directory: bool = False) -> nn.Module:
    """Build the architecture that a :class:`LoadedSource` ``reference`` names, in eval mode.

    The weights are freshly initialised (the example's factory of older files loads its shipped
    ones): no weights are read or downloaded. A torchvision name is looked up in torchvision's
    registry, and its arguments checked against the builder's signature, before anything is
    built. ``working_directory`` lets a factory's module be found in the working directory: only
    for a reference the user typed, never for one read from a file.
    """
    if reference.startswith(TORCHVISION_PREFIX):
        module = build_torchvision(reference)[0]
    elif reference.startswith(TIMM_PREFIX):
        module = build_timm(reference)[0]
    elif reference in BUNDLED_FACTORIES:
        module = _build_factory(BUNDLED_FACTORIES[reference], working_directory=False)
    elif FACTORY_PATTERN.match(reference):
        module = _build_factory(reference, working_directory=working_directory)
    else:
        raise SourceError(
            f"{reference!r} is not a reference that can be rebuilt",
            fix="use torchvision:NAME, timm:NAME, example, example-segment, example-vit or package.module:factory",
        )
    return module.eval()


def usual_input_size(source: str) -> tuple[int, str]:
    """The input side the architecture a SOURCE names is usually run at, with what that guess rests on.

    ``example`` → 33 (its tile size); ``example-segment`` → 49 (its scene size); ``example-vit`` → 32
    (its tile size, a multiple of its patch); ``torchvision:NAME`` (with or
    without arguments) → 224 (ImageNet backbones); anything else → 224, the most common size of pretrained
    backbones.
    """
    if source == EXAMPLE_SOURCE:
        return EXAMPLE_SIZE, "the bundled example's tile size"
    if source == EXAMPLE_SEGMENT_SOURCE:
        return EXAMPLE_SEGMENT_SIZE, "the bundled segmentation example's scene size"
    if source == EXAMPLE_VIT_SOURCE:
        return EXAMPLE_VIT_SIZE, "the bundled vision transformer's tile size"
    if source.startswith(TORCHVISION_PREFIX):
        return IMAGENET_SIZE, "the usual input of torchvision's ImageNet backbones"
    if source.startswith(TIMM_PREFIX):
        return IMAGENET_SIZE, "the usual input of timm's ImageNet backbones"
    return IMAGENET_SIZE, "the usual input of ImageNet backbones, assumed for a model of unknown origin"


def _build(spec: str, *, trust_pickle: bool, trust_source: bool) -> LoadedSource:
    """Dispatch on the form of ``spec`` (see the module docstring for the order)."""
    if not spec.strip():
        raise SourceError("No model source was given", fix=_ACCEPTED_FORMS)
    if spec.startswith(TORCHVISION_PREFIX):
        module, reference = build_torchvision(spec)
        return LoadedSource(module.eval(), reference)
    if spec.startswith(TIMM_PREFIX):
        module, reference = build_timm(spec)
        return LoadedSource(module.eval(), reference)
    if spec in _BUNDLED_WITH_WEIGHTS:
        return LoadedSource(_build_factory(_BUNDLED_WITH_WEIGHTS[spec], working_directory=False), spec)
    path = Path(spec)
    if path.is_file():
        return _load_file(path, trust_pickle=trust_pickle, trust_source=trust_source)
    if FACTORY_PATTERN.match(spec):
        return LoadedSource(rebuild(spec, working_directory=True), spec)
    if path.exists():
        raise SourceError(f"The model source {spec!r} is a directory, not a file", fix=_ACCEPTED_FORMS)
    if path.suffix or "/" in spec or "\\" in spec:
        raise SourceError(f"The model file {spec!r} does not exist", fix="check the path; " + _ACCEPTED_FORMS)
    raise SourceError(f"{spec!r} is not a model source orbify understands", fix=_ACCEPTED_FORMS)


def import_module(module_name: str, *, working_directory: bool):
    """Import a module with the working directory searched (``working_directory``) or not.

    Searched, the import behaves as under ``python -m``: a user's own model file in the folder they
    run ``orbify`` from is found although console scripts leave that folder off ``sys.path``. Not
    searched, the folder (``''``, ``'.'`` or its absolute path) is taken off ``sys.path`` while the
    import runs, so a file dropped next to a downloaded model cannot stand in for a module.
    """
    here = os.path.abspath(os.getcwd())
    saved = list(sys.path)
    if working_directory:
        if here not in sys.path and "" not in sys.path:
            sys.path.insert(0, here)
    else:
        sys.path[:] = [entry for entry in sys.path if os.path.abspath(entry or os.curdir) != here]
    try:
        return importlib.import_module(module_name)
    finally:
        added = [entry for entry in sys.path if entry not in saved and entry != here]
        sys.path[:] = saved + added


def _build_factory(spec: str, *, working_directory: bool) -> nn.Module:
    """Import ``package.module`` and call ``factory()``; it must return an ``nn.Module``."""
    module_name, attribute_path = spec.split(":", 1)
    try:
        namespace = import_module(module_name, working_directory=working_directory)
    except ModuleNotFoundError as error:
        if error.name is not None and (module_name == error.name or module_name.startswith(error.name + ".")):
            raise SourceError(
                f"Cannot import the module {module_name!r} of the model source {spec!r}",
                fix="install the package, or run from the folder that holds it "
                "or add that folder to PYTHONPATH",
            ) from error
        raise SourceError(
            f"Importing {module_name!r} failed because it needs the missing module {error.name!r}",
            where=spec,
            fix=f"install the package that provides {error.name!r}",
        ) from error
    except Exception as error:
        raise SourceError(
            f"Importing {module_name!r} raised {type(error).__name__}: {error}",
            where=spec,
            fix="fix the error in that module",
        ) from error
    factory: object = namespace
    for part in attribute_path.split("."):
        if not hasattr(factory, part):
            names = [name for name in dir(factory) if not name.startswith("_")]
            close = difflib.get_close_matches(part, names, n=5)
            hint = f"close names: {', '.join(close)}" if close else "check the name after the colon"
            raise SourceError(f"{module_name!r} has no attribute {attribute_path!r}", where=spec, fix=hint)
        factory = getattr(factory, part)
    if not callable(factory):
        raise SourceError(
            f"{attribute_path!r} in {module_name!r} is a {type(factory).__name__}, not a callable factory",
            where=spec,
            fix="name a function or class that builds the model when called without arguments",
        )
    try:
        model = factory()
    except Exception as error:
        raise SourceError(
            f"Calling the model factory {spec!r} raised {type(error).__name__}: {error}",
            fix="the factory must build the model when called without arguments; "
            "wrap it in a function that supplies them",
        ) from error
    if not isinstance(model, nn.Module):
        raise SourceError(
            f"The model factory {spec!r} returned a {type(model).__name__}, not a torch.nn.Module",
            fix="return the model itself",
        )
    return model


def _load_file(path: Path, *, trust_pickle: bool, trust_source: bool) -> LoadedSource:
    """A registered file format, or else a pickled whole model (only with ``trust_pickle``)."""
    for claims, load in _file_loaders:
        if claims(path):
            return load(path, trust_source)
    if not trust_pickle:
        refused = unsafe_globals(path)
        if refused:
            raise TrustError(
                f"The model file {str(path)!r} is a pickled Python object ({', '.join(refused[:5])}); "
                "loading it runs arbitrary code stored in the file",
                fix="pass --trust-pickle (trust_pickle=True) only if you trust where the file came from; "
                "otherwise give the architecture as SOURCE and a state dict with --weights",
            )
        content = load_torch_weights(path, what="model file")
        raise _not_a_model(path, content)
    try:
        content = torch.load(path, weights_only=False, map_location="cpu")
    except (ModuleNotFoundError, AttributeError) as error:
        raise SourceError(
            f"The pickled model {str(path)!r} refers to code that cannot be imported ({error})",
            fix="make the package that defines the model's classes importable "
            "(install it or add its folder to PYTHONPATH)",
        ) from error
    except Exception as error:
        raise damaged_file_error(path, "model file", error) from error
    if not isinstance(content, nn.Module):
        raise _not_a_model(path, content)
    return LoadedSource(content, None)


def _not_a_model(path: Path, content: object) -> SourceError:
    """The error for a model file that holds something other than a model."""
    if isinstance(content, Mapping):
        return SourceError(
            f"The model file {str(path)!r} holds weights (a dict), not a model",
            fix="give the architecture as SOURCE (torchvision:NAME or package.module:factory) "
            "and this file with --weights",
        )
    return SourceError(
        f"The model file {str(path)!r} holds a {type(content).__name__}, not a torch.nn.Module",
        fix=_ACCEPTED_FORMS,
    )
