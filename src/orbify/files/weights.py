"""Loading a weights file into a model, as training code writes checkpoints.

:func:`load_weights_file` finds the state dict (the file itself, or under ``state_dict``, ``model`` or
another single entry), ignores entries that are not weights (``epoch``, optimizer state), removes a
prefix that every key carries (``module.`` from DistributedDataParallel, ``model.`` from training
wrappers) when the keys fit without it, and returns what it adapted as notes. A file that does not
fit is refused with the keys that differ and, when only the classifier's width or the first conv's
input channels differ, the argument of a torchvision source that makes it fit.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Callable

import torch
from torch import nn

from orbify.common.safe_io import PathLike, load_weights_any
from orbify.errors import CheckpointError, SourceError
from orbify.files.source_arguments import (
    TORCHVISION_PREFIX,
    ArgumentValue,
    TorchvisionSource,
    build_torchvision,
    builder_arguments,
    torchvision_builder,
)

_LISTED_KEYS = 5
_CHANNEL_ARGUMENTS = ("in_chans", "in_channels", "input_channels", "num_channels")
"""Names builders give the number of input channels, the first a builder accepts is suggested."""


def load_weights_file(module: nn.Module, weights: PathLike, *, reference: str | None = None) -> tuple[str, ...]:
    """Load a weights file into ``module`` in place, requiring every key and shape to match; return notes.

    The file is a ``.safetensors`` file (read without pickle) or a ``torch.save`` file read with
    ``weights_only=True``; it holds a state dict, or a dict with one under ``'state_dict'``, ``'model'`` or another
    single entry holding only tensors (such as ``'model_state_dict'``). Entries that are not tensors
    and not keys of the model (``epoch``, optimizer state) are ignored. When every key carries one
    dotted prefix (``module.`` from DistributedDataParallel, ``model.`` from training wrappers) and the
    keys fit without it, it is removed. The notes (at most one line) say what was ignored or removed.

    Raises :class:`CheckpointError` listing up to five missing, unexpected and mismatched keys; it
    names a prefix that explains most of the mismatch, and when only the classifier's width or the
    first conv's input channels differ it says which argument of the torchvision ``reference``
    (the source the module was built from) makes the weights fit. On error the module may hold part
    of the file's weights and should be discarded.
    """
    expected = module.state_dict()
    state, ignored = _weights_only(_unwrap_state_dict(load_weights_any(weights), weights), expected)
    prefix = _wrapper_prefix(list(state), set(expected))
    if prefix is not None:
        state = {key[len(prefix):]: value for key, value in state.items()}
    missing, unexpected, mismatched = _load_fitting(module, state, expected)
    if not (missing or unexpected or mismatched):
        return _notes(prefix, ignored)
    parts = []
    if missing:
        parts.append(_key_list("missing from the file", missing, lambda key: _shape(expected[key])))
    if unexpected:
        parts.append(_key_list("not in the model", unexpected, lambda key: _shape(state[key])))
    if mismatched:
        parts.append(_key_list("with a different shape", mismatched,
                               lambda key: f"model {_shape(expected[key])}, file {_shape(state[key])}"))
    stripped = f" (compared without the prefix {prefix!r} that all its keys carry)" if prefix else ""
    hint = None if missing or unexpected else _resizing_hint(module, state, mismatched, reference)
    raise CheckpointError(
        f"The weights file {str(weights)!r} does not fit the model{stripped}: " + "; ".join(parts),
        fix=hint or "check that SOURCE is the architecture these weights were saved from "
                    "(same model and number of classes)",
    )


def _weights_only(state: Mapping[str, object], expected: Mapping[str, object]) -> tuple[dict[str, object], list]:
    """The entries that may be weights (tensors, or keys of the model), and the keys of the others."""
    kept = {key: value for key, value in state.items() if isinstance(value, torch.Tensor) or key in expected}
    return kept, [key for key in state if key not in kept]


def _load_fitting(module: nn.Module, state: Mapping[str, object],
                  expected: Mapping[str, object]) -> tuple[list[str], list[str], list[str]]:
    """Load the entries whose shapes fit; return the missing, unexpected and mismatched keys."""
    mismatched = [
        key
        for key, value in state.items()
        if isinstance(expected.get(key), torch.Tensor)
        and (not isinstance(value, torch.Tensor) or value.shape != expected[key].shape)
    ]
    loadable = {key: value for key, value in state.items() if key not in mismatched}
    # load_state_dict knows which keys a module may lack (e.g. batch-norm counters of old files).
    result = module.load_state_dict(loadable, strict=False)
    missing = [key for key in result.missing_keys if key not in mismatched]
    return missing, list(result.unexpected_keys), mismatched


def _wrapper_prefix(keys: list[str], model_keys: set[str]) -> str | None:
    """A dotted prefix that every key carries and whose removal makes the keys fit the model, else
    explains more than half of the model keys the file lacks; the shortest that fits, else the one
    that explains most. None when the keys fit as they are or no prefix explains them."""
    before = len(model_keys.intersection(keys))
    if _keys_fit(keys, model_keys) or not keys:
        return None
    best, best_found = None, before
    for prefix in _common_prefixes(keys):
        stripped = [key[len(prefix):] for key in keys]
        if _keys_fit(stripped, model_keys):
            return prefix
        found = len(model_keys.intersection(stripped))
        if found > best_found:
            best, best_found = prefix, found
    return best if 2 * (best_found - before) > len(model_keys) - before else None


def _common_prefixes(keys: list[str]) -> list[str]:
    """The dotted prefixes (``'module.'``, ``'module.model.'``) all keys share, each leaving a name, shortest first."""
    parts = [key.split(".") for key in keys]
    shared = 0
    while all(len(split) > shared + 1 and split[shared] == parts[0][shared] for split in parts):
        shared += 1
    return [".".join(parts[0][:count]) + "." for count in range(1, shared + 1)]


def _keys_fit(keys: list[str], model_keys: set[str]) -> bool:
    """Every key is the model's and the model lacks none but batch-norm counters (which loading fills in)."""
    lacking = model_keys.difference(keys)
    return model_keys.issuperset(keys) and all(key.endswith("num_batches_tracked") for key in lacking)


