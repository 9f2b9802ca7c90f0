"""``orbify recipes``: list the shipped recipes; ``orbify recipes show NAME`` prints one."""

from __future__ import annotations

import typer
from rich.syntax import Syntax
from rich.table import Table

from orbify.cli.app import app, console
from orbify.recipes import list_recipes, load_recipe, shipped_folder

recipes_app = typer.Typer(
    invoke_without_command=True,
    no_args_is_help=False,
    rich_markup_mode="rich",
)
app.add_typer(recipes_app, name="recipes")


@recipes_app.callback()
def recipes(ctx: typer.Context) -> None:
    """List the recipes: tested conversion settings for known architectures.

    Without a subcommand, shows each shipped recipe's name, architectures, group, budget and input size.

    Examples: orbify recipes · orbify recipes show resnet ·
    orbify convert torchvision:resnet50 --weights r50.pt --recipe resnet -o r50.orb
    """
    if ctx.invoked_subcommand is not None:
        return
    table = Table("name", "architectures", "group", "budget", "input size", title=f"recipes in {shipped_folder()}")
    table.columns[1].overflow = "fold"
    for recipe in list_recipes():
        table.add_row(recipe.name, ", ".join(recipe.architectures), recipe.group, recipe.budget,
                      str(recipe.input_size))
    console.print(table)
    console.print("[dim]orbify recipes show NAME prints one; orbify convert SOURCE --recipe NAME|FILE applies it.[/]")


@recipes_app.command()
def show(name: str = typer.Argument(..., help="A shipped recipe's name, or the path of a recipe .toml file.")) -> None:
    """Print one recipe file (validated first, so a malformed file is reported, not shown).

    Example: orbify recipes show mobilenet
    """
    recipe = load_recipe(name)
    console.print(f"[bold]{recipe.name}[/]: {recipe.description} [dim]({recipe.path})[/]")
    console.print(Syntax(recipe.text, "toml", theme="ansi_dark", background_color="default", word_wrap=True))
