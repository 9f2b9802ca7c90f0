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

import torch
import typer
from rich.table import Table
from torch import fx, nn

from orbify.cli.app import app, console
from orbify.cli.models import Trust, is_converted_source, print_notes, read_converted, read_model
from orbify.cli.options import ForceOption, TrustOption, TrustSourceOption, parse_floats
from orbify.cli.outputs import refuse_output
from orbify.common.options import check_choice
from orbify.conversion.converter import convert
from orbify.data.catalog import open_tiles
from orbify.data.images import evenly_spaced
from orbify.data.tiles import Preparation, Tiles
from orbify.errors import OptionError
from orbify.files.saving import require_reference, save
from orbify.files.source_arguments import TORCHVISION_PREFIX
from orbify.files.sources import rebuild
from orbify.files.weights import load_weights_file
from orbify.graph.plan import ConversionPlan
from orbify.graph.sizes import SizeChecker, input_channels
from orbify.recipes.schema import CALIBRATION_IMAGES, CONVERT_DEFAULTS
from orbify.tuning.distributed import process_rank
from orbify.tuning.loop import tune
from orbify.tuning.options import DEFAULT_VAL_LIMIT, SCHEDULES, RunSettings, TuneOptions
from orbify.tuning.records import Evaluation, TuneResult
from orbify.tuning.teacher import VIEW_COMBINATIONS
from orbify.verification.report import write_text

_TUNE = TuneOptions()
"""The defaults of the tuning options, as :func:`orbify.tune` has them."""
_SETTINGS = RunSettings()

TUNE_INITS = ("orbit-average", "calibrated")
"""Initialisations of a SOURCE converted on the fly for tuning (embed needs the fields budget's width)."""


@dataclass
class TuneInputs:
    """What the command tunes: the student with its plan, the teacher, the reference saved with the result, the training
    and (when given separately) validation data."""

    student: fx.GraphModule
    plan: ConversionPlan
    teacher: nn.Module
    reference: str | None
    data: Tiles
    val: Tiles | None


