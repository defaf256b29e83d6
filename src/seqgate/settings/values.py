"""One parser per kind of setting value, shared by the command line, the gate config, the
tolerance file and the Python API.

Every parser has the signature ``parse(value, where) -> typed value`` and raises
:class:`seqgate.errors.BadInputError` (exit 2) whose message starts with ``where``: the setting
as the user wrote it (``--atol``, ``[verify] atol``, ``tolerance file t.toml: [[tolerance]]
entry 2: atol``, ``profile_model(min_runs=...)``). A :class:`Problems` collector runs several
parsers and reports every problem in one message.

TOML and the command line give different Python types for the same setting (``"1,8,32"`` on the
command line, ``[1, 8, 32]`` in a config); the parsers accept both. A TOML ``true`` is a bool,
and Python's bool is an int subclass, so numbers refuse bools explicitly.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

from seqgate.errors import BadInputError
from seqgate.settings.defaults import LENGTH_DRAWS, PERCENTILES, TASKS

T = TypeVar("T")


class SettingProblems(BadInputError):
    """Several problems found by one parser (a list of budgets, a tolerance table)."""

    def __init__(self, problems: list[str]) -> None:
        self.problems = list(problems)
        super().__init__(problems_message("", self.problems))


def problems_message(subject: str, problems: list[str]) -> str:
    """One problem: the problem itself. Several: a header and one ``  - `` line each."""
    if len(problems) == 1 and not subject:
        return problems[0]
    n = len(problems)
    head = f"{subject} has {n} problem{'s' if n != 1 else ''}" if subject else f"{n} problems"
    lines = "\n".join(f"  - {p.rstrip('.')}" for p in problems)
    return f"{head}; fix {'them' if n != 1 else 'it'} and run again:\n{lines}"


class Problems:
    """Collects the problems of many settings, so they are reported all at once."""

    def __init__(self) -> None:
        self.items: list[str] = []

    def add(self, message: str) -> None:
        self.items.append(message)

    def take(self, parse: Callable[..., T], value: Any, where: str, *args: Any) -> T | None:
        """``parse(value, where, *args)``, or ``None`` after recording its problem(s)."""
        try:
            return parse(value, where, *args)
        except SettingProblems as e:
            self.items.extend(e.problems)
        except BadInputError as e:
            self.items.append(str(e))
        return None

    def raise_if_any(self, subject: str = "") -> None:
        if self.items:
            raise BadInputError(problems_message(subject, self.items))


def unknown_key(key: str, known: Iterable[str], where: str) -> str:
    """``unknown key in WHERE: 'k' (did you mean 'x'?); known keys: ...``."""
    known = sorted(known)
    close = difflib.get_close_matches(key, known, n=1)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    return f"unknown key {where}{key!r}{hint}; known keys: {', '.join(known)}"


def table_keys(entry: Any, known: Iterable[str], where: str, holds: str) -> list[str]:
    """One ``[[...]]`` entry must be a table (else exit 2 saying what it ``holds``); its unknown keys."""
    if not isinstance(entry, Mapping):
        raise BadInputError(f"{where} must be a table with {holds}, got {entry!r}.")
    known = list(known)
    return [unknown_key(k, known, f"in {where}: ") for k in entry if k not in known]


def read_toml(path: str | Path, what: str, hint: str = "") -> dict[str, Any]:
    """Read a TOML file; every way it can be unreadable is a ``BadInputError`` naming ``what``."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except IsADirectoryError:
        raise BadInputError(f"{what} {p} is a directory, not a file.") from None
    except OSError as e:
        raise BadInputError(f"{what} {p} cannot be read ({e.strerror or e}).") from e
    try:
        return tomllib.loads(data.decode("utf-8"))
    except UnicodeDecodeError as e:
        raise BadInputError(f"{what} {p} is not UTF-8 text (byte {e.start} cannot be decoded); save it as "
                            f"UTF-8 and run again.") from e
    except tomllib.TOMLDecodeError as e:
        raise BadInputError(f"{what} {p} is not valid TOML: {e}. Fix the syntax and run again.{hint}") from e


# ----- scalars ---------------------------------------------------------------------------------
def parse_bool(value: Any, where: str) -> bool:
    if not isinstance(value, bool):
        raise BadInputError(f"{where} must be true or false, got {value!r}.")
    return value


def parse_text(value: Any, where: str) -> str:
    if not isinstance(value, str) or not value:
        raise BadInputError(f"{where} must be a non-empty string, got {value!r}.")
    return value


def parse_int(value: Any, where: str, minimum: int = 0, maximum: int | None = None) -> int:
    """An integer in ``minimum..maximum`` (TOML ``true`` is not one)."""
    if isinstance(value, bool) or not isinstance(value, int):
        raise BadInputError(f"{where} must be an integer ≥ {minimum}, got {value!r}.")
    if value < minimum or (maximum is not None and value > maximum):
        span = f"in {minimum}..{maximum}" if maximum is not None else f"≥ {minimum}"
        raise BadInputError(f"{where} must be {span}, got {value}.")
    return value


