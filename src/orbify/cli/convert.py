"""``orbify convert``: turn a plain model into its rotation-tied counterpart and save it.

The command parses its options, picks the input size (see :func:`orbify.graph.sizes.choose_input_size`), calls
:func:`orbify.convert`, measures the result and writes it with :func:`orbify.save`.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import torch
import typer
from rich.table import Table

from orbify.cli.app import app, console
from orbify.cli.models import Trust, read_model
from orbify.cli.options import (
    BUDGET_HELP,
    GROUP_HELP,
    HEAD_HELP,
    SOURCE_HELP,
    ChannelsOption,
    ForceOption,
    TrustOption,
    WeightsOption,
    parse_floats,
)
from orbify.cli.outputs import refuse_output
from orbify.cli.sizes import REPAIR_STRIDES_HELP
from orbify.common.options import check_choice
from orbify.conversion.converter import convert
from orbify.data import read_images
from orbify.errors import OptionError
from orbify.files.saving import is_converted_file, require_reference, save
from orbify.files.sources import EXAMPLE_SIZE, IMAGENET_SIZE, usual_input_size
from orbify.graph.plan import BUDGETS, HEADS, INITS, ConversionPlan
from orbify.graph.sizes import choose_input_size, input_channels
from orbify.graph.stride_conflicts import no_exact_size_error
from orbify.graph.stride_repair import REPAIR_NOTE, repaired_model
from orbify.recipes import find_recipe_for, load_recipe, merge_options
from orbify.recipes.schema import CALIBRATION_IMAGES, CONVERT_DEFAULTS
from orbify.symmetry.groups import approximate_note, parse_group
from orbify.verification.check import CheckReport, check_model, random_inputs
from orbify.verification.report import error, ratio, si

INIT_HELP = ("orbit-average: project the pretrained weights onto the tied ones; embed (fields budget only): "
             "start exactly at the original averaged over the group; calibrated: refit every layer on unlabeled "
             "images (--calibration) so the model starts close to the original averaged over the group.")
QUICK_CHECK_IMAGES = 2
"""Random images the command checks the converted output's invariance on (a full check: orbify check)."""


def _recipe_default(option: str) -> str:
    """The end of a conversion option's help: the recipe's value, else :func:`orbify.convert`'s default."""
    return f" Default: the recipe's, else {CONVERT_DEFAULTS[option]}."


