"""Recipes: tested conversion and tuning settings for known architectures, one TOML file each.

The recipes shipped with orbify live in this package folder (``*.toml``, package data).
``load_recipe("resnet")`` reads a shipped one by name, ``load_recipe("mine.toml")`` a file of
your own; ``find_recipe_for("resnet18")`` finds the recipe for an architecture. The file
format is described in :mod:`orbify.recipes.schema` and in the README, section "Recipes".
"""

from orbify.recipes.catalog import find_recipe_for, list_recipes, load_recipe, read_recipe, shipped_folder
from orbify.recipes.recipe import merge_options

__all__ = ["find_recipe_for", "list_recipes", "load_recipe", "merge_options", "read_recipe", "shipped_folder"]
