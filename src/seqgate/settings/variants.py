"""The reduced-precision variant setting: ``[[variants]]`` entries of a gate config.

Each entry names one candidate ``kind`` and its acceptance rule. The float32 tolerance defaults
do **not** apply to a variant (INT8 weights move outputs by ~1e-3..1e-2 by design); the rule
says what is acceptable, with any of:

- ``atol``/``rtol``: the elementwise rule ``|variant − source| ≤ atol + rtol·|source|`` on every
  output and hidden state (absent: the difference is reported, not judged; NaN/Inf still fail);
- ``min_top1_agreement``: fraction in 0..1 of recorded windows whose top-1 class is the
  source's, for class-score outputs;
- ``max_label_flips``: recorded windows whose label differs from the source's, at most;
- ``max_forecast_error_increase``: for recordings with a ``targets`` array, the relative
  increase of the mean absolute error against the targets, ``(MAE_variant − MAE_source) /
  MAE_source``, at most (0.02 = 2 % worse);
- ``required``: ``true`` makes a rejected variant fail the gate; by default a rejected variant
  is only not shipped.

A rule holds at least one criterion; a task threshold that the model cannot be judged on (no
class-score output, no targets) fails the variant, naming why.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from seqgate.errors import BadInputError
from seqgate.settings.values import (
    Problems,
    SettingProblems,
    parse_bool,
    parse_int,
    parse_tolerance,
    table_keys,
)

# int8_dynamic: onnxruntime.quantization.quantize_dynamic (INT8 weights, activations quantized per
# call); int8_dynamic_scan: the same after GRU/RNN nodes are rewritten as Scan loops of MatMuls
# (exact algebra) so their weights are quantized too; int8_static: QDQ calibrated on the recorded
# windows; float16: every float initializer and op in half precision, float32 inputs/outputs.
VARIANT_KINDS = ("int8_dynamic", "int8_dynamic_scan", "int8_static", "float16")
CRITERIA = ("atol", "rtol", "min_top1_agreement", "max_label_flips", "max_forecast_error_increase")
# every key of a [[variants]] entry and its default (None: absent, not judged)
VARIANT_DEFAULTS: dict[str, Any] = {"kind": None, **dict.fromkeys(CRITERIA), "required": False}


@dataclass(frozen=True)
class VariantRule:
    """One candidate variant and its acceptance rule (module docstring)."""

    kind: str
    atol: float | None = None
    rtol: float | None = None
    min_top1_agreement: float | None = None
    max_label_flips: int | None = None
    max_forecast_error_increase: float | None = None
    required: bool = False

    @property
    def file_name(self) -> str:
        return variant_file_name(self.kind)

    def to_json(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in VARIANT_DEFAULTS}


def variant_file_name(kind: str) -> str:
    """The file the gate writes for an accepted variant: ``model.<kind>.onnx``."""
    return f"model.{kind}.onnx"


def _fraction(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0 <= value <= 1:
        raise BadInputError(f"{where} must be a fraction in 0..1 (0.999 = 99.9 %), got {value!r}.")
    return float(value)


def _relative(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value) or value < 0:
        raise BadInputError(f"{where} must be a finite number ≥ 0 (0.02 = 2 % more error), got {value!r}.")
    return float(value)


def _kind(value: Any, where: str) -> str:
    if value not in VARIANT_KINDS:
        raise BadInputError(f"{where} {value!r}: choose one of {', '.join(VARIANT_KINDS)}.")
    return str(value)


_PARSERS: dict[str, Any] = {
    "kind": _kind, "atol": parse_tolerance, "rtol": parse_tolerance, "min_top1_agreement": _fraction,
    "max_label_flips": parse_int, "max_forecast_error_increase": _relative, "required": parse_bool,
}


def parse_variant(entry: Any, where: str) -> VariantRule:
    """One ``[[variants]]`` table → :class:`VariantRule`; every problem of the entry reported."""
    problems = Problems()
    for problem in table_keys(entry, VARIANT_DEFAULTS, where, "kind and an acceptance rule"):
        problems.add(problem)
    if "kind" not in entry:
        problems.add(f"{where}: kind is required ({', '.join(VARIANT_KINDS)})")
    if not any(k in entry for k in CRITERIA):
        problems.add(f"{where}: give an acceptance rule: at least one of {', '.join(CRITERIA)}")
    values = {k: problems.take(_PARSERS[k], v, f"{where}: {k}") for k, v in entry.items() if k in _PARSERS}
    if problems.items:
        raise SettingProblems(problems.items)
    return VariantRule(**values)


def parse_variants(value: Any, where: str = "[[variants]]") -> tuple[VariantRule, ...]:
    """Every ``[[variants]]`` entry, in order; one entry per kind."""
    if not isinstance(value, list):
        raise BadInputError(f"{where} must be written as a list of tables ({where} repeated), got {value!r}.")
    problems = Problems()
    out: list[VariantRule] = []
    for i, entry in enumerate(value):
        rule = problems.take(parse_variant, entry, f"{where} entry {i + 1}")
        if rule is None:
            continue
        if any(r.kind == rule.kind for r in out):
            problems.add(f"{where} entry {i + 1}: kind {rule.kind!r} is listed twice; give one rule per kind")
            continue
        out.append(rule)
    if problems.items:
        raise SettingProblems(problems.items)
    return tuple(out)
