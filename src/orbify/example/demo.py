"""The whole job on the bundled example: convert, check, tune, check again, export.

:func:`run_demo` takes the example CNN (trained on upright micrograph tiles, see
:mod:`orbify.example`), converts it under :data:`DEMO_GROUP`, checks it, tunes it by distillation
on upright tiles, checks it again and exports it as a pt2 program. It measures every model, and
the alternative a user weighs (the original averaged over the group at test time, exact too but
|G| forward passes per tile), on fresh tiles — upright, in the field (any angle, mirrored half the
time) and moved by every group element — and leaves the converted and tuned models, the check
reports, the exported program, the before/after table and plots in one folder. ``orbify demo`` calls it.
"""

from __future__ import annotations

import copy
import math
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import torch
from torch import nn
from torch.nn.utils import parametrize

from orbify.conversion.converter import convert
from orbify.data import ImageSet
from orbify.example import make_tiles
from orbify.example.demo_support import (
    PLOTS_SKIPPED,
    DemoLog,
    figure_png,
    milliseconds_per_image,
    percent,
    prepare_folder,
    pyplot,
    write_figure,
)
from orbify.files.export import export_model
from orbify.files.saving import save
from orbify.files.sources import EXAMPLE_SOURCE, load_source
from orbify.layers.bake import bake_model
from orbify.recipes import load_recipe, merge_options
from orbify.symmetry.groups import Group, parse_group
from orbify.symmetry.resample import rotate_images
from orbify.tuning.loop import tune
from orbify.tuning.records import TuneResult
from orbify.tuning.teacher import GroupAveraged, view_logits
from orbify.verification.check import CheckReport, check_model
from orbify.verification.html_report import write_check_html
from orbify.verification.measure import count_macs, count_params
from orbify.verification.report import check_markdown, markdown_table, plot_check, write_json, write_text

__all__ = ["AVERAGED_COLUMN", "DemoResult", "ModelFigures", "accuracy_by_angle_figure", "figure_png", "run_demo"]

RECIPE = "example"
"""The shipped recipe for the bundled model: budget, channel matching, input size and the tuning settings."""
DEMO_GROUP = "c4"
"""Quarter turns: on the demo's field tiles c4 did better than d4 (README.md, "How the numbers in
this README were measured"). The six particle shapes are mirror-symmetric, so a c4 model also
recognises mirrored tiles, with twice d4's parameters at the same MACs. The recipe's d4 is
overridden here as ``--group c4`` would override it."""

DEMO_INIT = "calibrated"
"""How the converted model starts: calibrated on :data:`CALIBRATION_TILES` upright tiles, it follows
the original averaged over the group, a poor classifier of field tiles since the original only saw
upright ones; tuning then takes the most confident view as teacher (figures: README.md, "How the
numbers in this README were measured")."""
AVERAGED_COLUMN = f"original averaged over {DEMO_GROUP} (test-time)"
"""The column of the original averaged over the group at test time
(:class:`~orbify.tuning.teacher.GroupAveraged` with the tuning teacher's view combination)."""
CALIBRATION_TILES = 256
"""Upright training tiles, without their labels, that the calibrated conversion refits on."""

TRAIN_TILES = 2000
"""Upright tiles the converted model is tuned on (a tenth of them held out by :func:`orbify.tuning.loop.tune`)."""
EVALUATION_TILES = 600
"""Fresh tiles of each split every model is measured on."""

ANGLE_STEP_DEGREES = 15
"""Spacing of the rotation angles in the accuracy-by-angle plot."""
ANGLE_TILES = 200
"""Upright tiles rotated to every angle of the accuracy-by-angle plot."""
CHECK_TILES = 16
"""Upright tiles each check measures per-layer errors on (in float64)."""
MEASURE_BATCH = 16
"""Tiles per forward pass when measuring accuracies and invariance errors. Small batches run fastest
on CPU; measuring the invariance of the test-time average turns 16 tiles into 16 × |G|² images."""
TIMING_BATCH = 256
SEEDS = {"train": 100, "upright": 101, "any": 102}
"""Tile seeds of the demo's own tiles; the shipped weights were trained on tile seeds 0 and 1."""

