"""The ``orbify`` command line. Commands only parse arguments and call the Python API.

Each command lives in its own module of this package and registers itself on :data:`app`
(``@app.command()``); the imports at the bottom of this file load them. Errors derived from
:class:`~orbify.errors.OrbifyError` print as one paragraph with a non-zero exit code and no
traceback; ``orbify --debug COMMAND`` shows the traceback.
"""

from __future__ import annotations


from orbify.cli.app import app, main

# Command modules register themselves on `app` when imported.
from orbify.cli import sizes
from orbify.cli import convert
from orbify.cli import demo
from orbify.cli import export
from orbify.cli import check
from orbify.cli import summary
from orbify.cli import tune
from orbify.cli import recipes

__all__ = ["app", "main"]
