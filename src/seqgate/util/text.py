"""Text helpers for messages."""

from __future__ import annotations

FOREIGN_LIMIT = 300  # characters of a library's message quoted in ours


def first_line(message: object, limit: int = FOREIGN_LIMIT) -> str:
    """The first non-empty line of another library's message, cut to ``limit`` characters.

    Empty or blank messages give ``"no message"`` so a quote never reads ``(Keras said: )``.
    """
    for line in str(message).splitlines():
        if line.strip():
            line = line.strip()
            return line if len(line) <= limit else line[: limit - 1] + "…"
    return "no message"
