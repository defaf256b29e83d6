"""The one progress display of the command line: it receives the library's stage reports
(``seqgate.util.progress.Progress``) and shows them on stderr.

- stderr is a terminal: a live rich bar per stage (description, bar, done/total, elapsed). It
  never refreshes on its own (a render thread waking up during profile's timed calls would
  disturb them): it is redrawn when the library reports progress;
- otherwise (CI logs, pipes, files): one plain line per stage, ``seqgate: verifying 6 window
  sets``, and nothing per step, so logs stay short and readable;
- ``--quiet``: nothing (:func:`stage_display` returns ``SILENT``).

Stage and detail text are shown as plain text, never read as rich markup.
"""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Iterator
from typing import Any, TextIO

from seqgate.util.progress import SILENT, Progress


class LiveBar:
    """A rich progress bar on stderr; one task per stage."""

    def __init__(self, console: Any) -> None:
        from rich.progress import BarColumn, MofNCompleteColumn, TextColumn, TimeElapsedColumn
        from rich.progress import Progress as RichProgress

        self._bar = RichProgress(TextColumn("{task.description}", markup=False), BarColumn(),
                                 MofNCompleteColumn(), TimeElapsedColumn(), console=console,
                                 transient=True, auto_refresh=False)
        self._task: Any = None
        self._stage = ""

    def start(self, stage: str, total: int | None = None) -> None:
        if self._task is None:
            self._bar.start()
        else:
            self._bar.remove_task(self._task)
        self._stage = stage
        self._task = self._bar.add_task(stage, total=total)
        self._bar.refresh()

    def advance(self, n: int = 1, detail: str = "") -> None:
        if self._task is None:
            return
        text = f"{self._stage}: {detail}" if detail else self._stage
        self._bar.update(self._task, advance=n, description=text, refresh=True)

    def finish(self) -> None:
        if self._task is not None:
            self._bar.remove_task(self._task)
            self._bar.stop()
            self._task = None


class StageLines:
    """One line per stage on a stream that is not a terminal."""

    def __init__(self, stream: TextIO) -> None:
        self._stream = stream

    def start(self, stage: str, total: int | None = None) -> None:
        self._stream.write(f"seqgate: {stage}\n")
        self._stream.flush()

    def advance(self, n: int = 1, detail: str = "") -> None:
        return None

    def finish(self) -> None:
        return None


@contextlib.contextmanager
def stage_display(quiet: bool = False) -> Iterator[Progress]:
    """The display for this process's stderr (module docstring); a live bar is closed on exit,
    also when the command fails."""
    if quiet:
        yield SILENT
        return
    from rich.console import Console

    console = Console(stderr=True)
    display: LiveBar | StageLines = LiveBar(console) if console.is_terminal else StageLines(sys.stderr)
    try:
        yield display
    finally:
        display.finish()