FILES = {
    "converted": "converted.orb",
    "tuned": "tuned.orb",
    "exported": "tuned.pt2",
    "check_converted_md": "check-converted.md",
    "check_converted_json": "check-converted.json",
    "check_tuned_md": "check-tuned.md",
    "check_tuned_json": "check-tuned.json",
    "check_tuned_html": "check-tuned.html",
    "results_json": "results.json",
    "results_md": "results.md",
}
PLOTS = {
    "accuracy_by_angle": "plots/accuracy_by_angle.png",
    "tuning": "plots/tuning.png",
    "layer_errors": "plots/layer_errors.png",
    "first_layer_filters": "plots/first_layer_filters.png",
}


@dataclass(frozen=True)
class ModelFigures:
    """One column of the before/after table: a model measured on the demo's fresh tiles.

    ``upright_accuracy``: upright tiles; ``any_accuracy``: field tiles (any angle, mirrored half
    the time); ``moved_accuracy`` / ``worst_moved_accuracy``: upright tiles moved by every group
    element, mean and worst element; ``invariance_error``: max over the group of
    ‖f(g·x) − f(x)‖ / ‖f(x)‖ on the upright tiles' logits, in float32; ``params``: numbers stored;
    ``macs``: multiply-accumulates per tile; ``ms_per_image``: CPU inference time per tile in a
    batch of :data:`TIMING_BATCH`.
    """

    name: str
    upright_accuracy: float
    any_accuracy: float
    moved_accuracy: float
    worst_moved_accuracy: float
    invariance_error: float
    params: int
    macs: int
    ms_per_image: float


@dataclass(frozen=True)
class DemoResult:
    """What :func:`run_demo` measured and wrote.

    ``columns``: the original, the original averaged over the group at test time
    (:data:`AVERAGED_COLUMN`), the converted (untuned), the tuned and the exported model, in that
    order. ``accuracy_by_angle`` maps a column name to its accuracy on the upright tiles rotated by
    each of ``angles`` (degrees). ``files`` maps a role (keys of :data:`FILES` and :data:`PLOTS`)
    to the path written. ``seconds``: wall time of the whole run.
    """

    out_dir: Path
    group: str
    budget: str
    init: str
    columns: tuple[ModelFigures, ...]
    angles: tuple[int, ...]
    accuracy_by_angle: dict[str, tuple[float, ...]]
    tuning: TuneResult
    files: dict[str, Path]
    seconds: float
    notes: tuple[str, ...] = field(default=())

    def column(self, name: str) -> ModelFigures:
        """The column of that name ("original", :data:`AVERAGED_COLUMN`, "converted", "tuned", "exported")."""
        for figures in self.columns:
            if figures.name == name:
                return figures
        raise KeyError(name)

    def table_rows(self) -> tuple[tuple[str, ...], list[tuple[str, ...]]]:
        """The before/after table as a header and rows of strings (terminal and markdown show the same)."""
        header = ("", *(figures.name for figures in self.columns))
        rows = [
            ("accuracy, upright tiles", *(percent(f.upright_accuracy) for f in self.columns)),
            ("accuracy, field tiles (any angle)", *(percent(f.any_accuracy) for f in self.columns)),
            (f"accuracy, upright moved by {self.group} (mean)", *(percent(f.moved_accuracy) for f in self.columns)),
            (f"accuracy, upright moved by {self.group} (worst)",
             *(percent(f.worst_moved_accuracy) for f in self.columns)),
            (f"invariance error ({self.group}, float32)", *(f"{f.invariance_error:.1e}" for f in self.columns)),
            ("parameters stored", *(f"{f.params:,}" for f in self.columns)),
            ("MACs per tile", *(f"{f.macs / 1e6:.2f} M" for f in self.columns)),
            ("inference, ms per tile", *(f"{f.ms_per_image:.3f}" for f in self.columns)),
        ]
        return header, rows

    def markdown(self) -> str:
        """The table with a heading and the notes, as markdown."""
        header, rows = self.table_rows()
        lines = [f"# orbify demo: the bundled example, {self.group}, budget {self.budget}, init {self.init}", ""]
        lines += markdown_table(header, rows) + [""]
        lines += [f"- {note}" for note in self.notes]
        return "\n".join(lines) + "\n"

    def to_dict(self) -> dict:
        """JSON-ready figures (the tuning history included)."""
        return {
            "group": self.group, "budget": self.budget, "init": self.init, "seconds": self.seconds,
            "columns": [asdict(figures) for figures in self.columns],
            "angles_degrees": list(self.angles),
            "accuracy_by_angle": {name: list(values) for name, values in self.accuracy_by_angle.items()},
            "tuning": asdict(self.tuning),
            "files": {role: str(path) for role, path in self.files.items()},
            "notes": list(self.notes),
        }


