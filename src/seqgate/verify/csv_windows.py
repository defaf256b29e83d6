"""``seqgate windows``: sliding windows from a time-series CSV, written as an NPZ recording.

Layout, for CSV rows ``r = 0..R−1`` (after the header), window length ``T``, stride ``S`` and
horizon ``H``; window ``i`` starts at row ``i·S``:

- ``windows[i] = data[i·S : i·S + T, columns]`` → ``[samples, steps, features]``;
- ``H ≥ 1``: ``targets[i] = data[i·S + T − 1 + H, targets]`` → ``[samples, outputs]``, the value
  ``H`` rows after the window's last row (forecasting); ``samples = ⌊(R − T − H)/S⌋ + 1``;
- ``H = 0`` with ``--targets``: ``targets[i] = data[i·S : i·S + T, targets]`` →
  ``[samples, steps, outputs]``, one target per step (sequence labelling);
  ``samples = ⌊(R − T)/S⌋ + 1``.

``--columns`` defaults to every column not named in ``--targets``. Column names must be
unique in the header, and a column is a feature or a target, once: a repeated name is refused
(which copy was meant cannot be known), and the command prints the columns it used. Values are parsed as
float and stored as float32. Empty cells and NaN/Inf spellings are refused, as is any cell that
is not a number; the error names the line of the file and the column. The NPZ is uncompressed
(so ``seqgate verify`` can memory-map it) and holds ``windows``, ``targets`` when asked, and
``seqgate_windows``: a JSON string with the parameters, the CSV's name, sha256 and row count.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from seqgate.errors import BadInputError
from seqgate.util.files import sha256_file, write_atomic
from seqgate.verify.recordings import META_KEY, TARGETS_KEY

WINDOWS_KEY = "windows"
MISSING = {"", "nan", "na", "n/a", "null", "none", "-"}


def read_csv_columns(path: Path, wanted: list[str] | None,
                     targets: list[str]) -> tuple[list[str], np.ndarray[Any, Any]]:
    """Parse the CSV; return (feature column names, float64 data of features + targets)."""
    if not path.is_file():
        raise BadInputError(f"CSV file {path} does not exist (or is not a file).")
    try:
        with open(path, newline="", encoding="utf-8-sig") as f:
            rows = list(csv.reader(f))
    except (UnicodeDecodeError, csv.Error) as e:
        raise BadInputError(f"{path}: not a readable UTF-8 CSV file ({e}).") from e
    if not rows or not any(c.strip() for c in rows[0]):
        raise BadInputError(f"{path}: the CSV is empty; expected a header row of column names and data rows.")
    header = [c.strip() for c in rows[0]]
    _refuse_repeats(path, header, wanted or [], targets)
    columns = wanted if wanted else [c for c in header if c not in targets]
    unknown = [c for c in [*columns, *targets] if c not in header]
    if unknown:
        raise BadInputError(f"{path}: no column(s) {unknown} in the header; the columns are {header}.")
    if not columns:
        raise BadInputError(f"{path}: no feature columns left; pass --columns.")
    index = [header.index(c) for c in [*columns, *targets]]
    data = np.empty((len(rows) - 1, len(index)), np.float64)
    for r, row in enumerate(rows[1:]):
        line = r + 2  # 1-based, the header is line 1
        if len(row) != len(header):
            raise BadInputError(f"{path} line {line}: {len(row)} cells, the header has {len(header)}; "
                                f"fix the row (a stray or missing separator?).")
        for j, k in enumerate(index):
            data[r, j] = _cell(path, line, header[k], row[k])
    return columns, data


def _refuse_repeats(path: Path, header: list[str], wanted: list[str], targets: list[str]) -> None:
    """A name twice in the header, in --columns or --targets, or in both lists, is refused."""
    seen: dict[str, int] = {}
    for i, c in enumerate(header):
        if c in seen:
            raise BadInputError(
                f"{path}: the header names column {c!r} twice (columns {seen[c] + 1} and {i + 1}); seqgate "
                f"cannot tell which one is meant. Rename one of them in the CSV and run again.")
        seen[c] = i
    for flag, names in (("--columns", wanted), ("--targets", targets)):
        twice = sorted({c for c in names if names.count(c) > 1})
        if twice:
            raise BadInputError(f"{flag} names column {twice[0]!r} more than once; name each column once.")
    both = [c for c in wanted if c in targets]
    if both:
        raise BadInputError(f"column {both[0]!r} is in both --columns and --targets; a column is either a "
                            f"feature or a target.")


def _cell(path: Path, line: int, column: str, text: str) -> float:
    t = text.strip()
    if t.lower() in MISSING:
        raise BadInputError(f"{path} line {line}, column {column!r}: missing value ({text!r}). seqgate "
                            f"does not guess missing values; fill or drop the row first.")
    try:
        v = float(t)
    except ValueError:
        raise BadInputError(f"{path} line {line}, column {column!r}: {text!r} is not a number. Keep "
                            f"only numeric columns (choose them with --columns).") from None
    if not math.isfinite(v):
        raise BadInputError(f"{path} line {line}, column {column!r}: {text!r} is not finite; "
                            f"fill or drop the row first.")
    return v


def make_windows(data: np.ndarray[Any, Any], n_features: int, window: int, stride: int,
                 horizon: int, with_targets: bool) -> tuple[np.ndarray[Any, Any], np.ndarray[Any, Any] | None]:
    """Slice ``data`` [rows, features + outputs] into windows (see module docstring)."""
    rows = data.shape[0]
    need = window + (horizon if with_targets else 0)
    if rows < need:
        raise BadInputError(f"the CSV has {rows} data rows; one window needs {need} "
                            f"(--window {window}{f' + --horizon {horizon}' if horizon else ''}).")
    n = (rows - need) // stride + 1
    starts = np.arange(n) * stride
    steps = starts[:, None] + np.arange(window)[None, :]
    x = data[steps][:, :, :n_features].astype(np.float32)
    if not with_targets:
        return x, None
    if horizon == 0:
        y = data[steps][:, :, n_features:]
    else:
        y = data[starts + window - 1 + horizon][:, n_features:]
    return x, y.astype(np.float32)


def build_recording(csv_path: str | Path, out: str | Path, window: int, stride: int = 1, horizon: int = 0,
                    columns: list[str] | None = None, targets: list[str] | None = None,
                    force: bool = False) -> dict[str, Any]:
    """Write the NPZ; returns its metadata dict (also stored under ``seqgate_windows``)."""
    from seqgate.util.files import check_writable

    src, dst = Path(csv_path), Path(out)
    tgt = list(targets or [])
    for flag, v, low in (("--window", window, 1), ("--stride", stride, 1), ("--horizon", horizon, 0)):
        if v < low:
            raise BadInputError(f"{flag} must be ≥ {low}, got {v}.")
    if horizon and not tgt:
        raise BadInputError("--horizon needs --targets: the horizon says how far ahead the target is.")
    if dst.suffix.lower() != ".npz":
        raise BadInputError(f"output {dst}: expected a file name ending in .npz.")
    check_writable(dst, force)
    cols, data = read_csv_columns(src, columns, tgt)
    x, y = make_windows(data, len(cols), window, stride, horizon, bool(tgt))
    meta = {
        "schema": "seqgate.windows/1", "csv": src.name, "csv_sha256": sha256_file(src),
        "rows": int(data.shape[0]),
        "window": window, "stride": stride, "horizon": horizon, "columns": cols, "targets": tgt,
        "samples": int(x.shape[0]), "windows_shape": list(x.shape),
        "targets_shape": list(y.shape) if y is not None else None,
    }
    arrays: dict[str, Any] = {WINDOWS_KEY: x, META_KEY: np.asarray(json.dumps(meta, sort_keys=True))}
    if y is not None:
        arrays[TARGETS_KEY] = y
    buf = io.BytesIO()
    np.savez(buf, **arrays)  # uncompressed: verify memory-maps the members
    write_atomic(dst, buf.getvalue())
    return meta
