"""``orbify tune``: distil the original, averaged over the group, into the converted model and save it.

MODEL is either a converted-model file (the teacher is rebuilt from the source reference the file
records, or from --original, with the original's weights from --weights), or a plain model SOURCE
that is converted first (--group, --budget) and is itself the teacher. The same command runs on
one process or, launched by ``torchrun``, on many (only rank 0 prints and writes files).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import typer
from rich.table import Table
from torch import fx, nn

from orbify.cli.app import app, console
from orbify.cli.models import Trust, is_converted_source, read_converted, read_model
from orbify.cli.options import ForceOption, TrustOption, TrustSourceOption, parse_floats
from orbify.cli.outputs import refuse_output
from orbify.common.options import check_choice
from orbify.conversion.converter import convert
from orbify.data import ImageSet, evenly_spaced, read_images
from orbify.errors import OptionError
from orbify.files.saving import require_reference, save
from orbify.files.sources import TORCHVISION_PREFIX, load_weights_file, rebuild
from orbify.graph.plan import ConversionPlan
from orbify.graph.sizes import SizeChecker, input_channels
from orbify.recipes.schema import CALIBRATION_IMAGES, CONVERT_DEFAULTS
from orbify.tuning.distributed import process_rank
from orbify.tuning.loop import tune
from orbify.tuning.options import SCHEDULES, TuneOptions
from orbify.tuning.records import TuneResult
from orbify.tuning.teacher import VIEW_COMBINATIONS

_TUNE = TuneOptions()
"""The defaults of the tuning options, as :func:`orbify.tune` has them."""

TUNE_INITS = ("orbit-average", "calibrated")
"""Initialisations of a SOURCE converted on the fly for tuning (embed needs the fields budget's width)."""


@dataclass
class TuneInputs:
    """What the command tunes: the student with its plan, the teacher, the reference saved with the result, the data."""

    student: fx.GraphModule
    plan: ConversionPlan
    teacher: nn.Module
    reference: str | None
    data: ImageSet


@app.command("tune")
def tune_command(
    model: str = typer.Argument(..., help="A converted-model file (.orb), or a plain model SOURCE to convert first "
                                "(torchvision:NAME, package.module:factory, 'example', a pickled model)."),
    data: Path = typer.Option(..., "--data", help="An image folder (one sub-folder per class gives labels) or an "
                              ".npz file with 'images' and optionally 'labels'."),
    out: Path = typer.Option(..., "--out", "-o", help="The tuned converted-model file to write (.orb)."),
    original: Optional[str] = typer.Option(None, "--original", help="With a converted MODEL: the plain model the "
                                           "teacher is built from (default: the source the file records)."),
    weights: Optional[Path] = typer.Option(None, "--weights", help="The original's state-dict file (read with "
                                           "weights_only=True); needed for torchvision:NAME originals."),
    group: str = typer.Option(CONVERT_DEFAULTS["group"], "--group", "-g",
                              help="With a plain SOURCE: the group to convert to."),
    budget: str = typer.Option(CONVERT_DEFAULTS["budget"], "--budget", help="With a plain SOURCE: the conversion budget."),
    init: str = typer.Option(CONVERT_DEFAULTS["init"], "--init", help="With a plain SOURCE: orbit-average, or "
                             f"calibrated (every layer refitted first on up to {CALIBRATION_IMAGES} of the --data images, "
                             "without their labels, so tuning starts close to the original averaged over the group)."),
    epochs: int = typer.Option(_TUNE.epochs, "--epochs", min=1, help="Training epochs."),
    lr: float = typer.Option(_TUNE.lr, "--lr", help="Peak learning rate (AdamW)."),
    batch_size: int = typer.Option(_TUNE.batch_size, "--batch-size", min=2, help="Images per process per step."),
    views: str = typer.Option(_TUNE.view_combination, "--views", help="How the teacher combines the |G| views: probability "
                              "(original trained with rotations), logit, or most-confident (original trained on "
                              "upright images only: usually far better there)."),
    label_weight: float = typer.Option(_TUNE.label_weight, "--label-weight", min=0.0, help="Weight of the cross-entropy on labels "
                                       "added to the distillation loss (0: distillation only)."),
    use_labels: bool = typer.Option(True, "--labels/--no-labels", help="Use the data's labels when it has them."),
    schedule: str = typer.Option(_TUNE.schedule, "--schedule", help=f"Learning-rate schedule: {', '.join(SCHEDULES)}."),
    holdout: float = typer.Option(_TUNE.holdout_fraction, "--holdout", help="Share of the images held out for evaluation."),
    seed: int = typer.Option(_TUNE.seed, "--seed", help="Seed of the split, the batch order and every random draw."),
    input_size: Optional[int] = typer.Option(None, "--input-size", min=1, help="Resize and centre-crop images to "
                                             "this side (default: the converted model's size; with a SOURCE, the "
                                             "images' own size)."),
    channels: Optional[int] = typer.Option(None, "--channels", min=1, help="Image channels (default: the model's)."),
    mean: Optional[str] = typer.Option(None, "--mean", help="Per-channel mean to subtract, e.g. 0.485,0.456,0.406."),
    std: Optional[str] = typer.Option(None, "--std", help="Per-channel std to divide by, e.g. 0.229,0.224,0.225."),
    limit: Optional[int] = typer.Option(None, "--limit", min=2, help="Use at most this many images."),
    checkpoint: Optional[Path] = typer.Option(None, "--checkpoint", help="Checkpoint written after every epoch "
                                              "(default: OUT.checkpoint)."),
    resume: bool = typer.Option(False, "--resume", help="Continue from the checkpoint if it exists."),
    recalibrate: bool = typer.Option(True, "--recalibrate/--no-recalibrate", help="Re-estimate batch-norm "
                                     "statistics on the training images before the first epoch."),
    device: Optional[str] = typer.Option(None, "--device", help="cpu, cuda, cuda:1, ... (default: cuda:LOCAL_RANK "
                                         "where CUDA exists, else cpu)."),
    trust_pickle: bool = TrustOption,
    trust_source: bool = TrustSourceOption,
    force: bool = ForceOption,
) -> None:
    """Tune a converted model by distillation from the original averaged over the group; write it to OUT.

    Examples:

      orbify tune model-c4.orb --weights original.pt --data images/ --views most-confident -o model-c4-tuned.orb

      orbify tune example --group c4 --data tiles.npz --epochs 5 -o example-c4-tuned.orb

      torchrun --nproc_per_node=4 -m orbify.cli tune model-c4.orb --weights original.pt --data images/ -o tuned.orb
    """
    if views not in VIEW_COMBINATIONS:
        raise OptionError(f"Unknown view combination {views!r}", where="option --views",
                          fix=f"choose one of: {', '.join(VIEW_COMBINATIONS)}")
    refuse_output(out, force, inputs=[Path(model), weights, data])
    main = process_rank() == 0
    check_choice("init", init, TUNE_INITS)
    inputs = read_inputs(model, original, weights, Trust(trust_pickle, trust_source), group, budget, init, data, input_size, channels,
                         parse_floats(mean, "--mean"), parse_floats(std, "--std"), limit, quiet=not main)
    labels = inputs.data.labels if use_labels else None
    result = tune(inputs.student, inputs.teacher, inputs.plan.group, inputs.data.images, labels, epochs=epochs, lr=lr,
                  batch_size=batch_size, view_combination=views, label_weight=label_weight, holdout_fraction=holdout,
                  schedule=schedule, seed=seed, checkpoint_path=checkpoint or out.with_name(out.name + ".checkpoint"),
                  resume=resume, force=force, recalibrate=recalibrate, progress=main, device=device)
    if result.rank != 0:
        return
    console.print(history_table(result))
    for note in result.notes:
        console.print(f"[yellow]note:[/] {note}", highlight=False)
    path = save(inputs.student.cpu(), inputs.plan, out, reference=inputs.reference, force=force)
    console.print(f"wrote {path} ({path.stat().st_size:,} bytes)", highlight=False)


def read_inputs(model: str, original: str | None, weights: Path | None, trust: Trust, group: str, budget: str,
                init: str, data: Path, input_size: int | None, channels: int | None, mean: list[float] | None,
                std: list[float] | None, limit: int | None, quiet: bool) -> TuneInputs:
    """The student, its plan, the teacher, the reference to save with the result and the images."""
    if is_converted_source(model):
        converted = read_converted(model, trust, original)
        reference = converted.metadata["source"]
        if original is None and weights is None:
            raise OptionError(f"The teacher is the original {reference!r} that {model!r} was converted from, and its "
                              "trained weights must come from --weights", where="option --weights",
                              fix="add --weights ORIGINAL.pt, or name an original that builds its own trained weights "
                                  "with --original (e.g. --original example)")
        _require_weights(original or reference, weights)
        if original is not None:
            teacher = read_model(original, weights, trust).module
        else:
            teacher = _rebuild_teacher(reference, weights)
        shape = converted.plan.input_shape
        images = read_images(data, size=input_size or shape[-1], channels=channels or shape[1], limit=limit,
                             mean=mean, std=std)
        return TuneInputs(converted.module, converted.plan, teacher, reference, images)
    if original is not None:
        raise OptionError("--original is for a converted MODEL; a plain SOURCE is its own teacher",
                          where="option --original", fix="leave out --original, or give a converted (.orb) file")
    _require_weights(model, weights)
    loaded = read_model(model, weights, trust)
    require_reference(loaded.reference, model)
    teacher = loaded.module
    images = read_images(data, size=input_size, channels=channels or input_channels(teacher), limit=limit,
                         mean=mean, std=std)
    size = images.images.shape[-1]
    checker = SizeChecker(teacher, images.images.shape[1])
    if not quiet and not checker.is_safe(size):
        nearby = ", ".join(map(str, checker.safe_sizes(size, 3)))
        console.print(f"[yellow]warning:[/] the images' size {size} is not safe for this model "
                      f"({checker.violations(size)[0]}), so the converted model is not exactly invariant at it; "
                      f"safe sizes nearby: {nearby or 'none found'} (--input-size)", highlight=False)
    calibration = images.images[evenly_spaced(len(images), CALIBRATION_IMAGES)] if init == "calibrated" else None
    student, plan = convert(teacher, group, budget, "invariant", images.images[:1], init=init,
                            calibration=calibration, progress=not quiet)
    return TuneInputs(student, plan, teacher, loaded.reference, images)


def _rebuild_teacher(reference: str, weights: Path) -> nn.Module:
    """The original a converted file records (its consent already checked), with the trained weights from --weights."""
    teacher = rebuild(reference)
    load_weights_file(teacher, weights)
    return teacher


def _require_weights(source: str, weights: Path | None) -> None:
    """A torchvision original without --weights would be a randomly initialised teacher: refuse it."""
    if weights is None and source.startswith(TORCHVISION_PREFIX):
        raise OptionError(f"The original {source!r} has random weights unless --weights gives them; a random "
                          "teacher teaches nothing", where="option --weights",
                          fix="add --weights with the original's trained state dict")


def history_table(result: TuneResult) -> Table:
    """One row per epoch: training loss, held-out loss and accuracy (or agreement) upright and transformed."""
    measure = result.final.measure
    table = Table("epoch", "train loss", "held-out loss", f"{measure} upright", f"{measure} transformed", "seconds",
                  title=f"tuning on {result.processes} process{'es' if result.processes > 1 else ''}: "
                        f"{result.train_images} training, {result.held_out_images} held-out images")
    before = result.before
    table.add_row("before", "", f"{before.loss:.4f}", f"{before.upright:.3f}", f"{before.transformed:.3f}", "")
    for record in result.history:
        held = record.held_out
        table.add_row(str(record.epoch), f"{record.train_loss:.4f}", f"{held.loss:.4f}", f"{held.upright:.3f}",
                      f"{held.transformed:.3f}", f"{record.seconds:.1f}")
    return table
