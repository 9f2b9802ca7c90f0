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
"""

from __future__ import annotations

import io
import warnings
from pathlib import Path

import torch
from torch import nn

from orbify.common.options import check_choice
from orbify.common.safe_io import PathLike, atomic_write
from orbify.errors import ExportError, InputShapeError
from orbify.layers.bake import bake_model

FORMATS = ("pt2", "torchscript", "onnx")
SUFFIXES = {"pt2": ".pt2", "torchscript": ".pt", "onnx": ".onnx"}
_EXPORT_EXTRA = "pip install 'orbify[export]' (the onnx, onnxscript and onnxruntime packages)"


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
            traced = torch.jit.trace(baked, (example_input,), check_trace=False)
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
    try:
        program = torch.onnx.export(baked, (_batch_of_two(example_input),), dynamo=True, verbose=False,
                                    input_names=["input"], output_names=["output"],
                                    dynamic_shapes=_dynamic_batch())
    except Exception as error:
        raise _failed("ONNX (torch.onnx.export)", error) from error
    buffer = io.BytesIO()
    program.save(buffer, external_data=False)
    return buffer.getvalue()


def _failed(exporter: str, error: Exception) -> ExportError:
    text = str(error).strip()
    detail = text.splitlines()[0] if text else type(error).__name__
    return ExportError(f"Exporting to {exporter} failed: {type(error).__name__}: {detail}",
                       fix="try another --format; export at a fixed safe input size; run with --debug for the "
                           "exporter's full message")


def run_exported(path: PathLike, format: str, inputs: torch.Tensor) -> torch.Tensor:
    """Run an exported file on ``inputs`` the way a user without orbify would, and return its output.

    pt2 runs ``torch.export.load(path).module()``, TorchScript ``torch.jit.load(path)`` and ONNX
    an ``onnxruntime`` CPU session. Raises :class:`ExportError` when onnxruntime is missing.
    """
    check_choice("format", format, FORMATS)
    with torch.no_grad():
        if format == "pt2":
            return torch.export.load(path).module()(inputs)
        if format == "torchscript":
            with warnings.catch_warnings():
                warnings.filterwarnings("ignore", message=r"`torch\.jit\.\w+` is deprecated")
                return torch.jit.load(path, map_location="cpu")(inputs)
    try:
        import onnxruntime
    except ImportError as error:
        raise ExportError("Running an ONNX file needs the package 'onnxruntime', which is not installed",
                          fix=_EXPORT_EXTRA) from error
    session = onnxruntime.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    name = session.get_inputs()[0].name
    return torch.from_numpy(session.run(None, {name: inputs.detach().cpu().numpy()})[0])


__all__ = ["FORMATS", "SUFFIXES", "export_model", "run_exported"]
