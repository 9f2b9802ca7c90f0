"""The converted-model file (``.orb``): tied weights plus a JSON description, loaded without pickled code.

A converted-model file (docs/design.md §15) is a ``torch.save`` archive of a dict with exactly two entries:

``"orbify_conversion"``
    A JSON string: ``format`` (:data:`FORMAT_NAME`), ``format_version`` ("major.minor"),
    ``orbify_version``, ``torch_version``, ``source`` (the reference that rebuilds the plain
    architecture, e.g. ``'torchvision:resnet18'``), ``conversion`` (the options that fix the
    converted structure: group, budget, head, init, stop_at, input_shape, leaf_types by
    ``module:qualname``, dtype), ``recipe`` (a name or null), ``plan``
    (:meth:`ConversionPlan.to_dict`) and ``check`` (figures from a check, or null).
``"state_dict"``
    The converted model's state dict: the *base* (tied) tensors of every parametrized weight
    (``...parametrizations.weight.original``), plain parameters and the norm-layer buffers.
    Nothing is expanded, so a c4 model stores about a quarter of the original's numbers.

Reading never unpickles code: :func:`load` reads the archive with ``weights_only=True``, rebuilds
the plain architecture from ``source``, converts it again with the recorded options and loads the
state dict with strict key matching. A ``source`` or leaf type outside torchvision's registry and
the bundled example is imported only with the user's consent (:mod:`orbify.files.consent`). A file whose major format version differs from
:data:`FORMAT_VERSION` is refused; a newer minor version is read (it may only add fields).

Importing this module teaches every model SOURCE (:func:`orbify.files.sources.load_source`) to read
converted-model files.
"""

from __future__ import annotations

import json
import zipfile
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import fx, nn

from orbify.calibration.report import CalibrationReport
from orbify.common.safe_io import PathLike, atomic_write, load_torch_weights
from orbify.conversion.converter import convert
from orbify.errors import CheckpointError, OptionError, OrbifyError, SourceError
from orbify.files.consent import Consent, require_consent
from orbify.files.sources import LoadedSource, import_module, rebuild, register_file_loader
from orbify.graph.plan import ConversionPlan

FORMAT_NAME = "orbify-converted-model"
FORMAT_VERSION = (1, 0)
SUFFIX = ".orb"
DESCRIPTION_KEY = "orbify_conversion"
STATE_KEY = "state_dict"
_WHAT = "converted-model file"
_LISTED_KEYS = 5


@dataclass(frozen=True)
class LoadedConversion:
    """A converted model read back from a file.

    ``module`` is the converted GraphModule in eval mode, ``plan`` the conversion plan stored with
    it and ``metadata`` the whole parsed JSON description (see the module docstring).
    """

    module: fx.GraphModule
    plan: ConversionPlan
    metadata: dict


def save(converted: fx.GraphModule, plan: ConversionPlan, path: PathLike, *, reference: str | None,
         recipe: str | None = None, check: Mapping | None = None, leaf_types: tuple[type, ...] = (),
         force: bool = False) -> Path:
    """Write ``converted`` (as returned by :func:`orbify.convert`) to a converted-model file atomically.

    Args:
        converted: the converted GraphModule, possibly tuned since (same structure).
        plan: the plan :func:`orbify.convert` returned with it.
        path: the output file; :data:`SUFFIX` (``.orb``) is the usual extension.
        reference: the plain architecture's source reference (:attr:`LoadedSource.reference`),
            ``'torchvision:NAME'``, ``'example'`` or ``'package.module:factory'`` (a factory is
            rebuilt on loading only with the reader's consent, :mod:`orbify.files.consent`).
        recipe: the name of the recipe the conversion followed, if any.
        check: figures from a check (JSON-serialisable values), stored as they are.
        leaf_types: the ``leaf_types`` the conversion was given.
        force: replace an existing file.

    Raises :class:`SourceError` when ``reference`` cannot rebuild a model (a pickled whole model
    has none), :class:`OptionError` for a model that is not a converted GraphModule or check
    figures that are not JSON data, and :class:`~orbify.errors.OutputError` for an output that
    exists without ``force`` or cannot be written. Nothing is written when it raises.

    Example (the bundled example architecture, rebuilt when the file is loaded):

    >>> import pathlib, tempfile
    >>> import torch
    >>> import orbify
    >>> from orbify.example.model import build_example_cnn
    >>> converted, plan = orbify.convert(build_example_cnn().eval(), "c4", example_input=torch.zeros(1, 3, 33, 33))
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     path = orbify.save(converted, plan, pathlib.Path(folder) / "example-c4.orb", reference="example")
    ...     print(path.name, path.stat().st_size > 0)
    example-c4.orb True
    """
    require_reference(reference)
    if not isinstance(converted, fx.GraphModule):
        raise OptionError(f"Only a converted GraphModule can be saved, got a {type(converted).__name__}",
                          fix="save the module that orbify.convert returned")
    description = _description(converted, plan, reference, recipe, check, leaf_types)
    content = {DESCRIPTION_KEY: description, STATE_KEY: dict(converted.state_dict())}
    return atomic_write(path, lambda stream: torch.save(content, stream), force=force)


