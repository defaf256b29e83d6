"""The one error policy of the command line: how a failure becomes a message and an exit code.

- :func:`exits_on_error` wraps every command: a ``SeqgateError`` prints ``error: <message>``
  on stderr and exits with the error's code (1 check failed, 2 bad input, 3 unsupported,
  4 internal); an ``OSError`` that reached the command (the system refused a path) is exit 2
  naming the path and the system's reason, never "a bug in seqgate".
- :func:`report_internal_error` is the last resort of ``main``: any other exception is a bug in
  seqgate, reported in one paragraph (exit 4) with the traceback kept for ``SEQGATE_DEBUG=1``.

Messages are user text (paths, layer names, shapes like ``[batch, time]``): they are printed
with rich markup off, so nothing in them is swallowed or read as a style.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import Any, TypeVar

import typer

from seqgate.errors import EXIT_BAD_INPUT, EXIT_INTERNAL, InterruptedRun, OutputPathError, SeqgateError
from seqgate.util.text import first_line

F = TypeVar("F", bound=Callable[..., Any])

# Set once a run was interrupted and cleaned up; ``main`` then ends the process at once (see there).
interrupted = False


def print_error(message: str) -> None:
    """``error: <message>`` on stderr, the message as plain text."""
    from rich.console import Console
    from rich.text import Text

    console = Console(stderr=True, highlight=False, soft_wrap=True)
    console.print(Text.assemble(("error:", "bold red"), " ", message))


def exit_for(e: BaseException) -> typer.Exit:
    """Print the message for a ``SeqgateError`` or ``OSError`` and return the matching exit."""
    if isinstance(e, InterruptedRun):  # one plain line: "interrupted; nothing written to …"
        global interrupted
        interrupted = True
        typer.echo(str(e), err=True)
        return typer.Exit(e.exit_code)
    if isinstance(e, SeqgateError):
        print_error(str(e))
        return typer.Exit(e.exit_code)
    assert isinstance(e, OSError)
    print_error(str(OutputPathError(e.filename or "a file", e, doing="use")))
    return typer.Exit(EXIT_BAD_INPUT)


def exits_on_error(command: F) -> F:
    """Decorate a typer command with the module docstring's policy."""

    @functools.wraps(command)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return command(*args, **kwargs)
        except (SeqgateError, OSError) as e:
            raise exit_for(e) from None

    return wrapper  # type: ignore[return-value]


def report_internal_error(e: BaseException) -> int:
    """One paragraph on stderr for an unexpected exception; returns exit code 4."""
    import sys

    sys.stderr.write(
        f"internal error: seqgate failed unexpectedly ({type(e).__name__}: {first_line(e)}). This is a "
        f"bug in seqgate, not in your files as far as it can tell; please report it with the command "
        f"line. Run again with SEQGATE_DEBUG=1 to see the traceback.\n")
    return EXIT_INTERNAL
