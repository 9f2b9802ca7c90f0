"""Rich progress bars with a status text after each bar; nothing is shown when they are disabled."""

from __future__ import annotations

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TaskID,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)


class ProgressBars:
    """A set of bars, each: description, bar, done/total, elapsed time, [time remaining,] status text.

    ``console`` is passed to rich as given (None: rich's global console). ``time_remaining`` adds
    the estimated time left; ``transient`` clears the bars when the ``with`` block ends. A disabled
    set draws and prints nothing. Use it as a context manager around the work it shows.
    """

    def __init__(self, enabled: bool, *, console: Console | None = None, time_remaining: bool = False,
                 transient: bool = False):
        self.enabled = enabled
        timing = [TimeElapsedColumn(), TimeRemainingColumn()] if time_remaining else [TimeElapsedColumn()]
        self.progress = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), *timing,
                                 TextColumn("{task.fields[status]}"), console=console, disable=not enabled,
                                 transient=transient)

    def __enter__(self) -> "ProgressBars":
        self.progress.__enter__()
        return self

    def __exit__(self, *exc) -> None:
        self.progress.__exit__(*exc)

    def add(self, description: str, total: int) -> TaskID:
        """A new bar with an empty status; returns its id."""
        return self.progress.add_task(description, total=total, status="")

    def advance(self, bar: TaskID, status: str | None = None) -> None:
        """One step more on ``bar``; a given ``status`` replaces its status text."""
        self.progress.update(bar, advance=1, **({} if status is None else {"status": status}))

    def set_status(self, bar: TaskID, status: str) -> None:
        """Replace the status text of ``bar``."""
        self.progress.update(bar, status=status)

    def set_completed(self, bar: TaskID, completed: int) -> None:
        """Set how many steps of ``bar`` are done."""
        self.progress.update(bar, completed=completed)

    def restart(self, bar: TaskID, total: int) -> None:
        """Start ``bar`` again from nothing (timer too) with ``total`` steps and an empty status."""
        self.progress.reset(bar, total=total, status="")

    def print(self, text: str) -> None:
        """Print a line above the bars (rich markup, no highlighting); nothing when disabled."""
        if self.enabled:
            self.progress.console.print(text, highlight=False)
