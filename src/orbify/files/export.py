"""Exporting a (converted) model for inference without orbify: pt2, TorchScript or ONNX (docs/design.md §14).

Every format is written from the *baked* model (:func:`orbify.layers.bake.bake_model`, in eval mode),
so the file holds plain convolutions with the expanded weights and no orbify code:

``pt2``
    ``torch.export.export`` then ``torch.export.save``; read back with ``torch.export.load(path).module()``.
``torchscript``
    ``torch.jit.trace`` then ``torch.jit.save``; read back with ``torch.jit.load``.
``onnx``
    ``torch.onnx.export(..., dynamo=True)``, which needs the ``onnx`` and ``onnxscript`` packages
    (the ``export`` extra); run it with ``onnxruntime``.

The batch axis stays free in pt2 and ONNX files (any batch size); the other axes are fixed at the
example input's shape, which should be a safe size (see :func:`orbify.safe_sizes`) for the model
to stay exactly equivariant. Files are written atomically and never replace an existing file
without ``force``.

A model may return a tensor, a dict of tensors (torchvision's segmentation models: ``out`` and
``aux``) or a tuple/list of tensors; every format keeps the structure. An ONNX file names its
outputs by the dict's keys (``output`` for one tensor, ``output_0``, ``output_1``, ... for a
sequence) and records the structure in its metadata (:data:`ONNX_STRUCTURE_KEY`), so that
:func:`run_exported` returns what the model returns.
"""

from __future__ import annotations

import io
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Union

import torch
from torch import nn

from orbify.common.options import check_choice
from orbify.common.safe_io import PathLike, atomic_write
from orbify.errors import ExportError, InputShapeError
from orbify.layers.bake import bake_model

FORMATS = ("pt2", "torchscript", "onnx")
SUFFIXES = {"pt2": ".pt2", "torchscript": ".pt", "onnx": ".onnx"}
_EXPORT_EXTRA = "pip install 'orbify[export]' (the onnx, onnxscript and onnxruntime packages)"
ONNX_STRUCTURE_KEY = "orbify_output_structure"
"""ONNX metadata key: "tensor", "dict" (outputs named by its keys) or "sequence" (a tuple of the outputs)."""

Output = Union[torch.Tensor, dict, tuple]
"""What a model returns: a tensor, a dict of tensors or a tuple of tensors."""


def export_model(module: nn.Module, example_input: torch.Tensor, path: PathLike, format: str = "pt2", *,
                 force: bool = False) -> Path:
    """Bake ``module`` and write it to ``path`` in ``format`` ("pt2", "torchscript" or "onnx").

    ``example_input`` fixes every axis but the batch axis. ``module`` itself is left untouched.
    Raises :class:`~orbify.errors.OptionError` for an unknown format, :class:`InputShapeError`
    for an input that is not a tensor, :class:`ExportError` when the exporter fails or its
    packages are missing, and :class:`~orbify.errors.OutputError` for an existing output without
    ``force``. Nothing is written when it raises.

    Example (a pt2 program that runs without orbify):

    >>> import pathlib, tempfile
    >>> import torch
    >>> from torch import nn
    >>> import orbify
    >>> model = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
    ...                       nn.Linear(8, 4)).eval()
    >>> converted, plan = orbify.convert(model, "c4", example_input=torch.zeros(1, 3, 9, 9))
    >>> x = torch.randn(2, 3, 9, 9)
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     path = orbify.export_model(converted, x[:1], pathlib.Path(folder) / "tiny.pt2")
    ...     program = torch.export.load(path).module()
    >>> torch.allclose(program(x), converted(x), atol=1e-6)
    True
    """
    check_choice("format", format, FORMATS)
    if not isinstance(example_input, torch.Tensor) or example_input.dim() < 1:
        raise InputShapeError("The example input must be a tensor with a batch axis",
                              fix="pass e.g. torch.randn(1, 3, S, S) at a safe size S")
    baked = bake_model(module).eval()
    writers = {"pt2": _pt2_bytes, "torchscript": _torchscript_bytes, "onnx": _onnx_bytes}
    with torch.no_grad():
        content = writers[format](baked, example_input.detach())
    return atomic_write(path, lambda stream: stream.write(content), force=force)


def _batch_of_two(example_input: torch.Tensor) -> torch.Tensor:
    """An example with at least two samples: exporters fix an axis of size 1 instead of keeping it free."""
    if example_input.shape[0] >= 2:
        return example_input
    return example_input.expand(2, *example_input.shape[1:]).clone()


def _dynamic_batch() -> tuple[dict, ...]:
    return ({0: torch.export.Dim("batch", min=1)},)


def _pt2_bytes(baked: nn.Module, example_input: torch.Tensor) -> bytes:
    try:
        program = torch.export.export(baked, (_batch_of_two(example_input),), dynamic_shapes=_dynamic_batch())
    except Exception as error:   # torch.export raises many kinds; all mean "cannot export"
        raise _failed("pt2 (torch.export)", error) from error
    buffer = io.BytesIO()
    torch.export.save(program, buffer)
    return buffer.getvalue()


def _torchscript_bytes(baked: nn.Module, example_input: torch.Tensor) -> bytes:
    with warnings.catch_warnings():
        # TorchScript is deprecated upstream; it is exported because it was asked for by name.
        warnings.filterwarnings("ignore", message=r"`torch\.jit\.\w+` is deprecated")
        try:
            # strict=False lets a dict output through (its keys do not depend on the input)
            traced = torch.jit.trace(baked, (example_input,), check_trace=False, strict=False)
        except Exception as error:
            raise _failed("TorchScript (torch.jit.trace)", error) from error
        buffer = io.BytesIO()
        torch.jit.save(traced, buffer)
    return buffer.getvalue()


