"""Error classes: each carries its exit code and a one-paragraph message.

Exit codes (DESIGN.md): 0 passed; 1 a check failed; 2 bad usage or bad input file (also an
operating-system error on a path: permission, no space, read-only, not a directory);
3 a model seqgate cannot export; 4 a bug in seqgate (:class:`InternalError`). Messages read:
what failed, what was expected, what was received, what to do. The CLI prints ``str(error)``
and exits with ``error.exit_code``; it never shows a traceback for these.
"""

from __future__ import annotations

from dataclasses import dataclass

from seqgate.util.text import first_line

EXIT_PASSED = 0
EXIT_CHECK_FAILED = 1
EXIT_BAD_INPUT = 2
EXIT_UNSUPPORTED = 3
EXIT_INTERNAL = 4  # a bug in seqgate; the CLI reports it in one paragraph
EXIT_INTERRUPTED = 130  # 128 + SIGINT, the shell's convention for a run stopped by Ctrl-C


class SeqgateError(Exception):
    """Base class: a user-facing failure with a one-paragraph message."""

    exit_code: int = EXIT_BAD_INPUT


class BadInputError(SeqgateError):
    """A file or argument is missing, unreadable, corrupt or of the wrong kind (exit 2)."""

    exit_code = EXIT_BAD_INPUT


class UnsafeSourceError(BadInputError):
    """Loading the artifact would execute code from the file (exit 2)."""


class InterruptedRun(SeqgateError):
    """The run was interrupted (SIGINT/SIGTERM) and cleaned up after itself (exit 130)."""

    exit_code = EXIT_INTERRUPTED


class OutputPathError(BadInputError):
    """The operating system refused a file seqgate reads or writes (exit 2).

    The message names the path and the system's reason (``strerror``: "Permission denied",
    "No space left on device", "Read-only file system", "Not a directory", …).
    """

    def __init__(self, path: object, error: OSError, doing: str = "write") -> None:
        self.path = str(path)
        self.reason = error.strerror or type(error).__name__
        super().__init__(
            f"cannot {doing} {self.path}: {self.reason}. Choose a path in a writable directory on a "
            f"regular filesystem with free space, or fix the permissions."
            if doing == "write" else f"cannot {doing} {self.path}: {self.reason}.")


class InternalError(SeqgateError):
    """A bug in seqgate, not in the user's files (exit 4); the message says where it happened."""

    exit_code = EXIT_INTERNAL


class MappingError(InternalError):
    """A layer mapping raised something other than :class:`Refusal` (exit 4).

    Names the layer, its class and the mapping function, so the bug report says where to look.
    """

    def __init__(self, layer: str, cls: str, mapping: object, error: BaseException) -> None:
        fn = f"{getattr(mapping, '__module__', '?')}.{getattr(mapping, '__qualname__', repr(mapping))}"
        self.layer, self.cls, self.mapping = layer, cls, fn
        super().__init__(
            f"internal error while exporting layer {layer!r} (class {cls}) with the mapping {fn}: "
            f"{type(error).__name__}: {first_line(error)}. This is a bug in seqgate, not in your "
            f"model; please report it with the layer's configuration. Run again with SEQGATE_DEBUG=1 "
            f"to see the traceback.")


class CheckFailedError(SeqgateError):
    """A check ran and did not hold (exit 1)."""

    exit_code = EXIT_CHECK_FAILED


@dataclass(frozen=True)
class Unsupported:
    """One reason a model cannot be exported exactly.

    ``where`` names the layer or module (``"lstm_1 (LSTM)"``), ``what`` the option and its
    value, ``hint`` what the user can change.
    """

    where: str
    what: str
    hint: str = ""

    def line(self) -> str:
        tail = f" — {self.hint}" if self.hint else ""
        return f"{self.where}: {self.what}{tail}"


class UnsupportedModelError(SeqgateError):
    """The model holds layers or options seqgate cannot export exactly (exit 3).

    The message lists every problem at once, so a user fixes them in one round.
    """

    exit_code = EXIT_UNSUPPORTED

    def __init__(self, source: str, problems: list[Unsupported]) -> None:
        self.source = source
        self.problems = list(problems)
        n = len(self.problems)
        lines = "\n".join(f"  - {p.line()}" for p in self.problems)
        super().__init__(
            f"cannot export {source}: {n} unsupported layer option{'s' if n != 1 else ''} "
            f"(seqgate refuses what it cannot export exactly rather than approximate it):\n"
            f"{lines}"
        )


class Refusal(Exception):
    """Raised by one layer mapping; the walker collects these into UnsupportedModelError."""

    def __init__(self, what: str, hint: str = "") -> None:
        super().__init__(what)
        self.what = what
        self.hint = hint
