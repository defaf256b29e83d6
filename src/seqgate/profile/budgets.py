"""Parsing of the profile sweep arguments: ``--budget T=MS``, the comma lists, ``--percentile``.

A budget ``T=MS`` reads "at sequence length ``T`` the chosen percentile of ONNX Runtime's
latency must be at most ``MS`` milliseconds". A budget length missing from ``--seq-lens`` is
added to the sweep (measured like any other length), so a budget is never judged from a
prediction. Every error is a :class:`seqgate.errors.BadInputError` (exit 2) naming the option,
what was expected and what was received.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from seqgate.errors import BadInputError
from seqgate.profile.stats import PERCENTILES


@dataclass(frozen=True, order=True)
class Budget:
    """At ``seq_len`` the chosen percentile must be ``<= ms`` milliseconds."""

    seq_len: int
    ms: float

    @property
    def label(self) -> str:
        return f"T={self.seq_len}≤{self.ms:g}ms"


def parse_budget(text: str) -> Budget:
    """``"128=5"`` → ``Budget(128, 5.0)``; clear error for anything else."""
    raw = text.strip()
    t_text, sep, ms_text = raw.partition("=")
    if not sep or not t_text.strip() or not ms_text.strip():
        raise BadInputError(
            f"--budget {text!r} is not of the form T=MS (a sequence length, '=', a latency in "
            f"milliseconds), e.g. --budget 128=5 for 'at length 128 the percentile must be ≤ 5 ms'."
        )
    try:
        t = int(t_text.strip())
    except ValueError:
        raise BadInputError(
            f"--budget {text!r}: the sequence length {t_text.strip()!r} is not a whole number; "
            f"write T=MS with an integer T ≥ 1, e.g. --budget 128=5."
        ) from None
    try:
        ms = float(ms_text.strip().removesuffix("ms"))
    except ValueError:
        raise BadInputError(
            f"--budget {text!r}: the latency {ms_text.strip()!r} is not a number of milliseconds; "
            f"write T=MS, e.g. --budget 128=5 or --budget 128=0.75."
        ) from None
    if t < 1:
        raise BadInputError(f"--budget {text!r}: the sequence length must be at least 1, got {t}.")
    if not math.isfinite(ms) or ms <= 0:
        raise BadInputError(
            f"--budget {text!r}: the latency must be a positive, finite number of milliseconds, "
            f"got {ms_text.strip()!r}."
        )
    return Budget(t, ms)


def parse_budgets(items: Iterable[str | Budget]) -> list[Budget]:
    """Parse every budget; two budgets at the same length are refused (which one would hold?)."""
    out: list[Budget] = []
    for item in items:
        b = item if isinstance(item, Budget) else parse_budget(item)
        clash = next((o for o in out if o.seq_len == b.seq_len), None)
        if clash is not None:
            raise BadInputError(
                f"two budgets for sequence length {b.seq_len} ({clash.ms:g} ms and {b.ms:g} ms); "
                f"give one budget per length."
            )
        out.append(b)
    return sorted(out)


def parse_int_list(text: str | Sequence[int], option: str, minimum: int = 1) -> list[int]:
    """``"1,8,32"`` → ``[1, 8, 32]`` (sorted, duplicates dropped); every value ``>= minimum``."""
    if not isinstance(text, str):
        values = [int(v) for v in text]
    else:
        parts = [p.strip() for p in text.split(",")]
        if not parts or any(not p for p in parts):
            raise BadInputError(
                f"{option} {text!r}: expected comma-separated whole numbers such as 1,8,32 "
                f"(no empty items)."
            )
        try:
            values = [int(p) for p in parts]
        except ValueError:
            raise BadInputError(
                f"{option} {text!r}: expected comma-separated whole numbers such as 1,8,32; "
                f"{next(p for p in parts if not p.lstrip('-').isdigit())!r} is not one."
            ) from None
    if not values:
        raise BadInputError(f"{option}: give at least one value.")
    low = [v for v in values if v < minimum]
    if low:
        raise BadInputError(f"{option}: every value must be at least {minimum}; got {low[0]}.")
    return sorted(set(values))


def check_percentile(q: int) -> int:
    """Only the percentiles the report carries can be budgeted."""
    if q not in PERCENTILES:
        raise BadInputError(
            f"--percentile {q}: expected one of {', '.join(map(str, PERCENTILES))} (the "
            f"percentiles every report carries)."
        )
    return q