def parse_count(value: Any, where: str) -> int:
    """A count of at least one: batch size, runs per point."""
    return parse_int(value, where, 1)


def parse_workers(value: Any, where: str) -> int:
    """Ray workers for verify: 0 (in this process) or a count up to 1024."""
    return parse_int(value, where, 0, 1024)


def parse_stream_factor(value: Any, where: str) -> int:
    """Long-stream length in window lengths: 0 (the check is off) up to 1000."""
    return parse_int(value, where, 0, 1000)


def parse_cluster(value: Any, where: str) -> str:
    """The address of a running Ray cluster, ``HOST:PORT`` (``ray://HOST:PORT`` for a Ray client
    server), or ``""`` for none."""
    if not isinstance(value, str):
        raise BadInputError(f"{where} must be a cluster address HOST:PORT (a string), got {value!r}.")
    text = value.strip()
    if not text:
        return ""
    host, _, port = text.removeprefix("ray://").rpartition(":")
    if not host or not port.isdigit() or not 0 < int(port) < 65536:
        raise BadInputError(f"{where} {value!r}: expected a Ray cluster address HOST:PORT, e.g. "
                            f"127.0.0.1:6379 (the address `ray start --head` prints).")
    return text


def parse_warmup(value: Any, where: str) -> int:
    """Untimed runs per point: 0 or more."""
    return parse_int(value, where, 0)


def parse_seed(value: Any, where: str) -> int:
    """A seed of numpy's generators, which refuse negative seeds."""
    if isinstance(value, int) and not isinstance(value, bool) and value < 0:
        raise BadInputError(f"{where} must be a seed ≥ 0 (numpy refuses negative seeds), got {value}.")
    return parse_int(value, where, 0)