@app.command("tune")
def tune_command(
    model: str = typer.Argument(..., help="A converted-model file (.orb), or a plain model SOURCE to convert first "
                                "(torchvision:NAME, package.module:factory, 'example', a pickled model)."),
    data: Path = typer.Option(..., "--data", help="The training images: a folder (one sub-folder per class gives "
                              "labels; sub-folders images/ and masks/ paired by file stem give masks), a CSV manifest "
                              "(path, optional label, mask and split columns), an .npy array (memory-mapped), an .npz "
                              "file (read whole: images, optional labels or masks), or tar shards "
                              "('tiles-{0000..0099}.tar'; needs orbify[shards]). Read lazily in --workers processes. "
                              "Masks are PNGs of class indices (grey or palette)."),
    val: Optional[Path] = typer.Option(None, "--val", help="Separate validation images (the same forms); default: a "
                                       "manifest's 'val' rows, else the --holdout share of --data."),
    val_limit: int = typer.Option(DEFAULT_VAL_LIMIT, "--val-limit", min=1, help="Evaluate at most this many "
                                  "validation images, evenly spaced (each epoch, as given and moved by every element)."),
    augment: str = typer.Option(_TUNE.augment, "--augment", help="Augmentation of the training images: none, light "
                                "(crop, small turn, flips outside the group, brightness/contrast) or strong (adds colour "
                                "jitter and blur); needs --teacher online."),
    teacher: str = typer.Option(_TUNE.teacher, "--teacher", help="cached: the original averaged over the group runs "
                                "once per image and its outputs are kept on disk (--teacher-cache); online: it runs on "
                                "every batch (|G| forward passes per step; needed with --augment); auto: cached for a "
                                "classifier, online for a dense model (whose cache holds a map per image) or with "
                                "--augment."),
    teacher_cache: Optional[Path] = typer.Option(None, "--teacher-cache", help="Folder of the cached teacher outputs "
                                                 "(default: OUT.teacher); reused by a later run with the same original, "
                                                 "group, views, data and preprocessing."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Processes that read and decode images, per "
                                          "training process (default: half the cores, at most 8; 0: none)."),
    checkpoint_every: Optional[int] = typer.Option(None, "--checkpoint-every", min=1, help="Also checkpoint every N "
                                                   "steps within an epoch (--resume continues mid-epoch)."),
    skip_unreadable: bool = typer.Option(False, "--skip-unreadable", help="Skip images that cannot be read, count "
                                         "them and list them in OUT.skipped.txt, instead of stopping."),
    precision: str = typer.Option(_SETTINGS.precision, "--precision", help="auto (bfloat16 autocast on GPUs, "
                                  "float32 on CPUs), float32, or bf16 (GPUs only)."),
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
    use_labels: bool = typer.Option(True, "--labels/--no-labels", help="Use the data's labels (or masks) when it has "
                                    "them."),
    ignore_index: int = typer.Option(_TUNE.ignore_index, "--ignore-index", help="The mask value of pixels without a "
                                     "label: left out of the loss and the scores."),
    class_weights: Optional[str] = typer.Option(None, "--class-weights", help="One weight per class for the "
                                                "cross-entropy on labels or masks, e.g. 0.2,1,1,4 (rare classes "
                                                "weighed up)."),
    head: str = typer.Option("invariant", "--head", help="With a plain SOURCE: invariant (a classifier) or map (a "
                             "dense model such as a segmenter, equivariant); a converted MODEL keeps its own."),
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
    refuse_output(out, force, inputs=[Path(model), weights, data, val])
    main = process_rank() == 0
    check_choice("init", init, TUNE_INITS)
    TuneOptions(augment=augment, teacher=teacher).validate()
    preparing = Preparing(data, val, input_size, channels, parse_floats(mean, "--mean"), parse_floats(std, "--std"),
                          limit)
    inputs = read_inputs(model, original, weights, Trust(trust_pickle, trust_source), (group, budget, head, init),
                         preparing, quiet=not main)
    result = tune(inputs.student, inputs.teacher, inputs.plan.group, inputs.data, val=inputs.val, epochs=epochs, lr=lr,
                  batch_size=batch_size, view_combination=views, label_weight=label_weight, holdout_fraction=holdout,
                  schedule=schedule, seed=seed, augment=augment, teacher=teacher, use_labels=use_labels,
                  ignore_index=ignore_index, class_weights=parse_floats(class_weights, "--class-weights"),
                  checkpoint_path=checkpoint or out.with_name(out.name + ".checkpoint"), resume=resume, force=force,
                  recalibrate=recalibrate, progress=main, device=device, workers=workers,
                  checkpoint_every=checkpoint_every, skip_unreadable=skip_unreadable, precision=precision,
                  teacher_cache=teacher_cache or out.with_name(out.name + ".teacher"), val_limit=val_limit)
    if result.rank != 0:
        return
    console.print(history_table(result))
    console.print(teacher_line(result), highlight=False)
    for note in result.notes:
        console.print(f"[yellow]note:[/] {note}", highlight=False)
    if result.skipped:
        listed = write_text(out.with_name(out.name + ".skipped.txt"), "\n".join(result.skipped) + "\n", force=force)
        console.print(f"[yellow]skipped {len(result.skipped)} unreadable image(s)[/], listed in {listed}",
                      highlight=False)
    path = save(inputs.student.cpu(), inputs.plan, out, reference=inputs.reference, force=force)
    console.print(f"wrote {path} ({path.stat().st_size:,} bytes)", highlight=False)


@dataclass(frozen=True)
class Preparing:
    """Where the images are and how to prepare them, as the command line gave it."""

    data: Path
    val: Path | None
    size: int | None
    channels: int | None
    mean: list[float] | None
    std: list[float] | None
    limit: int | None

    def open(self, size: int | None, channels: int) -> tuple[Tiles, Tiles | None]:
        """The training and validation tiles, prepared at ``size`` (None: the first training image's) with
        ``channels``."""
        preparation = Preparation(channels, size, _tuple(self.mean), _tuple(self.std))
        train = open_tiles(self.data, preparation=preparation, limit=self.limit)
        if size is None:
            preparation = Preparation(channels, train[0][0].shape[-1], _tuple(self.mean), _tuple(self.std))
            train = train.with_preparation(size=preparation.size)
        return train, open_tiles(self.val, preparation=preparation) if self.val is not None else None


def read_inputs(model: str, original: str | None, weights: Path | None, trust: Trust,
                conversion: tuple[str, str, str, str], preparing: Preparing, quiet: bool) -> TuneInputs:
    """The student, its plan, the teacher, the reference to save with the result and the data; ``conversion`` is
    (group, budget, head, init) for a plain SOURCE."""
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
        train, val = preparing.open(preparing.size or shape[-1], preparing.channels or shape[1])
        return TuneInputs(converted.module, converted.plan, teacher, reference, train, val)
    if original is not None:
        raise OptionError("--original is for a converted MODEL; a plain SOURCE is its own teacher",
                          where="option --original", fix="leave out --original, or give a converted (.orb) file")
    _require_weights(model, weights)
    loaded = read_model(model, weights, trust)
    require_reference(loaded.reference, model)
    teacher = loaded.module
    channels = preparing.channels or input_channels(teacher)
    train, val = preparing.open(preparing.size, channels)
    size = train.preparation.size
    checker = SizeChecker(teacher, channels)
    if not quiet and not checker.is_safe(size):
        console.print(f"[yellow]warning:[/] the images' size {size} is not safe for this model "
                      f"({checker.violations(size)[0]}), so the converted model is not exactly invariant at it; "
                      f"safe sizes nearby: {checker.nearby(size)} (--input-size)", highlight=False)
    group, budget, head, init = conversion
    calibration = None
    if init == "calibrated":
        chosen = evenly_spaced(len(train), CALIBRATION_IMAGES)
        calibration = torch.stack([train[index][0] for index in chosen])
    student, plan = convert(teacher, group, budget, head, train[0][0][None], init=init,
                            calibration=calibration, progress=not quiet)
    return TuneInputs(student, plan, teacher, loaded.reference, train, val)


def _tuple(values: list[float] | None) -> tuple[float, ...] | None:
    return tuple(values) if values is not None else None


def _rebuild_teacher(reference: str, weights: Path) -> nn.Module:
    """The original a converted file records (its consent already checked), with the trained weights from --weights;
    what loading them adapted is printed as notes."""
    teacher = rebuild(reference)
    print_notes(load_weights_file(teacher, weights, reference=reference))
    return teacher


def _require_weights(source: str, weights: Path | None) -> None:
    """A torchvision original without --weights would be a randomly initialised teacher: refuse it."""
    if weights is None and source.startswith(TORCHVISION_PREFIX):
        raise OptionError(f"The original {source!r} has random weights unless --weights gives them; a random "
                          "teacher teaches nothing", where="option --weights",
                          fix="add --weights with the original's trained state dict")


def teacher_line(result: TuneResult) -> str:
    """What the teacher cost: the pass that cached it, the time a reused cache saved, or the online teacher."""
    if result.teacher_online:
        return "teacher: online, |G| forward passes of the original per training step"
    if result.teacher_reused:
        return f"teacher: cached outputs reused, saving the {result.teacher_seconds:.1f} s pass that computed them"
    return f"teacher: computed once and cached in {result.teacher_seconds:.1f} s"


def history_table(result: TuneResult) -> Table:
    """One row per epoch: training loss, held-out loss and accuracy (or agreement) upright and transformed; for a
    dense model per-pixel figures and the mean IoU upright, transformed (mean over the elements) and worst."""
    measure = result.final.measure
    dense = result.final.segmentation is not None
    columns = ["epoch", "train loss", "held-out loss", f"{measure} upright", f"{measure} transformed"]
    columns += ["mean IoU upright", "mean IoU transformed", "mean IoU worst"] if dense else []
    table = Table(*columns, "seconds", "images/s",
                  title=f"tuning on {result.processes} process{'es' if result.processes > 1 else ''}: "
                        f"{result.train_images} training, {result.held_out_images} held-out images")
    table.add_row("before", "", *_held_out_cells(result.before), "", "")
    for record in result.history:
        table.add_row(str(record.epoch), f"{record.train_loss:.4f}", *_held_out_cells(record.held_out),
                      f"{record.seconds:.1f}", f"{record.images / record.seconds:,.0f}")
    return table


def _held_out_cells(held: Evaluation) -> list[str]:
    cells = [f"{held.loss:.4f}", f"{held.upright:.3f}", f"{held.transformed:.3f}"]
    scores = held.segmentation
    if scores is not None:
        cells += [f"{scores.upright.mean_iou:.3f}", f"{scores.moved_mean_iou:.3f}", f"{scores.worst_iou:.3f}"]
    return cells