def _onnx_bytes(baked: nn.Module, example_input: torch.Tensor) -> bytes:
    try:
        import onnx  # noqa: F401  (the exporter needs both packages)
        import onnxscript  # noqa: F401
    except ImportError as error:
        raise ExportError(f"ONNX export needs the package {error.name!r}, which is not installed",
                          fix=_EXPORT_EXTRA) from error
    example = _batch_of_two(example_input)
    names, structure = _onnx_outputs(baked(example))
    try:
        program = torch.onnx.export(baked, (example,), dynamo=True, verbose=False, input_names=["input"],
                                    output_names=names, dynamic_shapes=_dynamic_batch())
    except Exception as error:
        raise _failed("ONNX (torch.onnx.export)", error) from error
    program.model.metadata_props[ONNX_STRUCTURE_KEY] = structure
    buffer = io.BytesIO()
    program.save(buffer, external_data=False)
    return buffer.getvalue()


def _onnx_outputs(output: Output) -> tuple[list[str], str]:
    """The ONNX output names of a model output and its structure (:data:`ONNX_STRUCTURE_KEY`)."""
    if isinstance(output, torch.Tensor):
        return ["output"], "tensor"
    if isinstance(output, Mapping) and all(isinstance(v, torch.Tensor) for v in output.values()):
        return [str(key) for key in output], "dict"
    if isinstance(output, (list, tuple)) and all(isinstance(v, torch.Tensor) for v in output):
        return [f"output_{i}" for i in range(len(output))], "sequence"
    raise ExportError(f"ONNX export takes a model returning a tensor, or a dict, tuple or list of tensors; this one "
                      f"returns a {type(output).__name__} holding other values", fix="try --format pt2")


def _failed(exporter: str, error: Exception) -> ExportError:
    text = str(error).strip()
    detail = text.splitlines()[0] if text else type(error).__name__
    return ExportError(f"Exporting to {exporter} failed: {type(error).__name__}: {detail}",
                       fix="try another --format; export at a fixed safe input size; run with --debug for the "
                           "exporter's full message")


def run_exported(path: PathLike, format: str, inputs: torch.Tensor) -> Output:
    """Run an exported file on ``inputs`` the way a user without orbify would, and return its output.

    pt2 runs ``torch.export.load(path).module()``, TorchScript ``torch.jit.load(path)`` and ONNX
    an ``onnxruntime`` CPU session. The output has the model's structure: a tensor, a dict (a plain
    ``dict``) or a tuple (files written before ONNX structures were recorded give their first output).
    Raises :class:`ExportError` when onnxruntime is missing.
    """
    check_choice("format", format, FORMATS)
    with torch.no_grad():
        if format == "pt2":
            return _plain(torch.export.load(path).module()(inputs))
        if format == "torchscript":
            with warnings.catch_warnings():
                warnings.filterwarnings("ignore", message=r"`torch\.jit\.\w+` is deprecated")
                return _plain(torch.jit.load(path, map_location="cpu")(inputs))
    try:
        import onnxruntime
    except ImportError as error:
        raise ExportError("Running an ONNX file needs the package 'onnxruntime', which is not installed",
                          fix=_EXPORT_EXTRA) from error
    session = onnxruntime.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    name = session.get_inputs()[0].name
    outputs = [torch.from_numpy(value) for value in session.run(None, {name: inputs.detach().cpu().numpy()})]
    structure = session.get_modelmeta().custom_metadata_map.get(ONNX_STRUCTURE_KEY, "tensor")
    if structure == "dict":
        return dict(zip([output.name for output in session.get_outputs()], outputs))
    return tuple(outputs) if structure == "sequence" else outputs[0]


def _plain(output: Output) -> Output:
    """A loaded program's output with plain containers (torch.export gives immutable ones)."""
    if isinstance(output, Mapping):
        return dict(output)
    return tuple(output) if isinstance(output, (list, tuple)) else output


def output_difference(exported: Output, expected: Output) -> float:
    """The largest ``max |Δ| / max |y|`` over the tensors of two outputs of the same structure.

    Raises :class:`ExportError` when the structures differ (other keys, another number of tensors, other shapes).
    """
    pairs = _paired(exported, expected)
    return max(float((a - b).abs().max() / b.abs().max().clamp_min(1e-30)) for a, b in pairs)


def _paired(exported: Output, expected: Output) -> list[tuple[torch.Tensor, torch.Tensor]]:
    if isinstance(expected, Mapping) and isinstance(exported, Mapping) and list(exported) == list(expected):
        pairs = [(exported[key], expected[key]) for key in expected]
    elif isinstance(expected, (list, tuple)) and isinstance(exported, (list, tuple)) and len(exported) == len(expected):
        pairs = list(zip(exported, expected))
    else:
        pairs = [(exported, expected)]
    if not all(isinstance(a, torch.Tensor) and isinstance(b, torch.Tensor) and a.shape == b.shape for a, b in pairs):
        raise ExportError(f"The exported file returns a {_described(exported)} where the model returns a "
                          f"{_described(expected)}", fix="export again; report it if it persists")
    return pairs


def _described(output: Output) -> str:
    if isinstance(output, torch.Tensor):
        return f"tensor of shape {tuple(output.shape)}"
    if isinstance(output, Mapping):
        return f"dict with keys {list(output)}"
    return f"{type(output).__name__} of {len(output)}" if isinstance(output, (list, tuple)) else type(output).__name__


__all__ = ["FORMATS", "ONNX_STRUCTURE_KEY", "SUFFIXES", "Output", "export_model", "output_difference",
           "run_exported"]
