"""The ``seqgate.verify/1`` JSON report: strict JSON (±Inf written as the strings "inf"/"-inf")."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from seqgate.util.files import write_text_atomic


def strict_json(x: Any) -> Any:
    """``x`` with non-finite floats spelled as strings, so ``json.dumps(allow_nan=False)`` accepts it."""
    if isinstance(x, float) and not math.isfinite(x):
        return "nan" if math.isnan(x) else ("inf" if x > 0 else "-inf")
    if isinstance(x, dict):
        return {str(k): strict_json(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [strict_json(v) for v in x]
    return x


def verify_json(report: Any) -> str:
    """The report document as indented, strict JSON text."""
    return json.dumps(strict_json(report.to_json()), indent=2, sort_keys=False, allow_nan=False)


def write_verify_json(report: Any, path: str | Path) -> None:
    write_text_atomic(path, verify_json(report) + "\n")
