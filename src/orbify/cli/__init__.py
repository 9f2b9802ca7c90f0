"""The ``orbify`` command line. Commands only parse arguments and call the Python API.

Each command lives in its own module of this package and registers itself on :data:`app`
(``@app.command()``); the imports at the bottom of this file load them. Errors derived from
:class:`~orbify.errors.OrbifyError` print as one paragraph with a non-zero exit code and no
traceback; ``orbify --debug COMMAND`` shows the traceback.
"""

from __future__ import annotations

# Command modules register themselves on `app` when imported.
from orbify.cli import check, convert, demo, export, recipes, sizes, summary, tune  # noqa: F401
from orbify.cli.app import app, main

__all__ = ["app", "main"]
