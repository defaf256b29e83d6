"""The tolerance file of ``seqgate verify --tolerances FILE`` (TOML; every key optional)::

    atol = 1e-4              # defaults for every tensor
    rtol = 1e-4

    [[tolerance]]            # any number of overrides, applied in order
    match = "encoder/*"      # fnmatch pattern on tensor names (outputs and probes)
    atol = 2e-4              # atol and/or rtol

Precedence: built-in defaults < the file's top-level values < ``--atol``/``--rtol`` < the
``[[tolerance]]`` entries that match a tensor. Values go through the parsers of
``seqgate.settings`` (the same as the gate config's ``[verify]`` and ``[[verify.tolerance]]``);
every problem of the file and of the options is reported at once (exit 2).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seqgate.settings import Problems, Tolerances, parse_overrides, parse_tolerance, read_toml
from seqgate.settings.defaults import ATOL, RTOL
from seqgate.settings.values import unknown_key

FILE_KEYS = ("atol", "rtol", "tolerance")


def read_tolerances(path: str | Path | None, atol: Any, rtol: Any, problems: Problems,
                    where_atol: str = "--atol", where_rtol: str = "--rtol") -> Tolerances:
    """The tolerances from ``path`` (may be ``None``) with ``atol``/``rtol`` (``None``: not given) on
    top; problems go to ``problems`` (the file's own read errors are raised at once)."""
    base_a: float = ATOL
    base_r: float = RTOL
    overrides: tuple[Any, ...] = ()
    if path is not None:
        data = read_toml(path, "tolerance file", " See `seqgate verify --help` for the layout.")
        where = f"tolerance file {path}:"
        for k in data:
            if k == "tensor":
                problems.add(f"{where} [[tensor]] is now written [[tolerance]] (the gate config's "
                             f"[[verify.tolerance]] uses the same word); rename the tables")
            elif k not in FILE_KEYS:
                problems.add(unknown_key(k, FILE_KEYS, f"in {where} "))
        base_a = _pick(problems, data.get("atol"), f"{where} atol", base_a)
        base_r = _pick(problems, data.get("rtol"), f"{where} rtol", base_r)
        if "tolerance" in data:
            overrides = problems.take(parse_overrides, data["tolerance"], f"{where} [[tolerance]]") or ()
    base_a = _pick(problems, atol, where_atol, base_a)
    base_r = _pick(problems, rtol, where_rtol, base_r)
    return Tolerances(base_a, base_r, overrides)


def _pick(problems: Problems, value: Any, where: str, current: float) -> float:
    """``value`` parsed as a tolerance when given (not ``None``) and valid, else ``current``."""
    if value is None:
        return current
    got = problems.take(parse_tolerance, value, where)
    return current if got is None else got


def load_tolerances(path: str | Path | None, atol: Any = None, rtol: Any = None) -> Tolerances:
    """:func:`read_tolerances`, raising one ``BadInputError`` that lists every problem."""
    problems = Problems()
    tol = read_tolerances(path, atol, rtol, problems)
    problems.raise_if_any(f"tolerance file {path}" if path is not None else "the tolerances")
    return tol
