"""The whole job on the bundled segmentation example: convert with a map head, tune, export, measure.

:func:`run_segment_demo` takes the example segmenter (trained on upright micrograph scenes, see
:mod:`orbify.example.scenes`), converts it under :data:`DEMO_GROUP` with a dense head (``--head map``:
its maps turn with the scene), tunes it on upright scenes and their masks by distillation from the
original averaged over the group, per pixel, and exports it as a pt2 program. It measures every model,
and the alternative a user weighs (the original averaged over the group at test time: exact too, at
|G| forward passes per scene), on fresh scenes, upright, in the field (each particle at any angle,
mirrored half the time) and moved by every group element, and leaves the models, the table and a
picture of one scene's masks at a few angles in one folder. ``orbify demo --task segment`` calls it.
"""

from __future__ import annotations

import copy
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import torch
from torch import nn
from torch.nn.utils import parametrize

from orbify.conversion.converter import convert
from orbify.example.demo_support import PLOTS_SKIPPED, DemoLog, milliseconds_per_image, percent, prepare_folder
from orbify.example.scenes import SEGMENT_CLASSES, make_scenes
from orbify.example.segment_pictures import PICTURE_ANGLES, write_mask_picture
from orbify.example.train_segment import segmentation_scores
from orbify.files.export import export_model
from orbify.files.saving import save
from orbify.files.sources import EXAMPLE_SEGMENT_SOURCE, load_source
from orbify.layers.bake import bake_model
from orbify.symmetry.groups import Group, parse_group
from orbify.tuning.loop import tune
from orbify.tuning.records import TuneResult
from orbify.tuning.teacher import GroupAveraged
from orbify.verification.measure import count_macs, count_params
from orbify.verification.report import markdown_table, write_json, write_text
from orbify.verification.segmentation import GroupConfusion, GroupScores, dense_output

DEMO_GROUP = "d4"
"""Quarter turns and mirrors: in the field a particle lies at any angle and mirrored half the time."""
DEMO_INIT = "calibrated"
"""How the converted model starts. Orbit-averaging the weights of a model that only saw upright particles
leaves filters nearly symmetric: deep in the network the eight slots of an orbit carried almost the same
values (their spread within an orbit 0.4–8 % of the channels' variance after the decoder and head blocks,
66–98 % in a converted model of random weights), and tuning from there stalled (measured: mean IoU 0.18
after six epochs on 1000 scenes in batches of 16). Refitted on :data:`CALIBRATION_SCENES` unlabeled upright
scenes to follow the original averaged over the group, the slots differ (25–42 %) and the same tuning
reached 0.90."""
CALIBRATION_SCENES = 256
"""Upright training scenes, without their masks, that the calibrated conversion refits on."""
TUNE_SETTINGS = {"epochs": 6, "lr": 5e-3, "batch_size": 8, "schedule": "one-cycle",
                 "view_combination": "most-confident"}
"""How the converted model is tuned (the rest: :func:`orbify.tuning.loop.tune`'s defaults). The teacher takes,
pixel by pixel, the most confident of the original's views moved back: the original only saw upright particles,
so its wrong views are confidently wrong and swamp an average. Small batches: more steps for the same work."""
AVERAGED_COLUMN = f"original averaged over {DEMO_GROUP} (test-time)"
"""The column of the original averaged over the group at test time, with the tuning teacher's view combination."""
SEEDS = {"train": 100, "upright": 101, "any": 102}
"""Scene seeds of the demo's own scenes; the shipped weights were trained on scene seeds 0 and 1."""
MEASURE_BATCH = 2
"""Scenes per forward pass when measuring; the test-time average runs |G| = 8 views of each. Small batches keep
every activation small: from about 64 scenes of 49² pixels on, the allocations of one forward pass went to the
kernel, which then spent more time than the arithmetic (measured on the original: 1.2 ms per scene in batches
of 16, 3.1 ms in batches of 64)."""
TIMING_BATCH = 16

FILES = {
    "converted": "segment-converted.orb",
    "tuned": "segment-tuned.orb",
    "exported": "segment-tuned.pt2",
    "results_json": "segment-results.json",
    "results_md": "segment-results.md",
}
PLOTS = {"masks": "plots/segment-masks.png"}


