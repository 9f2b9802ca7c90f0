"""The typer application, the shared options and the error handling of every command."""

from __future__ import annotations

import sys
import traceback
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from typer.core import TyperGroup

from orbify.errors import OptionError, OrbifyError

console = Console()
errors = Console(stderr=True)
_state = {"debug": False}


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


# Options shared by every command that reads a model ---------------------------------------
SOURCE_HELP = ("The model: torchvision:NAME (random weights unless --weights), package.module:factory, "
               "'example' (the bundled model), a converted-model file, or a pickled model (needs --trust-pickle).")
WeightsOption = typer.Option(None, "--weights", help="A state-dict file to load into the model "
                             "(read with weights_only=True; never downloaded).", exists=False)
TrustOption = typer.Option(False, "--trust-pickle", help="Allow loading a whole model pickled with torch.save(model). "
                           "Unpickling runs arbitrary code stored in the file: use it only for files you made yourself "
                           "or fully trust.")
ForceOption = typer.Option(False, "--force", help="Overwrite the output if it exists.")


def parse_floats(text: str | None, option: str) -> list[float] | None:
    """'0.485,0.456,0.406' → [0.485, 0.456, 0.406]; OptionError naming ``option`` when it is not numbers."""
    if text is None:
        return None
    try:
        return [float(part) for part in text.split(",")]
    except ValueError as error:
        raise OptionError(f"{option} must be comma-separated numbers, got {text!r}", where=f"option {option}",
                          fix=f"write e.g. {option} 0.485,0.456,0.406") from error


def main(argv: Optional[list[str]] = None) -> None:
    """Console-script entry point (orbify errors are handled by the command group itself)."""
    try:
        app(args=argv, standalone_mode=True)
    except KeyboardInterrupt:
        errors.print("interrupted")
        raise SystemExit(130)
    except SystemExit:
        raise
    except Exception as error:  # an orbify bug or an unexpected library error: say so plainly
        if _state["debug"]:
            traceback.print_exc()
        errors.print(f"[bold red]unexpected error:[/] {type(error).__name__}: {error}. "
                     "Run again with --debug for the traceback and report it.", highlight=False, soft_wrap=True)
        raise SystemExit(1)
