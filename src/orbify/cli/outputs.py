"""What every command checks about the files it is to write, before doing any work."""

from __future__ import annotations

from pathlib import Path

from orbify.errors import OutputError


def refuse_output(out: Path, force: bool, inputs: list[Path | None]) -> None:
    """Fail before any work when ``out`` exists without ``force``, or when it is one of the ``inputs``
    (an input is never overwritten, even with ``force``)."""
    for given in inputs:
        if given is not None and given.exists() and out.exists() and out.resolve() == given.resolve():
            raise OutputError(f"The output {str(out)!r} is an input of this command",
                              fix="write the converted model to a new file; inputs are never overwritten")
    if out.exists() and not force:
        raise OutputError(f"The output file {str(out)!r} already exists",
                          fix="choose another path, or pass --force to replace it")


def refuse_existing(paths: list[Path | None], force: bool) -> None:
    """Fail before any work when an output exists and --force is not given."""
    for path in paths:
        if path is not None and path.exists() and not force:
            raise OutputError(f"The output file {str(path)!r} already exists",
                              fix="choose another path, or pass --force to replace it")
