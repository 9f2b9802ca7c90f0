"""Finding recipes: the ones shipped inside the package, and recipe files given by path."""

from __future__ import annotations

import difflib
import os
import sys
from importlib import resources
from pathlib import Path

from orbify.errors import RecipeError
from orbify.recipes.recipe import Recipe
from orbify.recipes.schema import validate

if sys.version_info >= (3, 11):
    import tomllib
else:   # Python 3.10: the same parser, published as tomli
    import tomli as tomllib

SUFFIX = ".toml"


def shipped_folder() -> Path:
    """The folder of the recipes shipped with orbify (package data of ``orbify.recipes``)."""
    return Path(str(resources.files(__package__)))


def load_recipe(name_or_path: str | Path) -> Recipe:
    """The shipped recipe of that name (e.g. ``"resnet"``), or the recipe file at that path.

    A ``Path``, or a string that ends in ``.toml`` or holds a path separator, is read as a file;
    any other string is the name of a shipped recipe. Raises RecipeError for an unknown name, a
    missing or unreadable file, malformed TOML, and for unknown keys, wrong types and disallowed
    values (naming the file and the key path).
    """
    text = str(name_or_path)
    path = Path(text)
    if isinstance(name_or_path, Path) or path.suffix == SUFFIX or "/" in text or os.sep in text:
        return read_recipe(path)
    shipped = shipped_folder() / (text + SUFFIX)
    if shipped.is_file():
        return read_recipe(shipped)
    names = [recipe.name for recipe in list_recipes()]
    close = difflib.get_close_matches(text, names, n=3)
    raise RecipeError(f"No recipe named {text!r}" + (f"; close names: {', '.join(close)}" if close else ""),
                      where=f"the recipes shipped in {shipped_folder()}",
                      fix=f"use one of: {', '.join(names)}; or give the path of a recipe .toml file")


def read_recipe(path: Path) -> Recipe:
    """Read and validate one recipe file."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise RecipeError(f"The recipe file {str(path)!r} does not exist",
                          fix="check the path, or give the name of a shipped recipe (`orbify recipes` lists them)") from None
    except (OSError, UnicodeDecodeError) as error:
        raise RecipeError(f"The recipe file {str(path)!r} cannot be read: {error}",
                          fix="give a readable UTF-8 TOML file") from error
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise RecipeError(f"The recipe file is not valid TOML: {error}", where=f"recipe file {path}",
                          fix="fix the TOML syntax at that line (see the README, section Recipes)") from error
    return Recipe(path.stem, path, text, validate(data, path))


def list_recipes() -> list[Recipe]:
    """Every shipped recipe, sorted by name."""
    return [read_recipe(path) for path in sorted(shipped_folder().glob("*" + SUFFIX))]


def find_recipe_for(architecture: str) -> Recipe | None:
    """The shipped recipe that lists ``architecture`` (``resnet18``, ``torchvision:resnet18`` or
    ``package.module:factory``), or None. Used to suggest a recipe when none was given."""
    for recipe in list_recipes():
        if recipe.applies_to(architecture):
            return recipe
    return None
