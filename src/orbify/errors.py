"""Errors that orbify raises on bad input.

Every error is one readable paragraph: *what* went wrong, *where* (a graph node and its source
line, a file and key path, a command-line option) and *what to do* about it. The command line
prints ``str(error)`` and exits non-zero without a traceback; ``--debug`` shows the traceback.
Catch :class:`OrbifyError` to handle all of them.
"""

from __future__ import annotations


class OrbifyError(Exception):
    """Base class: a problem with the user's input that orbify can explain.

    ``what`` says what went wrong, ``where`` locates it (optional) and ``fix`` says what the user
    can do (optional). ``str(error)`` joins them into one paragraph.
    """

    exit_code = 2

    def __init__(self, what: str, *, where: str | None = None, fix: str | None = None):
        self.what = what.rstrip(".")
        self.where = where
        self.fix = fix
        super().__init__(self._paragraph())

    def _paragraph(self) -> str:
        text = self.what + "."
        if self.where:
            text += f" Where: {self.where.rstrip('.')}."
        if self.fix:
            text += f" What to do: {self.fix.rstrip('.')}."
        return text


class GroupError(OrbifyError, ValueError):
    """An unknown or malformed group name."""


class OptionError(OrbifyError, ValueError):
    """An option with a value outside its allowed choices (budget, head, init, ...)."""


class TraceError(OrbifyError):
    """The model cannot be traced symbolically with torch.fx."""


class UnsupportedOpError(OrbifyError):
    """A graph node whose op has no layout rule, or whose layouts the rule refuses."""


class WidthError(OrbifyError, ValueError):
    """A layer width that cannot be split into whole orbits as asked."""


class InputShapeError(OrbifyError, ValueError):
    """An example input of the wrong rank or channel count for the model."""


class SourceError(OrbifyError):
    """A model source (``torchvision:NAME``, ``package.module:factory``, a file) that cannot be built."""


class CheckpointError(OrbifyError):
    """A weights or converted-model file that is damaged, truncated, mismatched or incompatible."""


class TrustError(OrbifyError):
    """A pickled whole model without ``--trust-pickle``, or a converted file naming code without consent."""


class OutputError(OrbifyError):
    """An output path that exists (without ``--force``) or cannot be written."""


class RecipeError(OrbifyError):
    """A recipe file with an unknown key, a wrong type or a value outside the allowed ones."""


class DataError(OrbifyError):
    """An image folder or array file that cannot be read as images (and labels)."""


class ExportError(OrbifyError):
    """A model that an exporter (torch.export, TorchScript, ONNX) cannot write, or a missing exporter package."""