def run_demo(out_dir: str | Path, *, force: bool = False, progress: bool = True) -> DemoResult:
    """Run the whole job on the bundled example and leave its files in ``out_dir``.

    Steps: convert the example CNN under :data:`DEMO_GROUP` with the settings of the shipped recipe
    :data:`RECIPE`, check it, tune it by distillation on :data:`TRAIN_TILES` upright tiles (the
    recipe's tuning settings, the tiles' labels added), check it again, export it as a pt2 program,
    then measure the original, the original averaged over the group at test time (with the
    teacher's view combination), and the converted, tuned and exported models on fresh tiles.
    ``out_dir`` is created if needed; the files of :data:`FILES` and :data:`PLOTS` are written in it
    (plots only when matplotlib is installed). With ``progress`` each step is reported on the
    terminal. The run is repeatable with the same software and thread count: every random draw is
    seeded, and the caller's torch random state is left as it was.

    Raises :class:`~orbify.errors.OutputError` before any work when ``out_dir`` is a file or one
    of the files exists and ``force`` is false.
    """
    started = time.perf_counter()
    folder = Path(out_dir)
    prepare_folder(folder, (*FILES.values(), *PLOTS.values()), force)
    log = DemoLog(progress)
    with torch.random.fork_rng():
        torch.manual_seed(0)
        return _Demo(folder, force, log, started).run()