@dataclass(frozen=True)
class DemoScale:
    """How much data the demo uses: scenes to tune on (a tenth held out), fresh scenes of each split to measure on,
    and tuning epochs."""

    train_scenes: int = 600
    evaluation_scenes: int = 128
    epochs: int = TUNE_SETTINGS["epochs"]


@dataclass(frozen=True)
class SegmentFigures:
    """One column of the table: a model measured on the demo's fresh scenes.

    ``upright_iou`` / ``any_iou``: mean IoU over the 7 classes (background included) on upright and field
    scenes; ``moved_iou`` / ``worst_moved_iou``: on the upright scenes and masks moved by every other group
    element, mean and worst element; ``upright_accuracy`` / ``any_accuracy``: per-pixel accuracy;
    ``equivariance_error``: max over the group of ‖g⁻¹·f(g·x) − f(x)‖ / ‖f(x)‖ on the upright scenes' maps, in
    float32; ``params``: numbers stored; ``macs``: multiply-accumulates per scene; ``ms_per_image``: CPU
    inference time per scene in a batch of :data:`TIMING_BATCH`.
    """

    name: str
    upright_iou: float
    any_iou: float
    moved_iou: float
    worst_moved_iou: float
    upright_accuracy: float
    any_accuracy: float
    equivariance_error: float
    params: int
    macs: int
    ms_per_image: float


@dataclass(frozen=True)
class SegmentDemoResult:
    """What :func:`run_segment_demo` measured and wrote.

    ``columns``: the original, :data:`AVERAGED_COLUMN`, the converted (untuned), the tuned and the exported
    model, in that order. ``files`` maps a role (keys of :data:`FILES` and :data:`PLOTS`) to the path written.
    ``seconds``: wall time of the whole run.
    """

    out_dir: Path
    group: str
    scale: DemoScale
    columns: tuple[SegmentFigures, ...]
    tuning: TuneResult
    files: dict[str, Path]
    seconds: float
    notes: tuple[str, ...] = field(default=())

    @property
    def title(self) -> str:
        return f"the bundled segmentation example, {self.group}, head map"

    def column(self, name: str) -> SegmentFigures:
        """The column of that name ("original", :data:`AVERAGED_COLUMN`, "converted", "tuned", "exported")."""
        for figures in self.columns:
            if figures.name == name:
                return figures
        raise KeyError(name)

    def table_rows(self) -> tuple[tuple[str, ...], list[tuple[str, ...]]]:
        """The table as a header and rows of strings (terminal and markdown show the same)."""
        columns, group = self.columns, self.group
        header = ("", *(figures.name for figures in columns))
        rows = [
            ("mean IoU, upright scenes", *(percent(f.upright_iou) for f in columns)),
            ("mean IoU, field scenes (any angle)", *(percent(f.any_iou) for f in columns)),
            (f"mean IoU, upright moved by {group} (mean)", *(percent(f.moved_iou) for f in columns)),
            (f"mean IoU, upright moved by {group} (worst)", *(percent(f.worst_moved_iou) for f in columns)),
            ("pixel accuracy, upright scenes", *(percent(f.upright_accuracy) for f in columns)),
            ("pixel accuracy, field scenes", *(percent(f.any_accuracy) for f in columns)),
            (f"equivariance error ({group}, float32)", *(f"{f.equivariance_error:.1e}" for f in columns)),
            ("parameters stored", *(f"{f.params:,}" for f in columns)),
            ("MACs per scene", *(f"{f.macs / 1e6:.1f} M" for f in columns)),
            ("inference, ms per scene", *(f"{f.ms_per_image:.3f}" for f in columns)),
        ]
        return header, rows

    def markdown(self) -> str:
        """The table with a heading and the notes, as markdown."""
        header, rows = self.table_rows()
        lines = [f"# orbify demo --task segment: {self.title}", ""]
        lines += markdown_table(header, rows) + [""]
        lines += [f"- {note}" for note in self.notes]
        return "\n".join(lines) + "\n"

    def to_dict(self) -> dict:
        """JSON-ready figures (the tuning history included)."""
        return {
            "group": self.group, "head": "map", "scale": asdict(self.scale), "seconds": self.seconds,
            "columns": [asdict(figures) for figures in self.columns],
            "tuning": asdict(self.tuning),
            "files": {role: str(path) for role, path in self.files.items()},
            "notes": list(self.notes),
        }


