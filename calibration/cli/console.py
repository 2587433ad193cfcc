"""Where the command line writes: results on stdout, progress and errors on stderr.

On a terminal, tables fit the window (long cells fold, never cut) and progress is a
spinner. When a stream is a file or a pipe, lines are never wrapped or cut (full ids
and names) and progress becomes plain lines with the elapsed time.
"""

from __future__ import annotations

import time
from functools import cache

from rich.console import Console
from rich.table import Table

# Width given to a stream that is not a terminal: wide enough that no table is squeezed.
UNBOUNDED_WIDTH = 100_000
# A plain progress line at most this often (seconds) within one stage.
PROGRESS_INTERVAL = 5.0


def _console(*, stderr: bool) -> Console:
    # No markup: ids, names and messages are printed as they are ("[x]" in an item id stays).
    probe = Console(stderr=stderr, markup=False)
    if probe.is_terminal:
        return probe
    return Console(stderr=stderr, width=UNBOUNDED_WIDTH, soft_wrap=True, markup=False)


@cache
def out_console() -> Console:
    """Results (stdout)."""
    return _console(stderr=False)


@cache
def error_console() -> Console:
    """Progress, notes and errors (stderr)."""
    return _console(stderr=True)


def new_table(title: str, columns: list[str], *, right: tuple[str, ...] = ()) -> Table:
    """A table whose cells fold instead of being cut with an ellipsis."""
    table = Table(title=title, title_justify="left")
    for column in columns:
        table.add_column(column, justify="right" if column in right else "left", overflow="fold")
    return table


class ProgressReporter:
    """Progress of a long step: a live spinner on a terminal, else a line at most every few seconds."""

    def __init__(self, title: str) -> None:
        self.console = error_console()
        self.title = title
        self.started = time.monotonic()
        self._last_line = 0.0
        self._last_stage = ""
        self._progress = None
        self._task = None

    def __enter__(self) -> ProgressReporter:
        if self.console.is_terminal:
            from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

            self._progress = Progress(
                SpinnerColumn(),
                TextColumn("{task.description}"),
                TimeElapsedColumn(),
                console=self.console,
                transient=True,
            )
            self._progress.__enter__()
            self._task = self._progress.add_task(self.title, total=None)
        else:
            self._line(self.title)
        return self

    def __exit__(self, *exc: object) -> None:
        if self._progress is not None:
            self._progress.__exit__(*exc)  # type: ignore[arg-type]
        elif exc[0] is None:
            self._line("done")

    def _line(self, text: str) -> None:
        self._last_line = time.monotonic()
        self.console.print(f"[{self._last_line - self.started:8.1f} s] {text}", highlight=False)

    def update(self, stage: str, text: str) -> None:
        """Show ``text``; ``stage`` names the step (a new stage always prints a line)."""
        if self._progress is not None and self._task is not None:
            self._progress.update(self._task, description=text)
            return
        now = time.monotonic()
        if stage != self._last_stage or now - self._last_line >= PROGRESS_INTERVAL:
            self._last_stage = stage
            self._line(text)


def dash(value: float | int | None, spec: str = ".3f") -> str:
    """A number formatted, or a dash where there is none (never fails on None or NaN)."""
    if value is None:
        return "-"
    try:
        if value != value:  # NaN
            return "-"
        return format(value, spec)
    except (TypeError, ValueError):
        return str(value)