def require_reference(reference: str | None, source: str | None = None) -> None:
    """Raise :class:`SourceError` unless ``reference`` names an architecture a converted file can rebuild.

    A model read from a pickled whole model has no reference (``LoadedSource.reference`` is None);
    commands call this before converting, so the refusal comes before any work. ``source`` is the
    SOURCE argument as the user gave it, named in the message.
    """
    if isinstance(reference, str) and reference.strip():
        return
    what = f"{source!r} is a pickled whole model" if source is not None else "The model has no source reference"
    raise SourceError(f"{what}: a converted-model file must name an architecture it can rebuild, and a pickle "
                      "names none", where="SOURCE" if source is not None else "reference",
                      fix="give the architecture as torchvision:NAME or package.module:factory with --weights (save "
                          "the state dict with torch.save(model.state_dict(), path)), or convert in Python with "
                          "orbify.convert and keep the result with torch.save")


def _description(converted: nn.Module, plan: ConversionPlan, reference: str, recipe: str | None,
                 check: Mapping | None, leaf_types: tuple[type, ...]) -> str:
    """The JSON description stored beside the state dict."""
    from orbify.common.version import __version__

    data = {
        "format": FORMAT_NAME,
        "format_version": f"{FORMAT_VERSION[0]}.{FORMAT_VERSION[1]}",
        "orbify_version": __version__,
        "torch_version": torch.__version__,
        "source": reference,
        "conversion": {
            "group": plan.group, "budget": plan.budget, "head": plan.head, "init": plan.init,
            "stop_at": plan.stop_at, "input_shape": list(plan.input_shape), "repair_strides": plan.repair_strides,
            "leaf_types": [f"{cls.__module__}:{cls.__qualname__}" for cls in leaf_types],
            "dtype": str(_float_dtype(converted)).removeprefix("torch."),
        },
        "recipe": recipe,
        "plan": plan.to_dict(),
        "check": dict(check) if check is not None else None,
    }
    try:
        return json.dumps(data, indent=1, allow_nan=True)
    except (TypeError, ValueError) as error:
        raise OptionError(f"The check figures cannot be stored as JSON: {error}", where="save(check=...)",
                          fix="pass numbers, strings, lists and dicts only") from error


def _float_dtype(module: nn.Module) -> torch.dtype:
    """The dtype of the module's first floating-point tensor (float32 when it has none)."""
    for tensor in list(module.parameters()) + list(module.buffers()):
        if tensor.is_floating_point():
            return tensor.dtype
    return torch.float32