@app.command("convert")
def convert_command(
    source: str = typer.Argument(..., help=SOURCE_HELP),
    out: Path = typer.Option(..., "--out", "-o", help="The converted-model file to write (.orb)."),
    group: Optional[str] = typer.Option(None, "--group", "-g", help=GROUP_HELP + _recipe_default("group")),
    budget: Optional[str] = typer.Option(None, "--budget", help=BUDGET_HELP + _recipe_default("budget")),
    head: Optional[str] = typer.Option(None, "--head", help=HEAD_HELP + _recipe_default("head")),
    init: Optional[str] = typer.Option(None, "--init", help=INIT_HELP + _recipe_default("init")),
    match: Optional[bool] = typer.Option(None, "--match/--no-match", help="Choose which original channels share an "
                                         "orbit so that the projection loses the least (default: the recipe's, "
                                         f"else {'on' if CONVERT_DEFAULTS['match'] else 'off'})."),
    input_size: Optional[int] = typer.Option(None, "--input-size", min=1, help="Height and width of the input. "
                                             "Default: the recipe's size, else the safe size nearest the "
                                             f"architecture's usual one ({IMAGENET_SIZE} for torchvision backbones, "
                                             f"{EXAMPLE_SIZE} for 'example')."),
    recipe_name: Optional[str] = typer.Option(None, "--recipe", help="A shipped recipe's name (orbify recipes "
                                              "lists them) or a recipe .toml file; options given here override it."),
    repair_strides: Optional[bool] = typer.Option(None, "--repair-strides/--no-repair-strides",
                                                  help=REPAIR_STRIDES_HELP + " Default: the recipe's, else off."),
    channels: Optional[int] = ChannelsOption,
    stop_at: Optional[str] = typer.Option(None, "--stop-at", help="Convert only up to this graph node or module "
                                          "path: its orbits are pooled there, and later layers keep plain "
                                          "channels (with filters symmetric under the group)."),
    calibration: Optional[Path] = typer.Option(None, "--calibration", help="Unlabeled images for --init calibrated "
                                               "(implied when this is given): an image folder or an .npz file with "
                                               "'images', resized to the input size; a few hundred are enough."),
    calibration_size: Optional[int] = typer.Option(None, "--calibration-size", min=1, help="Read at most this many "
                                                   "--calibration images, evenly spaced (default: the recipe's, "
                                                   f"else {CALIBRATION_IMAGES})."),
    mean: Optional[str] = typer.Option(None, "--mean", help="Per-channel mean to subtract from the --calibration "
                                       "images, as the original's inputs were prepared, e.g. 0.485,0.456,0.406."),
    std: Optional[str] = typer.Option(None, "--std", help="Per-channel std to divide the --calibration images by, "
                                      "e.g. 0.229,0.224,0.225."),
    weights: Optional[Path] = WeightsOption,
    trust_pickle: bool = TrustOption,
    force: bool = ForceOption,
) -> None:
    """Convert SOURCE into a rotation-tied model, check its output invariance quickly and save it.

    Prints the chosen input size and why, then a table: parameters and MACs before and after,
    the worst weight residual (how far the projection moved a layer's weights) and the output's
    invariance error on two random images. The converted model drifts from the original until it
    is tuned (orbify tune); orbify check measures it in full.

    Examples:

      orbify convert example -o example-d4.orb

      orbify convert torchvision:resnet18 --weights resnet18.pt --recipe resnet -o resnet18-d4.orb

      orbify convert torchvision:resnet18 --weights resnet18.pt --group c4 --input-size 225 -o resnet18-c4.orb

      orbify convert mypackage.models:build_net --weights net.pt --budget params --input-size 129 -o net-d4.orb

      orbify convert torchvision:resnet18 --weights resnet18.pt --recipe resnet --calibration photos/ -o resnet18-d4.orb

      orbify convert timm:resnet18d --weights resnet18d.safetensors --group c4 --repair-strides -o resnet18d-c4.orb
    """
    refuse_output(out, force, inputs=[Path(source), weights, calibration])
    if calibration is not None and init is None:
        init = "calibrated"
    if Path(source).is_file() and is_converted_file(Path(source)):
        raise OptionError(f"{source!r} is already a converted model",
                          fix="check, tune or export it (orbify check/tune/export), or convert its plain original")
    recipe = load_recipe(recipe_name) if recipe_name is not None else None
    given = {"group": group, "budget": budget, "head": head, "init": init, "match": match, "stop_at": stop_at,
             "repair_strides": repair_strides}
    if recipe is not None:
        options = merge_options(recipe, given)
        recipe_size = options.pop("input_size")
    else:
        options = {**CONVERT_DEFAULTS, **{key: value for key, value in given.items() if value is not None}}
    check_options(options)
    check_calibration(options["init"], calibration)
    loaded = read_model(source, weights, Trust(trust_pickle))
    require_reference(loaded.reference, source)
    original = loaded.module
    channels = channels or input_channels(original)
    usual = usual_input_size(source)
    sized = original      # the model whose sizes count: the original, or the original with its repairs
    if options["repair_strides"]:
        near = input_size or (recipe_size if recipe is not None else usual[0])
        sized, _ = repaired_model(original, channels, near)
    if recipe is not None:
        if input_size is None:
            recipe.check_input_size(original, channels=channels)
        choice = choose_input_size(sized, usual, requested=input_size, recipe_size=recipe_size,
                                   recipe_name=recipe.name, channels=channels)
    else:
        suggest_recipe(loaded.reference or source)
        choice = choose_input_size(sized, usual, requested=input_size, channels=channels)
    if choice.conflicts and input_size is None:
        raise no_exact_size_error(choice.conflicts)
    console.print(f"input size {choice.size}: {choice.reason}", highlight=False)
    example = torch.zeros(1, channels, choice.size, choice.size)
    images = None
    if calibration is not None:
        limit = calibration_size or (recipe.calibration_images if recipe is not None else CALIBRATION_IMAGES)
        images = read_images(calibration, size=choice.size, channels=channels, limit=limit,
                             mean=parse_floats(mean, "--mean"), std=parse_floats(std, "--std")).images
    converted, plan = convert(original, example_input=example, calibration=images, progress=True, **options)
    checked, _ = random_inputs(parse_group(plan.group), QUICK_CHECK_IMAGES, channels, (choice.size, choice.size), 0)
    report = check_model(converted, original, plan, checked)
    path = save(converted, plan, out, reference=loaded.reference, recipe=recipe.name if recipe else None,
                check=report.to_dict(), force=force)
    console.print(conversion_table(report, plan))
    for note in plan.notes:
        if note.startswith(REPAIR_NOTE):
            console.print(f"note: {note}", highlight=False)
    if not parse_group(plan.group).exact:
        console.print(f"note: {approximate_note(parse_group(plan.group))}", highlight=False)
    console.print(f"wrote {path} ({path.stat().st_size:,} bytes). Next: orbify tune {path} --data IMAGES -o TUNED.orb",
                  highlight=False)


