"""The tolerance setting: a default atol/rtol pair plus per-tensor overrides.

Rule (DESIGN.md), elementwise, the source framework being the reference::

    |onnx − source| ≤ atol + rtol · |source|

A tensor's pair is the default, then every override whose ``fnmatch`` pattern matches the
tensor name, applied in order (so the last matching entry wins per field). The same override
table is written ``[[tolerance]]`` in a tolerance file and ``[[verify.tolerance]]`` in a gate
config; both are read by :func:`parse_overrides`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from fnmatch import fnmatchcase
from typing import Any

from seqgate.errors import BadInputError
from seqgate.settings.defaults import ATOL, RTOL
from seqgate.settings.values import Problems, SettingProblems, parse_tolerance, table_keys

OVERRIDE_KEYS = ("match", "atol", "rtol")


@dataclass(frozen=True)
class ToleranceOverride:
    """Tensors whose name matches ``match`` (fnmatch) use ``atol``/``rtol`` where given."""

    match: str
    atol: float | None = None
    rtol: float | None = None

    def to_json(self) -> dict[str, Any]:
        return {"match": self.match, "atol": self.atol, "rtol": self.rtol}


@dataclass(frozen=True)
class Tolerances:
    """Default atol/rtol plus per-tensor overrides (see the module docstring)."""

    atol: float = ATOL
    rtol: float = RTOL
    overrides: tuple[ToleranceOverride, ...] = field(default_factory=tuple)

    def for_tensor(self, name: str) -> tuple[float, float]:
        atol, rtol = self.atol, self.rtol
        for o in self.overrides:
            if fnmatchcase(name, o.match):
                atol = o.atol if o.atol is not None else atol
                rtol = o.rtol if o.rtol is not None else rtol
        return atol, rtol

    def unmatched(self, names: list[str]) -> list[str]:
        """Override patterns that match no tensor (reported as warnings: likely a typo)."""
        return [o.match for o in self.overrides if not any(fnmatchcase(n, o.match) for n in names)]


def parse_override(entry: Any, where: str) -> ToleranceOverride:
    """One override table: a non-empty string ``match`` and ``atol`` and/or ``rtol`` (finite, ≥ 0)."""
    problems = Problems()
    for problem in table_keys(entry, OVERRIDE_KEYS, where, "match and atol and/or rtol"):
        problems.add(problem)
    match = entry.get("match")
    if match is None:
        problems.add(f"{where}: match is required (an fnmatch pattern on tensor names such as \"encoder/*\")")
    elif not isinstance(match, str) or not match:
        problems.add(f"{where}: match must be a non-empty string (an fnmatch pattern), got {match!r}")
    if "atol" not in entry and "rtol" not in entry:
        problems.add(f"{where}: give atol and/or rtol")
    atol = problems.take(parse_tolerance, entry["atol"], f"{where}: atol") if "atol" in entry else None
    rtol = problems.take(parse_tolerance, entry["rtol"], f"{where}: rtol") if "rtol" in entry else None
    if problems.items:
        raise SettingProblems(problems.items)
    return ToleranceOverride(str(match), atol, rtol)


def parse_overrides(value: Any, where: str) -> tuple[ToleranceOverride, ...]:
    """A list of override tables, in order; every problem of every entry is reported."""
    if not isinstance(value, list):
        raise BadInputError(f"{where} must be written as a list of tables ({where} repeated), got {value!r}.")
    problems = Problems()
    out = [problems.take(parse_override, e, f"{where} entry {i + 1}") for i, e in enumerate(value)]
    if problems.items:
        raise SettingProblems(problems.items)
    return tuple(o for o in out if o is not None)