def load(path: PathLike, *, trust_source: bool = False, original: str | None = None) -> LoadedConversion:
    """Read a converted-model file: rebuild, reconvert and load its weights (no pickled code runs).

    The file's ``source`` is rebuilt without asking when it is ``torchvision:NAME`` (checked in
    torchvision's registry first) or ``example``. A ``package.module:factory`` source, or a recorded
    leaf type, is imported only when ``trust_source`` is true or ``original`` is that same
    reference (the user typed it; leaf types from its module are then allowed too). The working
    directory is searched for a module only when ``original`` names it.

    Raises :class:`~orbify.errors.TrustError`, before anything is imported, for a file naming code
    without that consent, and :class:`CheckpointError` when the file is missing, empty, truncated,
    damaged, not a converted-model file, of an incompatible major format version, names a source
    that cannot be rebuilt here, or holds a state dict that does not fit the rebuilt model (the keys
    are named).

    Example (save, then load: the same weights, the model in eval mode, the plan and the recorded source):

    >>> import pathlib, tempfile
    >>> import torch
    >>> import orbify
    >>> from orbify.example.model import build_example_cnn
    >>> converted, plan = orbify.convert(build_example_cnn().eval(), "c4", example_input=torch.zeros(1, 3, 33, 33))
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     path = orbify.save(converted, plan, pathlib.Path(folder) / "example-c4.orb", reference="example")
    ...     loaded = orbify.load(path)
    >>> x = torch.randn(2, 3, 33, 33)
    >>> torch.equal(loaded.module(x), converted(x)), loaded.plan.group, loaded.metadata["source"]
    (True, 'c4', 'example')
    """
    source = Path(path)
    content = load_torch_weights(source, what=_WHAT)
    metadata = _read_description(source, content)
    state = content[STATE_KEY]
    if not isinstance(state, Mapping) or not all(isinstance(v, torch.Tensor) for v in state.values()):
        raise _not_ours(source, f"its '{STATE_KEY}' entry is not a dict of tensors")
    leaf_types = metadata["conversion"].get("leaf_types") or []
    if not isinstance(leaf_types, list):
        raise _not_ours(source, "its leaf types are not a list")
    consent = Consent(trust_source, original)
    require_consent(source, str(metadata["source"]), leaf_types, consent)
    module = _rebuild(source, metadata, consent)
    _load_state(source, module, state)
    try:
        plan = ConversionPlan.from_dict(metadata["plan"], CalibrationReport.from_dict)
    except (TypeError, KeyError, ValueError) as error:
        raise CheckpointError(f"The conversion plan in the {_WHAT} {str(source)!r} cannot be read ({error})",
                              fix="read it with the orbify version that wrote it "
                                  f"({metadata.get('orbify_version', 'unknown')})") from error
    return LoadedConversion(module.eval(), plan, metadata)


def _read_description(source: Path, content: object) -> dict:
    """The parsed JSON description, after checking the format name and major version."""
    if not isinstance(content, Mapping) or set(content) != {DESCRIPTION_KEY, STATE_KEY}:
        keys = f" with keys {', '.join(map(repr, list(content)[:_LISTED_KEYS]))}" if isinstance(content, Mapping) else ""
        raise _not_ours(source, f"it holds a {type(content).__name__}{keys} instead of the entries "
                                f"'{DESCRIPTION_KEY}' and '{STATE_KEY}'")
    try:
        metadata = json.loads(content[DESCRIPTION_KEY])
    except (TypeError, ValueError) as error:
        raise _not_ours(source, f"its description is not JSON ({error})") from error
    if not isinstance(metadata, dict) or metadata.get("format") != FORMAT_NAME:
        found = metadata.get("format") if isinstance(metadata, dict) else None
        raise _not_ours(source, f"its format is {found!r}, not {FORMAT_NAME!r}")
    version = str(metadata.get("format_version", ""))
    major = version.split(".")[0]
    if not major.isdigit():
        raise _not_ours(source, f"its format version {version!r} is not 'major.minor'")
    if int(major) != FORMAT_VERSION[0]:
        newer = int(major) > FORMAT_VERSION[0]
        raise CheckpointError(
            f"The {_WHAT} {str(source)!r} has format version {version}, which this orbify "
            f"(format {FORMAT_VERSION[0]}.{FORMAT_VERSION[1]}) cannot read",
            fix=("upgrade orbify" if newer else "read it with an older orbify")
            + f"; it was written by orbify {metadata.get('orbify_version', 'unknown')}")
    missing = [key for key in ("source", "conversion", "plan") if key not in metadata]
    missing += [f"conversion.{key}" for key in ("group", "budget", "head", "init", "input_shape")
                if key not in (metadata.get("conversion") or {})]
    if missing:
        raise _not_ours(source, f"its description lacks {', '.join(missing)}")
    return metadata


def _not_ours(source: Path, why: str) -> CheckpointError:
    return CheckpointError(f"The file {str(source)!r} is not a readable orbify {_WHAT}: {why}",
                           fix="give a file written by orbify.save (orbify convert -o FILE.orb), "
                               "or give plain weights with --weights")