def check_options(options: dict) -> None:
    """Refuse a bad group, budget, head or init before any model is read."""
    parse_group(options["group"])
    check_choice("budget", options["budget"], BUDGETS)
    check_choice("head", options["head"], HEADS)
    check_choice("init", options["init"], INITS)


def check_calibration(init: str, calibration: Path | None) -> None:
    """--init calibrated needs --calibration, and --calibration is for --init calibrated only."""
    if init == "calibrated" and calibration is None:
        raise OptionError("The calibrated initialisation needs unlabeled images", where="option --calibration",
                          fix="add --calibration IMAGES (a folder or an .npz file; a few hundred images prepared "
                              "like the original's inputs), or choose --init orbit-average")
    if init != "calibrated" and calibration is not None:
        raise OptionError(f"--calibration images are used by the calibrated initialisation, not by {init!r}",
                          where="option --calibration", fix="leave out --init (or give --init calibrated), or leave "
                                                            "out --calibration")


def suggest_recipe(architecture: str) -> None:
    """Print the shipped recipe made for ``architecture``, if there is one."""
    recipe = find_recipe_for(architecture)
    if recipe is not None:
        console.print(f"tip: the shipped recipe {recipe.name!r} is made for this architecture "
                      f"({recipe.group}, input size {recipe.input_size}); add --recipe {recipe.name} to use it",
                      highlight=False)


def conversion_table(report: CheckReport, plan: ConversionPlan) -> Table:
    """Parameters, MACs, worst weight residual and output invariance error, before and after."""
    table = Table("", "original", f"converted ({plan.group}, {plan.budget})", title="conversion")
    table.add_row("parameters", f"{report.params_before:,}", f"{report.params_after:,}  {ratio(report.param_ratio)}")
    table.add_row("MACs per image", si(report.macs_before), f"{si(report.macs_after)}  {ratio(report.mac_ratio)}")
    residuals = [(layer.weight_residual, layer.name) for layer in plan.layers if layer.weight_residual is not None]
    if residuals:
        worst, name = max(residuals)
        table.add_row("worst weight residual", "", f"{worst:.2f} ({name})")
    if plan.calibration is not None:
        calibration = plan.calibration
        agreement = calibration.agreement
        table.add_row("calibration", "", f"{calibration.images} images × {calibration.views} views, "
                                         f"{calibration.seconds:.1f} s")
        table.add_row("top-1 agreement with the original averaged over the group", "",
                      "-" if agreement is None else f"{agreement:.3f} (calibration images)")
        refits = [(layer.error, layer.target) for layer in calibration.layers if layer.error is not None]
        if refits:
            worst_refit, refit_name = max(refits)
            table.add_row("worst refit (unexplained variance)", "", f"{worst_refit:.4f} ({refit_name})")
        fallbacks = [layer.target for layer in calibration.layers if layer.error is None]
        if fallbacks:
            table.add_row("kept orbit averaging", "", ", ".join(fallbacks))
    table.add_row(f"output {report.output_property} error", "",
                  f"{error(report.invariance_error)} ({report.precision}), "
                  f"{error(report.invariance_error_float32)} (float32)")
    return table
