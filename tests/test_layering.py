"""The package's shape, enforced: the import layering, lint, and the size of classes and functions.

The layers contract lives in pyproject.toml ([tool.importlinter]; DEVELOPERS.md maps each
subpackage to its job). A later change that imports upwards, brings back a cycle, adds a top-level
module no layer names, or grows a class or function past the limits below fails here.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "src" / "orbify"

#: Limits from the project's style rules: about 150 lines a class, 60 a function (docstrings not counted),
#: the command-line commands excepted (a typer command lists its options in its signature).
CLASS_LINES = 150
FUNCTION_LINES = 60


def test_import_layers_hold():
    importlinter = pytest.importorskip("importlinter.cli")   # the test extra installs it
    status = importlinter.lint_imports(config_filename=str(ROOT / "pyproject.toml"), no_cache=True, no_logo=True)
    assert status == 0, "import-linter: a module imports from a layer above it (see its report above)"


def test_ruff_is_clean():
    result = subprocess.run([sys.executable, "-m", "ruff", "check", "--no-cache", "src", "tests", "benchmarks"],
                            cwd=ROOT, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


def _code_lines(node: ast.AST) -> int:
    """Lines of a class or function, its docstring left out."""
    lines = node.end_lineno - node.lineno + 1
    body = node.body
    if body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant) \
            and isinstance(body[0].value.value, str):
        lines -= body[0].end_lineno - body[0].lineno + 1
    return lines


def _oversized() -> list[str]:
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        if path.relative_to(PACKAGE).parts[0] == "cli":
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            limit = CLASS_LINES if isinstance(node, ast.ClassDef) else \
                FUNCTION_LINES if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) else None
            if limit is not None and _code_lines(node) > limit:
                found.append(f"{path.relative_to(ROOT)}:{node.lineno} {node.name} ({_code_lines(node)} lines)")
    return found


def test_classes_and_functions_stay_small():
    assert _oversized() == []


def test_the_size_rule_sees_a_long_function(tmp_path):
    """The measure counts code, not docstrings: a 70-line body is caught, a 70-line docstring is not."""
    long_body = "def f():\n" + "    x = 1\n" * 70
    long_doc = 'def g():\n    """' + "\n" * 70 + '    """\n    return 1\n'
    (body,) = ast.parse(long_body).body
    (doc,) = ast.parse(long_doc).body
    assert _code_lines(body) > FUNCTION_LINES
    assert _code_lines(doc) <= FUNCTION_LINES
