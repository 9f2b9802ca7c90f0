"""Which code a converted-model file may make orbify run (docs/design.md §16).

A converted-model file records the reference that rebuilds its plain architecture and the leaf
module types its conversion kept whole. Rebuilding imports modules and calls a factory, and the
description is plain text that anyone can edit, so the reference decides what code runs. A file
may name on its own only what a registry vouches for:

- ``torchvision:NAME`` (with or without ``?ARG=VALUE`` arguments): the name is looked up in
  torchvision's model registry and each argument, a literal, checked against the builder's
  signature before anything is built;
- ``timm:NAME``: the name is looked up in timm's registry (``timm.is_model``) before
  ``timm.create_model(NAME, pretrained=False)`` is called, when timm is installed;
- ``example`` and ``example-segment`` (and the factory references of the bundled example that older files
  record);
- leaf module types defined in torch or torchvision modules that are already imported (taking
  them runs no new code).

Everything else, a ``package.module:factory`` reference or a recorded leaf type, runs only with
the user's consent: ``trust_source`` (``--trust-source``), or the same reference typed by the user
(``--original``). :func:`require_consent` decides, before anything is imported or called.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path

from orbify.errors import TrustError
from orbify.files.source_arguments import TORCHVISION_PREFIX
from orbify.files.sources import BUNDLED_FACTORIES, FACTORY_PATTERN
from orbify.files.timm_source import TIMM_PREFIX

_LIBRARIES = ("torch", "torchvision")


@dataclass(frozen=True)
class Consent:
    """What the user allowed a converted file to run.

    ``trust_source``: every reference and leaf type the file records. ``typed``: a reference the
    user gave themselves (``--original``); a file naming exactly it needs nothing more, its module
    may come from the working directory, and leaf types defined in that module may be imported.
    """

    trust_source: bool = False
    typed: str | None = None

    def searches_working_directory(self, reference: str) -> bool:
        """True when ``reference`` is the one the user typed: only then is the working directory searched."""
        return self.typed is not None and reference == self.typed


def names_only_registered_code(reference: str) -> bool:
    """True for a reference a file may name on its own (see the module docstring)."""
    return reference.startswith((TORCHVISION_PREFIX, TIMM_PREFIX)) or reference in BUNDLED_FACTORIES


def require_consent(file: Path, reference: str, leaf_types: list[str], consent: Consent) -> None:
    """Raise :class:`TrustError` unless ``consent`` covers the code the file ``file`` names.

    ``reference`` is the recorded source and ``leaf_types`` the recorded ``module:qualname``
    strings. Nothing is imported or called here; a reference of no known form passes, because
    rebuilding refuses it without importing anything.
    """
    if consent.trust_source:
        return
    if not names_only_registered_code(reference) and FACTORY_PATTERN.match(reference) and reference != consent.typed:
        module, _, factory = reference.partition(":")
        raise _refusal(file, f"import the module {module!r} and call its function {factory!r} to rebuild the "
                             "architecture", suggestion=f"name the same source yourself with --original {reference}")
    typed_module = consent.typed.partition(":")[0] if consent.typed and FACTORY_PATTERN.match(consent.typed) else None
    for leaf in leaf_types:
        module, _, qualname = str(leaf).partition(":")
        if module != typed_module and not _already_imported_library(module):
            raise _refusal(file, f"import the module {module!r} for its class {qualname!r} (a leaf module type)",
                           suggestion="give --original with a factory in that module")


def _already_imported_library(module: str) -> bool:
    """True for a torch or torchvision module that is imported already, so naming it runs nothing new."""
    return module.split(".")[0] in _LIBRARIES and module in sys.modules


def _refusal(file: Path, action: str, *, suggestion: str) -> TrustError:
    """The error for a file that names code the user did not allow."""
    return TrustError(
        f"The converted-model file {str(file)!r} wants to {action}; a file may run only code that torchvision's "
        "registry or orbify's example vouches for, so nothing was imported",
        where=str(file),
        fix=f"if you trust the file and that code, pass --trust-source (orbify.load(path, trust_source=True)), or "
            f"{suggestion}",
    )


__all__ = ["Consent", "names_only_registered_code", "require_consent"]
