"""The ``orbify`` command line. Commands only parse arguments and call the Python API.

Each command lives in its own module of this package and registers itself on :data:`app`
(``@app.command()``); the imports at the bottom of this file load them. Errors derived from
:class:`~orbify.errors.OrbifyError` print as one paragraph with a non-zero exit code and no
traceback; ``orbify --debug COMMAND`` shows the traceback.
"""

from __future__ import annotations


from .app import app, main

# Command modules register themselves on `app` when imported.
from . import sizes  # noqa: E402,F401
from . import convert  # noqa: E402,F401
from . import demo  # noqa: E402,F401
from . import export  # noqa: E402,F401
from . import check  # noqa: E402,F401
from . import summary  # noqa: E402,F401
from . import tune  # noqa: E402,F401
from . import recipes  # noqa: E402,F401

__all__ = ["app", "main"]