def run_segment_demo(out_dir: str | Path, *, force: bool = False, progress: bool = True,
                     scale: DemoScale = DemoScale()) -> SegmentDemoResult:
    """Run the whole job on the bundled segmentation example and leave its files in ``out_dir``.

    Steps: convert the example segmenter under :data:`DEMO_GROUP` with a map head, tune it with
    :data:`TUNE_SETTINGS` on ``scale.train_scenes`` upright scenes and their masks, export it as a pt2 program,
    then measure the original, the original averaged over the group at test time (the teacher's view
    combination), and the converted, tuned and exported models on ``scale.evaluation_scenes`` fresh scenes of
    each split. ``out_dir`` is created if needed; the files of :data:`FILES` and :data:`PLOTS` are written in it
    (the picture only when matplotlib is installed). With ``progress`` each step is reported on the terminal.
    Every random draw is seeded, and the caller's torch random state is left as it was.

    Raises :class:`~orbify.errors.OutputError` before any work when ``out_dir`` is a file or one of the files
    exists and ``force`` is false.
    """
    started = time.perf_counter()
    folder = Path(out_dir)
    prepare_folder(folder, (*FILES.values(), *PLOTS.values()), force)
    with torch.random.fork_rng():
        torch.manual_seed(0)
        return _SegmentDemo(folder, force, DemoLog(progress), scale, started).run()


@torch.no_grad()
def scores_under_group(model: nn.Module, group: Group, images: torch.Tensor,
                       masks: torch.Tensor) -> tuple[GroupScores, float]:
    """``model`` (used as it is) scored on ``images`` and ``masks`` as given and moved by every element of ``group``,
    with its equivariance error: max over the group of ‖g⁻¹·f(g·x) − f(x)‖ / ‖f(x)‖ over all the images, in the
    model's precision. Runs :data:`MEASURE_BATCH` images at a time."""
    counts = GroupConfusion(group, len(SEGMENT_CLASSES))
    difference = torch.zeros(group.order, dtype=torch.float64)
    size = torch.zeros((), dtype=torch.float64)
    for chunk, truth in zip(images.split(MEASURE_BATCH), masks.split(MEASURE_BATCH)):
        upright = dense_output(model(chunk))
        size += upright.double().square().sum()
        for g in range(group.order):
            moved_back = group.act_grid(group.inverse(g), dense_output(model(group.act_grid(g, chunk))))
            # g⁻¹·f(g·x) against the mask counts the same pixel pairs as f(g·x) against g·mask
            counts.add(g, moved_back, truth)
            difference[g] += (moved_back - upright).double().square().sum()
    return counts.scores(), float((difference.max() / size).sqrt())