class _Demo:
    """One demo run; :meth:`run` does the steps in order."""

    def __init__(self, folder: Path, force: bool, log: DemoLog, started: float):
        self.folder = folder
        self.force = force
        self.log = log
        self.started = started
        self.group: Group = parse_group(DEMO_GROUP)
        self.files: dict[str, Path] = {}
        self.notes: list[str] = []

    def path(self, role: str) -> Path:
        path = self.folder / {**FILES, **PLOTS}[role]
        self.files[role] = path
        return path

    def run(self) -> DemoResult:
        log, group = self.log, self.group
        with log.step("loading the example model and drawing tiles"):
            source = load_source(EXAMPLE_SOURCE)
            original = source.module
            recipe = load_recipe(RECIPE)
            options = merge_options(recipe, {"group": group.name, "init": DEMO_INIT})
            size = options.pop("input_size")
            self.budget, self.init = options["budget"], options["init"]
            train_images, train_labels = make_tiles(TRAIN_TILES, split="upright", size=size, seed=SEEDS["train"])
            self.upright = make_tiles(EVALUATION_TILES, split="upright", size=size, seed=SEEDS["upright"])
            self.field = make_tiles(EVALUATION_TILES, split="any", size=size, seed=SEEDS["any"])
        calibration = train_images[:CALIBRATION_TILES] if self.init == "calibrated" else None
        how = f"init {self.init}" + (f" on {CALIBRATION_TILES} unlabeled upright tiles" if calibration is not None
                                     else "")
        with log.step(f"converting to {group.name} (recipe {recipe.name!r}, budget {options['budget']}, {how})"):
            converted, plan = convert(original, example_input=train_images[:1], calibration=calibration, **options)
        self.notes.append(f"converted with {how}")
        with log.step("checking the converted model"):
            report = self.check(converted, original, plan, "converted")
            save(converted, plan, self.path("converted"), reference=source.reference, recipe=recipe.name,
                 check=report.to_dict(), force=self.force)
        settings = merge_options(recipe, {}, "tune")
        # in eval mode, so that restoring its mode (count_macs does) leaves the original's batch norms in eval
        averaged = GroupAveraged(original, group, settings["view_combination"]).eval()
        self.notes.append(f"{AVERAGED_COLUMN}: the original run on the {group.order} views of every tile, "
                          f"combined by the tuning teacher's rule ({settings['view_combination']} view)")
        with log.step("measuring the original, its test-time average and the converted model"):
            columns = [self.figures(name, model) for name, model in
                       (("original", original), (AVERAGED_COLUMN, averaged), ("converted", converted))]
            by_angle = {figures.name: self.accuracy_by_angle(model)
                        for figures, model in zip(columns, (original, averaged, converted), strict=True)}
        log.say(f"tuning: {settings['epochs']} epochs of distillation on {TRAIN_TILES} upright tiles, "
                f"teacher: the original's {settings['view_combination']} view")
        tuned = copy.deepcopy(converted)
        with log.step("tuning"):
            tuning = tune(tuned, original, group, train_images, train_labels, progress=log.enabled, device="cpu",
                          **settings)
        with log.step("checking the tuned model"):
            report = self.check(tuned, original, plan, "tuned")
            save(tuned, plan, self.path("tuned"), reference=source.reference, recipe=recipe.name,
                 check=report.to_dict(), force=self.force)
        with log.step("exporting the tuned model (pt2)"):
            export_model(tuned, train_images[:1], self.path("exported"), "pt2", force=self.force)
            exported = torch.export.load(self.files["exported"]).module()
        with log.step("measuring the tuned and the exported model"):
            columns += [self.figures("tuned", tuned), self.figures("exported", exported, bake_model(tuned))]
            by_angle["tuned"] = self.accuracy_by_angle(tuned)
        with log.step("writing the table and plots"):
            self.write_plots(self.result(tuple(columns), by_angle, tuning), report)
            table, figures = self.path("results_md"), self.path("results_json")
            result = self.result(tuple(columns), by_angle, tuning)
            write_text(table, result.markdown(), force=self.force)
            write_json(figures, result.to_dict(), force=self.force)
        return result

    def result(self, columns, by_angle, tuning) -> DemoResult:
        angles = tuple(range(0, 360, ANGLE_STEP_DEGREES))
        return DemoResult(self.folder, self.group.name, self.budget, self.init, columns, angles, by_angle, tuning,
                          dict(self.files), time.perf_counter() - self.started, tuple(self.notes))

    # -- measuring ------------------------------------------------------------------------------------------
    def check(self, converted: nn.Module, original: nn.Module, plan, name: str) -> CheckReport:
        images, labels = self.upright
        report = check_model(converted, original, plan, ImageSet(images[:CHECK_TILES], labels[:CHECK_TILES]))
        write_text(self.path(f"check_{name}_md"), check_markdown(report), force=self.force)
        write_json(self.path(f"check_{name}_json"), report.to_dict(), force=self.force)
        if f"check_{name}_html" in FILES:      # one report to hand on: the tuned model's, tables and plots in one file
            write_check_html(report, self.path(f"check_{name}_html"), force=self.force)
        return report

    @torch.no_grad()
    def figures(self, name: str, model: nn.Module, structure: nn.Module | None = None) -> ModelFigures:
        """Measure ``model`` as it is (in eval mode, or an exported program's module) on the demo's tiles.

        Parameters and MACs are counted on ``structure`` when given (the baked model an exported
        program was made from: an exported program cannot be switched to eval mode for counting).
        """
        structure = structure if structure is not None else model
        images, labels = self.upright
        with parametrize.cached():
            views = torch.cat([view_logits(model, self.group, chunk) for chunk in images.split(MEASURE_BATCH)], 1)
            moved = (views.argmax(-1) == labels).double().mean(1)
            upright = views[0]
            invariance = max(float((view - upright).norm() / upright.norm()) for view in views[1:])
            return ModelFigures(
                name=name,
                upright_accuracy=float(moved[0]),
                any_accuracy=_accuracy(model, *self.field),
                moved_accuracy=float(moved.mean()),
                worst_moved_accuracy=float(moved.min()),
                invariance_error=invariance,
                params=count_params(structure),
                macs=count_macs(structure, images[:1]),
                ms_per_image=milliseconds_per_image(model, images[:TIMING_BATCH]),
            )

    @torch.no_grad()
    def accuracy_by_angle(self, model: nn.Module) -> tuple[float, ...]:
        """Accuracy on :data:`ANGLE_TILES` upright tiles rotated by every multiple of :data:`ANGLE_STEP_DEGREES`."""
        images, labels = (tensor[:ANGLE_TILES] for tensor in self.upright)
        with parametrize.cached():
            return tuple(_accuracy(model, rotate_images(images, math.radians(angle)), labels)
                         for angle in range(0, 360, ANGLE_STEP_DEGREES))

    # -- plots -----------------------------------------------------------------------------------------------
    def write_plots(self, result: DemoResult, report: CheckReport) -> None:
        plt = pyplot()
        if plt is None:
            self.notes.append(PLOTS_SKIPPED)
            return
        plot_folder = self.folder / "plots"
        plot_folder.mkdir(exist_ok=True)
        for written in plot_check(report, plot_folder, force=self.force):
            self.files[written.stem] = written
        figure = accuracy_by_angle_figure(plt, result.angles, result.accuracy_by_angle, result.group)
        write_figure(plt, figure, self.path("accuracy_by_angle"), self.force)
        write_figure(plt, _tuning_figure(plt, result.tuning), self.path("tuning"), self.force)


