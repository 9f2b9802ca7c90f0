"""The typer application, its consoles and the error handling of every command."""

from __future__ import annotations

import traceback
from typing import Optional

import typer
from rich.console import Console
from typer.core import TyperGroup

from orbify.errors import OrbifyError

console = Console()
errors = Console(stderr=True)
_state = {"debug": False}

#: The order ``orbify --help`` lists the commands in: the job (convert, check, tune, export), then the helpers.
COMMAND_ORDER = ("convert", "check", "tune", "export", "sizes", "recipes", "summary", "diff", "demo")


class _OrbifyGroup(TyperGroup):
    """Runs a command and turns an :class:`OrbifyError` into one paragraph and its exit code.

    Doing this inside the click group (rather than around ``app()``) means every way of running
    the CLI — the console script, ``python -m orbify.cli``, ``typer.testing.CliRunner`` — behaves alike.
    """

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except OrbifyError as error:
            if _state["debug"]:
                errors.print(traceback.format_exc(), highlight=False, markup=False)
            errors.print(f"[bold red]error:[/] {error}", highlight=False, soft_wrap=True)
            ctx.exit(error.exit_code)

    def list_commands(self, ctx) -> list[str]:
        names = super().list_commands(ctx)
        return sorted(names, key=lambda name: COMMAND_ORDER.index(name) if name in COMMAND_ORDER else len(names))


app = typer.Typer(
    cls=_OrbifyGroup,
    name="orbify",
    help="Turn a trained plain CNN into a rotation-tied (group-equivariant) one, prove it, tune it, export it.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode="rich",
)


@app.callback()
def _root(debug: bool = typer.Option(False, "--debug", help="Show the full traceback when a command fails.")) -> None:
    _state["debug"] = debug


def main(argv: Optional[list[str]] = None) -> None:
    """Console-script entry point (orbify errors are handled by the command group itself)."""
    try:
        app(args=argv, standalone_mode=True)
    except KeyboardInterrupt:
        errors.print("interrupted")
        raise SystemExit(130) from None
    except SystemExit:
        raise
    except Exception as error:  # an orbify bug or an unexpected library error: say so plainly
        if _state["debug"]:
            traceback.print_exc()
        errors.print(f"[bold red]unexpected error:[/] {type(error).__name__}: {error}. "
                     "Run again with --debug for the traceback and report it.", highlight=False, soft_wrap=True)
        raise SystemExit(1) from error