def _rebuild(source: Path, metadata: dict, consent: Consent) -> fx.GraphModule:
    """Rebuild the plain architecture and convert it with the recorded options (consent already given)."""
    reference = metadata["source"]
    options = metadata["conversion"]
    working_directory = consent.searches_working_directory(reference)
    try:
        plain = rebuild(reference, working_directory=working_directory)
        leaf_types = tuple(_import_type(name, working_directory) for name in options.get("leaf_types") or [])
    except SourceError as error:
        raise CheckpointError(
            f"The {_WHAT} {str(source)!r} was converted from {reference!r}, which cannot be rebuilt here: {error.what}",
            fix=error.fix or "make the model's package importable") from error
    dtype = getattr(torch, options.get("dtype", "float32"), None)
    if not isinstance(dtype, torch.dtype) or not dtype.is_floating_point:
        raise _not_ours(source, f"its dtype {options.get('dtype')!r} is not a floating-point torch dtype")
    try:
        example = torch.zeros(tuple(options["input_shape"]))
        module, _ = convert(plain, options["group"], options["budget"], options["head"], example,
                            init=options["init"], stop_at=options.get("stop_at"), leaf_types=leaf_types,
                            repair_strides=options.get("repair_strides", False),
                            carry_weights=False)
    except OrbifyError as error:
        raise CheckpointError(
            f"Converting {reference!r} again with the options recorded in {str(source)!r} failed: {error}",
            fix="the architecture has changed since the file was written; use the package versions that wrote it "
                f"(orbify {metadata.get('orbify_version', 'unknown')}, torch {metadata.get('torch_version', 'unknown')})",
        ) from error
    return module.to(dtype)


def _import_type(name: str, working_directory: bool) -> type:
    """The class a ``module:qualname`` string names (a recorded leaf type)."""
    module_name, _, qualname = str(name).partition(":")
    try:
        found: object = import_module(module_name, working_directory=working_directory)
        for part in qualname.split("."):
            found = getattr(found, part)
    except (ImportError, AttributeError, ValueError) as error:
        raise SourceError(f"The leaf module type {name!r} cannot be imported ({error})",
                          fix="make the package that defines it importable") from error
    if not isinstance(found, type):
        raise SourceError(f"The leaf module type {name!r} is not a class")
    return found


def _load_state(source: Path, module: nn.Module, state: Mapping[str, torch.Tensor]) -> None:
    """Load ``state`` into ``module`` with strict keys; a mismatch names the keys."""
    expected = module.state_dict()
    problems = []
    missing = [key for key in expected if key not in state]
    unexpected = [key for key in state if key not in expected]
    reshaped = [key for key in state if key in expected and state[key].shape != expected[key].shape]
    for title, keys in (("missing from the file", missing), ("not in the model", unexpected),
                        ("with a different shape", reshaped)):
        if keys:
            shown = ", ".join(keys[:_LISTED_KEYS]) + (f", and {len(keys) - _LISTED_KEYS} more"
                                                      if len(keys) > _LISTED_KEYS else "")
            problems.append(f"{len(keys)} {title} ({shown})")
    if not problems:
        try:
            module.load_state_dict(state, strict=True)
            return
        except RuntimeError as error:
            problems.append(str(error).strip().splitlines()[-1])
    raise CheckpointError(
        f"The weights in the {_WHAT} {str(source)!r} do not fit the rebuilt model: " + "; ".join(problems),
        fix="the file was changed after it was written, or the architecture differs from the one it was saved "
            "from; save the converted model again")


def is_converted_file(path: Path) -> bool:
    """Cheap sign that ``path`` is a converted-model file: the ``.orb`` suffix, or the description key inside."""
    if path.suffix.lower() == SUFFIX:
        return True
    try:
        with zipfile.ZipFile(path) as archive:
            pickled = [name for name in archive.namelist() if name.endswith("/data.pkl")]
            return len(pickled) == 1 and DESCRIPTION_KEY.encode() in archive.read(pickled[0])
    except Exception:   # not a zip, unreadable, damaged: not claimed
        return False


def _load_as_source(path: Path, trust_source: bool) -> LoadedSource:
    """The file-loader hook: a converted file read as a model SOURCE (no reference: only the file rebuilds it)."""
    return LoadedSource(load(path, trust_source=trust_source).module, None)


register_file_loader(is_converted_file, _load_as_source)

__all__ = ["DESCRIPTION_KEY", "FORMAT_NAME", "FORMAT_VERSION", "LoadedConversion", "STATE_KEY", "SUFFIX",
           "is_converted_file", "load", "save"]