def _number(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise BadInputError(f"{where} must be a number, got {value!r}.")
    return float(value)


def parse_tolerance(value: Any, where: str) -> float:
    """atol or rtol: a finite number ≥ 0 (NaN would make every comparison fail, Inf every pass)."""
    x = _number(value, where)
    if not math.isfinite(x) or x < 0:
        raise BadInputError(f"{where} must be a finite number ≥ 0, got {value!r}.")
    return x


def parse_seconds(value: Any, where: str) -> float:
    """A duration in seconds: finite and ≥ 0."""
    x = _number(value, where)
    if not math.isfinite(x) or x < 0:
        raise BadInputError(f"{where} must be a finite number of seconds ≥ 0, got {value!r}.")
    return x


def parse_percentile(value: Any, where: str) -> int:
    """Only the percentiles every profile report carries can be budgeted."""
    if isinstance(value, bool) or value not in PERCENTILES:
        raise BadInputError(f"{where} {value!r}: expected one of {', '.join(map(str, PERCENTILES))} (the "
                            f"percentiles every report carries).")
    return int(value)


def parse_task(value: Any, where: str) -> str:
    """``auto`` (detect class-score outputs), ``classify`` (every output) or ``regress`` (none)."""
    if value not in TASKS:
        raise BadInputError(f"{where} {value!r}: choose 'auto' (softmax/sigmoid outputs are class scores), "
                            f"'classify' (every output holds class scores) or 'regress' (none does).")
    return str(value)


def parse_lengths(value: Any, where: str) -> str | Path:
    """The lengths of a profile's timed rows: ``"full"``, ``"uniform"`` or a recording file.

    ``"full"``: every row T steps. ``"uniform"``: padded batches beside the full ones, lengths
    uniform in 1..T. A ``.npz``/``.npy`` path (a :class:`Path` passes unchanged): padded
    batches whose lengths are drawn from that recording's lengths or mask. Relative paths are
    left as given; the gate config resolves them against its own folder.
    """
    if isinstance(value, Path):
        return value
    if not isinstance(value, str) or not value.strip():
        raise BadInputError(f"{where} must be 'full', 'uniform' or a recording file (.npz/.npy), "
                            f"got {value!r}.")
    text = value.strip()
    if text in LENGTH_DRAWS:
        return text
    if Path(text).suffix.lower() in (".npz", ".npy"):
        return Path(text)
    close = difflib.get_close_matches(text, LENGTH_DRAWS, n=1)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    raise BadInputError(f"{where} {value!r}{hint}: choose 'full' (every row of a batch T steps long), "
                        f"'uniform' (padded batches too, lengths uniform in 1..T) or a recording file "
                        f"(.npz/.npy) whose lengths or mask the padded batches copy.")


def parse_int_list(value: Any, where: str, minimum: int = 1) -> tuple[int, ...]:
    """``"1,8,32"`` or ``[1, 8, 32]`` → ``(1, 8, 32)``, sorted, duplicates dropped; values ≥ ``minimum``."""
    if isinstance(value, str):
        parts = [p.strip() for p in value.split(",")]
        if any(not p for p in parts):
            raise BadInputError(f"{where} {value!r}: expected comma-separated whole numbers such as 1,8,32 "
                                f"(no empty items).")
        bad = next((p for p in parts if not p.lstrip("-").isdigit()), None)
        if bad is not None:
            raise BadInputError(f"{where} {value!r}: expected comma-separated whole numbers such as 1,8,32; "
                                f"{bad!r} is not one.")
        values = [int(p) for p in parts]
    elif isinstance(value, Sequence) and all(isinstance(v, int) and not isinstance(v, bool) for v in value):
        values = list(value)
    else:
        raise BadInputError(f"{where} must be a list of whole numbers such as [1, 8, 32], got {value!r}.")
    if not values:
        raise BadInputError(f"{where}: give at least one value.")
    low = [v for v in values if v < minimum]
    if low:
        raise BadInputError(f"{where}: every value must be at least {minimum}; got {low[0]}.")
    return tuple(sorted(set(values)))


# ----- budgets ---------------------------------------------------------------------------------
@dataclass(frozen=True, order=True)
class Budget:
    """At ``seq_len`` the chosen percentile of ONNX Runtime's latency must be ``<= ms`` milliseconds."""

    seq_len: int
    ms: float

    @property
    def label(self) -> str:
        return f"T={self.seq_len}≤{self.ms:g}ms"

    def to_json(self) -> dict[str, Any]:
        return {"seq_len": self.seq_len, "ms": self.ms}


def make_budget(seq_len: Any, ms: Any, where: str) -> Budget:
    """The one validation of a budget: a whole length ≥ 1 and a positive, finite latency."""
    problems = []
    if isinstance(seq_len, bool) or not isinstance(seq_len, int):
        problems.append(f"{where}: the sequence length {seq_len!r} is not a whole number; write an "
                        f"integer ≥ 1.")
    elif seq_len < 1:
        problems.append(f"{where}: the sequence length must be at least 1, got {seq_len}.")
    if isinstance(ms, bool) or not isinstance(ms, int | float):
        problems.append(f"{where}: the latency {ms!r} is not a number of milliseconds.")
    elif not math.isfinite(ms) or ms <= 0:
        problems.append(f"{where}: the latency must be a positive, finite number of milliseconds, got {ms!r}.")
    if problems:
        raise SettingProblems(problems)
    return Budget(int(seq_len), float(ms))


def _budget_text(text: str, where: str) -> Budget:
    """``"128=5"`` → ``Budget(128, 5.0)`` (a trailing ``ms`` is allowed)."""
    place = f"{where} {text!r}"
    t_text, sep, ms_text = text.strip().partition("=")
    t_text, ms_text = t_text.strip(), ms_text.strip().removesuffix("ms").strip()
    if not sep or not t_text or not ms_text:
        raise BadInputError(f"{place} is not of the form T=MS (a sequence length, '=', a latency in "
                            f"milliseconds), e.g. 128=5 for 'at length 128 the percentile must be ≤ 5 ms'.")
    try:
        seq_len: Any = int(t_text)
    except ValueError:
        seq_len = t_text
    try:
        ms: Any = float(ms_text)
    except ValueError:
        ms = ms_text
    return make_budget(seq_len, ms, place)


def _budget_table(row: Any, where: str) -> Budget:
    problems = table_keys(row, ("seq_len", "ms"), where, "seq_len and ms")
    problems += [f"{where}: {k} is required" for k in ("seq_len", "ms") if k not in row]
    if problems:
        raise SettingProblems(problems)
    return make_budget(row["seq_len"], row["ms"], where)


def parse_budgets(value: Any, where: str) -> tuple[Budget, ...]:
    """Budgets as ``T=MS`` strings (command line), tables (config) or :class:`Budget` values.

    Every problem is reported; two budgets at one length are refused (which one would hold?).
    """
    if isinstance(value, str | Mapping) or not isinstance(value, Iterable):
        value = [value]
    items = list(value)
    problems = Problems()
    out: list[Budget] = []
    for i, item in enumerate(items):
        if isinstance(item, Budget):
            b = problems.take(lambda v, w: make_budget(v.seq_len, v.ms, w), item, where)
        elif isinstance(item, str):
            b = problems.take(_budget_text, item, where)
        else:
            b = problems.take(_budget_table, item, f"{where} entry {i + 1}")
        if b is None:
            continue
        clash = next((o for o in out if o.seq_len == b.seq_len), None)
        if clash is not None:
            problems.add(f"{where}: two budgets for sequence length {b.seq_len} ({clash.ms:g} ms and "
                         f"{b.ms:g} ms); give one budget per length.")
            continue
        out.append(b)
    if problems.items:
        raise SettingProblems(problems.items)
    return tuple(sorted(out))
