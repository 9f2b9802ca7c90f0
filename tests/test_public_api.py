"""The public Python API: what ``import orbify`` offers, and that every example in its docstrings runs as shown."""

from __future__ import annotations

import doctest
import importlib
import inspect
import types

import pytest

import orbify

#: The functions a user calls; each docstring carries a short example (doctest form) that must pass.
DOCUMENTED = ("bake_model", "check_model", "convert", "export_model", "load", "parse_group", "read_images",
              "safe_sizes", "save", "tune")

#: Subpackage modules that share a name with a public function (or hold one): importing them must give the module.
MODULES = ("orbify.conversion", "orbify.conversion.converter", "orbify.tuning", "orbify.tuning.loop",
           "orbify.verification", "orbify.verification.check", "orbify.files.saving", "orbify.files.export",
           "orbify.layers.bake", "orbify.graph.sizes", "orbify.symmetry.groups", "orbify.data")

PUBLIC_FUNCTIONS = sorted(name for name in orbify.__all__ if inspect.isfunction(getattr(orbify, name)))


def test_the_package_exports_the_documented_functions():
    assert set(DOCUMENTED) <= set(orbify.__all__)
    assert all(inspect.isfunction(getattr(orbify, name)) for name in DOCUMENTED)
    assert all(hasattr(orbify, name) for name in orbify.__all__)


@pytest.mark.parametrize("name", DOCUMENTED)
def test_each_documented_function_has_an_example(name):
    assert ">>>" in (getattr(orbify, name).__doc__ or ""), f"orbify.{name} has no example in its docstring"


@pytest.mark.parametrize("name", PUBLIC_FUNCTIONS)
def test_docstring_examples_run_as_shown(name):
    function = getattr(orbify, name)
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS)
    for test in doctest.DocTestFinder(recurse=False).find(function, f"orbify.{name}", globs={}):
        runner.run(test)
    result = runner.summarize(verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples of orbify.{name} failed (shown above)"


@pytest.mark.parametrize("name", MODULES)
def test_subpackage_modules_are_modules_not_functions(name):
    assert isinstance(importlib.import_module(name), types.ModuleType)
    parent, _, child = name.rpartition(".")
    assert isinstance(getattr(importlib.import_module(parent), child), types.ModuleType), \
        f"{parent}.{child} is shadowed by a function or other object"
