"""Progress of a tuning run: bars for epochs and steps (with images per second, loss and time left), one printed
line per epoch (rank 0 only)."""

from __future__ import annotations

import time

from rich.console import Console

from orbify.common.progress import ProgressBars
from orbify.tuning.records import EpochRecord, Evaluation, TuneResult


class Display:
    """Two bars (epochs, steps of the current epoch) and one printed line per epoch; silent when disabled."""

    def __init__(self, enabled: bool, epochs: int, steps: int, console: Console | None = None):
        self.epochs = epochs
        self.steps = steps
        self.started = time.perf_counter()
        self.images = 0
        self.bars = ProgressBars(enabled, console=console, time_remaining=True, transient=True)

    def __enter__(self) -> "Display":
        self.bars.__enter__()
        self.epoch_bar = self.bars.add("epochs", self.epochs)
        self.step_bar = self.bars.add("steps", self.steps)
        return self

    def __exit__(self, *exc) -> None:
        self.bars.__exit__(*exc)

    def teacher(self, result: TuneResult, done: int, step: int = 0) -> None:
        """Say how good each teacher is (with labels), where the student starts, and where a resumed run goes on."""
        chosen = result.options.view_combination
        for what, figures in (("accuracy", result.teacher_accuracy), ("mean IoU", result.teacher_iou)):
            if figures:
                scores = ", ".join(f"{'[bold]' + how + '[/]' if how == chosen else how} {value:.3f}"
                                   for how, value in figures.items())
                self.bars.print(f"teacher {what} on held-out images by view combination: {scores}")
        self.bars.print(f"before tuning: {_evaluation(result.before)}")
        if done or step:
            self.bars.print(f"resuming after epoch {done}" + (f", step {step}" if step else ""))
            self.bars.set_completed(self.epoch_bar, done)
            self.bars.set_completed(self.step_bar, step)

    def step(self, loss: float, images: int) -> None:
        """One training step done, with its loss and the images every process read in it."""
        self.images += images
        rate = self.images / max(time.perf_counter() - self.started, 1e-9)
        self.bars.advance(self.step_bar, f"{rate:,.0f} images/s, loss {loss:.4f}")

    def note(self, text: str) -> None:
        """Print one line above the bars."""
        self.bars.print(text)

    def epoch_done(self, record: EpochRecord) -> None:
        """An epoch done: advance the epoch bar, restart the step bar, print the epoch's line."""
        line = f"epoch {record.epoch}/{self.epochs}: train loss {record.train_loss:.4f}, {_evaluation(record.held_out)}"
        self.bars.advance(self.epoch_bar, _evaluation(record.held_out, short=True))
        self.bars.restart(self.step_bar, self.steps)
        self.bars.print(line)
        self.started, self.images = time.perf_counter(), 0


def _evaluation(evaluation: Evaluation, short: bool = False) -> str:
    scores = evaluation.segmentation
    if short:
        if scores is not None:
            return f"held-out mean IoU {scores.upright.mean_iou:.3f} / {scores.moved_mean_iou:.3f}"
        return f"held-out {evaluation.measure} {evaluation.upright:.3f} / {evaluation.transformed:.3f}"
    pixel = "per-pixel " if scores is not None else ""
    line = (f"held-out loss {evaluation.loss:.4f}, {pixel}{evaluation.measure} upright {evaluation.upright:.3f}, "
            f"transformed {evaluation.transformed:.3f}")
    if scores is not None:
        line += (f", mean IoU upright {scores.upright.mean_iou:.3f}, transformed {scores.moved_mean_iou:.3f} "
                 f"(worst {scores.worst_iou:.3f})")
    return line
