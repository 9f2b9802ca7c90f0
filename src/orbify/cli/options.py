"""The options several commands share: help texts, typer ``Option`` objects, defaults and value parsing.

Each shared option is written once here; a command adds only what is particular to it (such as
where its default comes from). The conversion defaults are those of :func:`orbify.convert`
(:data:`orbify.recipes.schema.CONVERT_DEFAULTS`).
"""

from __future__ import annotations

import typer

from orbify.errors import OptionError
from orbify.recipes.schema import CONVERT_DEFAULTS

# -- reading a model --------------------------------------------------------------------------------------
SOURCE_HELP = ("The model: torchvision:NAME (random weights unless --weights), package.module:factory, "
               "'example' (the bundled model), a converted-model file, or a pickled model (needs --trust-pickle).")
WeightsOption = typer.Option(None, "--weights", help="A state-dict file to load into the model "
                             "(read with weights_only=True; never downloaded).", exists=False)
TrustOption = typer.Option(False, "--trust-pickle", help="Allow loading a whole model pickled with torch.save(model). "
                           "Unpickling runs arbitrary code stored in the file: use it only for files you made yourself "
                           "or fully trust.")
TrustSourceOption = typer.Option(False, "--trust-source", help="Allow a converted file to import and run the model "
                                 "factory (package.module:factory) and leaf module types it records. A file may name "
                                 "torchvision:NAME or example on its own; anything else is code the file chooses, so "
                                 "allow it only for files you trust (or name the same factory yourself with --original).")
ChannelsOption = typer.Option(None, "--channels", min=1, help="Input channels (default: those of the first conv).")

# -- conversion -------------------------------------------------------------------------------------------
GROUP_HELP = ("The rotation group: d4 (quarter turns and mirror images), c4 (quarter turns), c2, d1, d2; "
              "c8, d8, ... rotate approximately.")
BUDGET_HELP = ("channels: same width, ÷|G| parameters, same MACs; params: ≈ same parameters, ×|G| MACs; "
               "fields: ×|G| width, the original embedded losslessly.")
HEAD_HELP = ("invariant: a classifier whose output ignores the group; map: a dense output (mask) that moves "
             "with the input.")
GroupOption = typer.Option(CONVERT_DEFAULTS["group"], "--group", "-g", help=GROUP_HELP)
BudgetOption = typer.Option(CONVERT_DEFAULTS["budget"], "--budget", help=BUDGET_HELP)
HeadOption = typer.Option(CONVERT_DEFAULTS["head"], "--head", help=HEAD_HELP)

# -- outputs ----------------------------------------------------------------------------------------------
ForceOption = typer.Option(False, "--force", help="Overwrite the output if it exists.")
JsonOption = typer.Option(None, "--json", help="Also write the figures as JSON to this file.")
MarkdownOption = typer.Option(None, "--markdown", help="Also write a markdown report to this file.")


def parse_floats(text: str | None, option: str) -> list[float] | None:
    """'0.485,0.456,0.406' → [0.485, 0.456, 0.406]; OptionError naming ``option`` when it is not numbers."""
    if text is None:
        return None
    try:
        return [float(part) for part in text.split(",")]
    except ValueError as error:
        raise OptionError(f"{option} must be comma-separated numbers, got {text!r}", where=f"option {option}",
                          fix=f"write e.g. {option} 0.485,0.456,0.406") from error
