"""The benchmark scripts imported as modules, for the tests that run their ``--quick`` modes (tests/conftest.py's
``run_quick``)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

BENCHMARKS = Path(__file__).resolve().parent.parent / "benchmarks"


def load_script(name: str):
    """Import ``benchmarks/<name>.py`` as a fresh module (run_quick puts the folder on ``sys.path`` for the scripts'
    ``import harness``)."""
    spec = importlib.util.spec_from_file_location(f"benchmark_{name}", BENCHMARKS / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module        # dataclasses look their module up there
    spec.loader.exec_module(module)
    return module
