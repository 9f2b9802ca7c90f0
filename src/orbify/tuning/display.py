"""Rich progress bars for tuning: epochs, steps, loss and held-out accuracy (rank 0 only)."""

from __future__ import annotations

from typing import TYPE_CHECKING

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn

if TYPE_CHECKING:
    from orbify.tuning.loop import EpochRecord, Evaluation


class Display:
    """Two bars (epochs, steps of the current epoch) and one printed line per epoch; silent when disabled."""

    def __init__(self, enabled: bool, epochs: int, steps: int, console: Console | None = None):
        self.enabled = enabled
        self.epochs = epochs
        self.steps = steps
        self.progress = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                 TimeElapsedColumn(), TimeRemainingColumn(), TextColumn("{task.fields[status]}"),
                                 console=console, disable=not enabled, transient=True)

    def __enter__(self) -> "Display":
        self.progress.__enter__()
        self.epoch_task = self.progress.add_task("epochs", total=self.epochs, status="")
        self.step_task = self.progress.add_task("steps", total=self.steps, status="")
        return self

    def __exit__(self, *exc) -> None:
        self.progress.__exit__(*exc)

    def teacher(self, accuracy: dict[str, float], chosen: str, before: "Evaluation", done: int) -> None:
        """Say how good each teacher is (with labels), where the student starts, and where a resumed run goes on."""
        if accuracy:
            scores = ", ".join(f"{'[bold]' + how + '[/]' if how == chosen else how} {value:.3f}"
                               for how, value in accuracy.items())
            self._print(f"teacher accuracy on held-out images by view combination: {scores}")
        self._print(f"before tuning: {_evaluation(before)}")
        if done:
            self._print(f"resuming after epoch {done}")
            self.progress.update(self.epoch_task, completed=done)

    def step(self, loss: float) -> None:
        self.progress.update(self.step_task, advance=1, status=f"loss {loss:.4f}")

    def epoch_done(self, record: "EpochRecord") -> None:
        line = f"epoch {record.epoch}/{self.epochs}: train loss {record.train_loss:.4f}, {_evaluation(record.held_out)}"
        self.progress.update(self.epoch_task, advance=1, status=_evaluation(record.held_out, short=True))
        self.progress.reset(self.step_task, total=self.steps, status="")
        self._print(line)

    def _print(self, text: str) -> None:
        if self.enabled:
            self.progress.console.print(text, highlight=False)


def _evaluation(evaluation: "Evaluation", short: bool = False) -> str:
    if short:
        return f"held-out {evaluation.measure} {evaluation.upright:.3f} / {evaluation.transformed:.3f}"
    return (f"held-out loss {evaluation.loss:.4f}, {evaluation.measure} upright {evaluation.upright:.3f}, "
            f"transformed {evaluation.transformed:.3f}")