class _SegmentDemo:
    """One demo run; :meth:`run` does the steps in order."""

    def __init__(self, folder: Path, force: bool, log: DemoLog, scale: DemoScale, started: float):
        self.folder, self.force, self.log, self.scale, self.started = folder, force, log, scale, started
        self.group: Group = parse_group(DEMO_GROUP)
        self.files: dict[str, Path] = {}
        self.notes: list[str] = []

    def path(self, role: str) -> Path:
        path = self.folder / {**FILES, **PLOTS}[role]
        self.files[role] = path
        return path

    def run(self) -> SegmentDemoResult:
        log, group, scale = self.log, self.group, self.scale
        with log.step("loading the example segmenter and drawing scenes"):
            source = load_source(EXAMPLE_SEGMENT_SOURCE)
            original = source.module
            train_images, train_masks = make_scenes(scale.train_scenes, split="upright", seed=SEEDS["train"])
            self.upright = make_scenes(scale.evaluation_scenes, split="upright", seed=SEEDS["upright"])
            self.field = make_scenes(scale.evaluation_scenes, split="any", seed=SEEDS["any"])
        calibration = train_images[:CALIBRATION_SCENES]
        how = f"init {DEMO_INIT} on {len(calibration)} unlabeled upright scenes"
        with log.step(f"converting to {group.name} with a map head, {how}"):
            converted, plan = convert(original, group, "channels", "map", train_images[:1], init=DEMO_INIT,
                                      calibration=calibration)
            save(converted, plan, self.path("converted"), reference=source.reference, force=self.force)
        self.notes.append(f"converted with {how}")
        views = TUNE_SETTINGS["view_combination"]
        averaged = GroupAveraged(original, group, views).eval()
        self.notes.append(f"{AVERAGED_COLUMN}: the original run on the {group.order} views of every scene, each "
                          f"map moved back and combined per pixel by the tuning teacher's rule ({views} view); "
                          "exact in exact arithmetic, its equivariance error comes from near-ties between views "
                          "that float32 rounding settles differently")
        with log.step("measuring the original, its test-time average and the converted model"):
            columns = [self.figures(name, model) for name, model in
                       (("original", original), (AVERAGED_COLUMN, averaged), ("converted", converted))]
        settings = {**TUNE_SETTINGS, "epochs": scale.epochs}
        tuned = copy.deepcopy(converted)
        with log.step(f"tuning: {scale.epochs} epochs on {scale.train_scenes} upright scenes and their masks"):
            tuning = tune(tuned, original, group, train_images, masks=train_masks, progress=log.enabled,
                          device="cpu", **settings)
        with log.step("exporting the tuned model (pt2)"):
            save(tuned, plan, self.path("tuned"), reference=source.reference, force=self.force)
            export_model(tuned, train_images[:1], self.path("exported"), "pt2", force=self.force)
            exported = torch.export.load(self.files["exported"]).module()
        with log.step("measuring the tuned and the exported model"):
            columns += [self.figures("tuned", tuned), self.figures("exported", exported, bake_model(tuned))]
        models = dict(zip((figures.name for figures in columns), (original, averaged, converted, tuned, exported)))
        with log.step("writing the table and the picture"):
            self.picture(models)
            table, figures = self.path("results_md"), self.path("results_json")
            result = self.result(tuple(columns), tuning)
            write_text(table, result.markdown(), force=self.force)
            write_json(figures, result.to_dict(), force=self.force)
        return result

    def result(self, columns: tuple[SegmentFigures, ...], tuning: TuneResult) -> SegmentDemoResult:
        return SegmentDemoResult(self.folder, self.group.name, self.scale, columns, tuning, dict(self.files),
                                 time.perf_counter() - self.started, tuple(self.notes))

    @torch.no_grad()
    def figures(self, name: str, model: nn.Module, structure: nn.Module | None = None) -> SegmentFigures:
        """Measure ``model`` as it is (in eval mode, or an exported program's module) on the demo's scenes.

        Parameters and MACs are counted on ``structure`` when given (the baked model an exported program was
        made from: an exported program cannot be switched to eval mode for counting).
        """
        structure = structure if structure is not None else model
        images, _ = self.upright
        with parametrize.cached():
            scores, error = scores_under_group(model, self.group, *self.upright)
            field = segmentation_scores(model, *self.field, batch_size=MEASURE_BATCH)
            return SegmentFigures(
                name=name,
                upright_iou=scores.upright.mean_iou,
                any_iou=field.mean_iou,
                moved_iou=scores.moved_mean_iou,
                worst_moved_iou=scores.worst_iou,
                upright_accuracy=scores.upright.accuracy,
                any_accuracy=field.accuracy,
                equivariance_error=error,
                params=count_params(structure),
                macs=count_macs(structure, images[:1]),
                ms_per_image=milliseconds_per_image(model, images[:TIMING_BATCH]),
            )

    def picture(self, models: dict[str, nn.Module]) -> None:
        """The first upright scene, its mask and every model's mask at :data:`PICTURE_ANGLES` (needs matplotlib)."""
        images, masks = self.upright
        # no parametrize.cached() here: it keys a tied weight by the module it was registered on, which the tuned
        # model, a deep copy of the converted one, shares with it; one cached() context would mix their weights
        written = write_mask_picture(images[0], masks[0], models, self.path("masks"), force=self.force)
        if not written:
            del self.files["masks"]
            self.notes.append(PLOTS_SKIPPED)
        else:
            self.notes.append(f"{PLOTS['masks']}: one upright scene turned by "
                              f"{', '.join(f'{a}°' for a in PICTURE_ANGLES)}, its true mask and each model's mask")
