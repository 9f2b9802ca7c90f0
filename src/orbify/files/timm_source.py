"""The SOURCE ``timm:NAME``: an architecture from the timm library, built with random weights.

``timm.create_model(NAME, pretrained=False)`` builds it; nothing is ever downloaded (trained
weights come from ``--weights``, often a ``.safetensors`` file). The name is looked up in timm's
registry (``timm.is_model``) before anything is built, which is what lets a converted file name
such a source on its own (docs/design.md §16). timm is an optional dependency: ``orbify[timm]``.
"""

from __future__ import annotations

import difflib

from torch import nn

from orbify.errors import SourceError

TIMM_PREFIX = "timm:"


def build_timm(reference: str) -> tuple[nn.Module, str]:
    """The model ``timm:NAME`` names, with random weights, and its reference.

    Raises :class:`SourceError` when timm is not installed or has no model of that name (with close names).
    """
    name = reference[len(TIMM_PREFIX):].strip()
    timm = _timm(reference)
    if not name or not timm.is_model(name):
        close = difflib.get_close_matches(name, timm.list_models(), n=5)
        raise SourceError(f"timm has no model named {name!r}", where=reference,
                          fix=f"close names: {', '.join(close)}" if close else "see timm.list_models()")
    return timm.create_model(name, pretrained=False), TIMM_PREFIX + name


def _timm(reference: str):
    try:
        import timm
    except ImportError as error:
        raise SourceError("timm:NAME sources need the timm package, which is not installed", where=reference,
                          fix="pip install 'orbify[timm]' (or pip install timm)") from error
    return timm