def _notes(prefix: str | None, ignored: list[str]) -> tuple[str, ...]:
    """One line on what loading adapted, or none."""
    said = []
    if prefix is not None:
        said.append(f"the weights' keys all began with {prefix!r} (saved from a wrapped model, e.g. by "
                    "DistributedDataParallel or a training wrapper); loaded them without it")
    if ignored:
        shown = ", ".join(ignored[:_LISTED_KEYS]) + (", ..." if len(ignored) > _LISTED_KEYS else "")
        said.append(f"ignored {len(ignored)} entries of the file that are not weights ({shown})")
    return ("; ".join(said),) if said else ()


@dataclass(frozen=True)
class _Resize:
    """A layer whose weights differ only in the classifier's width (``'classes'``) or the input channels."""

    kind: str
    layer: str
    model_size: int
    file_size: int

    def describe(self) -> str:
        if self.kind == "classes":
            return f"the file's classifier {self.layer!r} has {self.file_size} outputs, the model's {self.model_size}"
        return f"the file's first conv {self.layer!r} takes {self.file_size} input channels, the model's " \
               f"{self.model_size}"


_WEIGHTED_LAYERS = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d)


def _resizes(module: nn.Module, state: Mapping[str, object], mismatched: list[str]) -> list[_Resize]:
    """The resizes that explain every mismatched key, or none: the last Linear/Conv whose weight differs only in
    dim 0 (with its bias), the model's first conv when its weight differs only in dim 1."""
    expected = module.state_dict()
    layers = [name for name, layer in module.named_modules() if isinstance(layer, _WEIGHTED_LAYERS)]
    convs = [name for name, layer in module.named_modules() if isinstance(layer, _WEIGHTED_LAYERS[1:])]
    resizes, explained = [], set()
    classifier = next((name for name in reversed(layers) if f"{name}.weight" in mismatched), None)
    if classifier is not None and _differs_only_in(expected, state, f"{classifier}.weight", 0):
        out = state[f"{classifier}.weight"].shape[0]
        resizes.append(_Resize("classes", classifier, expected[f"{classifier}.weight"].shape[0], out))
        explained.add(f"{classifier}.weight")
        bias = state.get(f"{classifier}.bias")
        if isinstance(bias, torch.Tensor) and tuple(bias.shape) == (out,):
            explained.add(f"{classifier}.bias")
    if convs and f"{convs[0]}.weight" not in explained and _differs_only_in(expected, state, f"{convs[0]}.weight", 1):
        weight = f"{convs[0]}.weight"
        resizes.append(_Resize("channels", convs[0], expected[weight].shape[1], state[weight].shape[1]))
        explained.add(weight)
    return resizes if explained == set(mismatched) else []