def accuracy_by_angle_figure(plt, angles, accuracy_by_angle: dict[str, tuple[float, ...]], group: str):
    """The figure of ``plots/accuracy_by_angle.png``: one line per model, labelled with its column name.

    ``accuracy_by_angle`` maps a column name to its accuracies (0–1) at each of ``angles`` (degrees),
    as in :attr:`DemoResult.accuracy_by_angle`; the test-time average is drawn dashed.
    """
    figure, axes = plt.subplots(figsize=(7, 4))
    for name, values in accuracy_by_angle.items():
        axes.plot(angles, [100 * v for v in values], "s--" if name == AVERAGED_COLUMN else "o-", label=name)
    axes.set_xticks(list(range(0, 361, 45)))
    axes.set_xlabel("rotation of the upright tiles (degrees, counter-clockwise)")
    axes.set_ylabel("accuracy (%)")
    axes.set_ylim(0, 102)
    axes.set_title(f"accuracy by angle: the original, its test-time average and the {group} model")
    axes.legend()
    return figure


def _tuning_figure(plt, tuning: TuneResult):
    figure, axes = plt.subplots(figsize=(7, 4))
    epochs = [0] + [record.epoch for record in tuning.history]
    held_out = [tuning.before] + [record.held_out for record in tuning.history]
    lines = axes.plot(epochs, [100 * e.upright for e in held_out], "o-", label=f"held-out {held_out[0].measure} (%)")
    axes.set_xlabel("epoch")
    axes.set_ylabel("accuracy (%)")
    axes.set_ylim(0, 102)
    loss_axes = axes.twinx()
    lines += loss_axes.plot(epochs, [e.loss for e in held_out], "s--", color="tab:red", label="held-out KL (nats)")
    loss_axes.set_ylabel("KL(teacher ‖ student), nats")
    loss_axes.set_ylim(bottom=0)
    axes.set_title("tuning by distillation")
    axes.legend(lines, [line.get_label() for line in lines], loc="center right")
    return figure


def _accuracy(model: nn.Module, images: torch.Tensor, labels: torch.Tensor) -> float:
    """Share of ``images`` whose top logit is the label (the model is used as it is, in eval mode)."""
    predicted = torch.cat([model(chunk).argmax(-1) for chunk in images.split(MEASURE_BATCH)])
    return float((predicted == labels).double().mean())
