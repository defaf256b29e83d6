"""How the library reports progress without knowing who displays it.

Long steps (export, verify, profile, the gate running all three) take a ``progress`` argument
that follows :class:`Progress`: ``start`` opens a stage ("verifying 6 window sets",
``total`` units of work or ``None`` when unknown), ``advance`` reports ``n`` more units done
and optionally what runs next (``detail``), ``finish`` closes the stage. The command line
passes a display (``seqgate.cli.progress``); library callers pass nothing and get
:data:`SILENT`. The library never prints progress itself.
"""

from __future__ import annotations

from typing import Protocol


class Progress(Protocol):
    """A receiver of stage and progress reports (see the module docstring)."""

    def start(self, stage: str, total: int | None = None) -> None: ...

    def advance(self, n: int = 1, detail: str = "") -> None: ...

    def finish(self) -> None: ...


class Silent:
    """A :class:`Progress` that shows nothing."""

    def start(self, stage: str, total: int | None = None) -> None:
        return None

    def advance(self, n: int = 1, detail: str = "") -> None:
        return None

    def finish(self) -> None:
        return None


SILENT = Silent()