def _differs_only_in(expected: Mapping[str, object], state: Mapping[str, object], key: str, dim: int) -> bool:
    """True when the file's tensor ``key`` has the model's shape but for dimension ``dim``."""
    model, file = expected.get(key), state.get(key)
    if not (isinstance(model, torch.Tensor) and isinstance(file, torch.Tensor)) or model.dim() != file.dim():
        return False
    differ = [axis for axis, (a, b) in enumerate(zip(model.shape, file.shape)) if a != b]
    return differ == [dim]


def _resizing_hint(module: nn.Module, state: Mapping[str, object], mismatched: list[str],
                   reference: str | None) -> str | None:
    """What makes the weights fit when only the classifier's width or the first conv's input channels differ:
    for a torchvision reference, the arguments that do (checked by building it), else the sizes to build."""
    resizes = _resizes(module, state, mismatched)
    if not resizes:
        return None
    described = "; ".join(resize.describe() for resize in resizes)
    if reference is None or not reference.startswith(TORCHVISION_PREFIX):
        return f"{described}: build the model with the sizes of the weights"
    try:
        source = TorchvisionSource.parse(reference)
        accepted = builder_arguments(torchvision_builder(source.name))
    except SourceError:
        return described
    changes: dict[str, ArgumentValue] = {}
    for resize in resizes:
        names = ("num_classes",) if resize.kind == "classes" else _CHANNEL_ARGUMENTS
        name = next((name for name in names if name in accepted), None)
        if name is None:
            return f"{described}; torchvision's {source.name} takes no argument that sets this: build the model " \
                   "in a factory function of your own and give it as package.module:factory"
        changes[name] = resize.file_size
    suggested = source.with_arguments(changes)
    try:
        fits = _shapes_fit(build_torchvision(suggested.reference)[0].state_dict(), state)
    except SourceError:
        fits = False
    if not fits:
        return described
    given = "&".join(f"{name}={value}" for name, value in sorted(changes.items()))
    where = f"add ?{given} to the source" if not source.arguments else f"give {given} in the source"
    return f"{described}: {where}: {suggested.reference}"


def _shapes_fit(built: Mapping[str, object], state: Mapping[str, object]) -> bool:
    """True when every tensor of ``built`` has its shape in ``state``."""
    return all(not isinstance(value, torch.Tensor)
               or (isinstance(state.get(key), torch.Tensor) and state[key].shape == value.shape)
               for key, value in built.items())


def _unwrap_state_dict(content: object, weights: PathLike) -> Mapping[str, object]:
    """The state dict in a loaded weights file: the file itself, its 'state_dict'/'model' entry, or the single
    entry that holds only tensors."""
    if isinstance(content, Mapping):
        for key in ("state_dict", "model"):
            if isinstance(content.get(key), Mapping):
                return content[key]
        nested = [value for value in content.values() if _holds_only_tensors(value)]
        if len(nested) == 1 and not any(isinstance(value, torch.Tensor) for value in content.values()):
            return nested[0]
        if all(isinstance(key, str) for key in content):
            return content
    raise CheckpointError(
        f"The weights file {str(weights)!r} holds a {type(content).__name__} that is not a state dict",
        fix="save it with torch.save(model.state_dict(), path), or as a dict with the state dict under "
        "'state_dict' or 'model'",
    )


def _holds_only_tensors(value: object) -> bool:
    """True for a non-empty mapping of names to tensors: a state dict."""
    return isinstance(value, Mapping) and bool(value) and all(
        isinstance(key, str) and isinstance(item, torch.Tensor) for key, item in value.items())


def _key_list(title: str, keys: list[str], describe: Callable[[str], str]) -> str:
    """'n title (key [shape], ...)' with at most five keys shown."""
    shown = ", ".join(f"{key} {describe(key)}" for key in keys[:_LISTED_KEYS])
    more = f", and {len(keys) - _LISTED_KEYS} more" if len(keys) > _LISTED_KEYS else ""
    return f"{len(keys)} {title} ({shown}{more})"


def _shape(value: object) -> str:
    """A tensor's shape as '[a, b]', or the type of a non-tensor."""
    if isinstance(value, torch.Tensor):
        return str(list(value.shape))
    return f"({type(value).__name__})"
