"""Latency verdicts only from what was measured: fits need three lengths, say when they are poor,
label extrapolated predictions; budgets are judged at a measured length.

References: ``numpy.polyfit`` (least squares, and with ``cov=True`` the coefficient covariance
scaled by ``SSres / (n − 2)`` for a degree-1 fit, numpy docs); hand-worked values beside each
case; the standard error of an OLS intercept ``s·√(1/n + T̄²/Sxx)`` (any regression textbook).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from seqgate.profile.result import ONNXRUNTIME, Point, budget_checks, fits_for
from seqgate.profile.stats import Stats, fit_line
from seqgate.settings import Budget


def _pt(t: int, ms: float, runtime: str = ONNXRUNTIME) -> Point:
    s = Stats(ms, ms, ms, ms, ms, ms, 0.0, 10)
    return Point(t, 1, 1, runtime, s, macs_per_sequence=0)


def test_two_lengths_give_no_fit() -> None:
    # two points always lie on a line: R² = 1 would say nothing
    assert fit_line([8, 32], [1.0, 2.0]) is None
    assert fit_line([8, 8, 32, 32], [1.0, 1.1, 2.0, 2.1]) is None
    notes: list[str] = []
    assert fits_for([_pt(8, 1.0), _pt(32, 2.0)], 99, [], notes) == []
    assert any("too few lengths to fit" in n for n in notes), notes


def test_three_lengths_fit_matches_numpy_polyfit_and_its_covariance() -> None:
    ts, ys = [10.0, 20.0, 30.0, 40.0], [0.8, 2.3, 2.8, 4.0]
    fit = fit_line(ts, ys)
    assert fit is not None
    (b, a), cov = np.polyfit(ts, ys, 1, cov=True)  # highest degree first
    assert (fit.a_ms, fit.b_ms_per_step) == pytest.approx((a, b), rel=1e-9)
    # numpy scales the covariance by SSres / (n − 2) for this fit: the intercept's variance
    assert fit.a_stderr_ms == pytest.approx(math.sqrt(cov[1, 1]), rel=1e-9)
    assert (fit.t_min, fit.t_max) == (10.0, 40.0)


def test_intercept_standard_error_hand_worked() -> None:
    # (1, 1), (2, 3), (3, 2): a = 1, b = 0.5, SSres = 1.5, s² = 1.5 / (3 − 2) = 1.5, T̄ = 2, Sxx = 2
    # → SE(a) = √(1.5·(1/3 + 4/2)) = √3.5
    fit = fit_line([1, 2, 3], [1, 3, 2])
    assert fit is not None
    assert fit.a_stderr_ms == pytest.approx(math.sqrt(3.5))
    assert fit.r2 == pytest.approx(0.25)
    assert fit.poor_reasons() and "R²" in fit.poor_reasons()[0]  # 0.25 < 0.95


def test_negative_intercept_beyond_noise_is_poor() -> None:
    # exactly on y = −1 + 0.1·T: R² = 1 but a = −1 with no noise at all (SE 0)
    fit = fit_line([16, 32, 64], [0.6, 2.2, 5.4])
    assert fit is not None
    assert fit.a_ms == pytest.approx(-1.0) and fit.r2 == pytest.approx(1.0)
    assert any("negative intercept" in r for r in fit.poor_reasons())
    # a slightly negative intercept well inside its noise is not flagged (numbers: see the test above,
    # a ≈ −0.05, SE(a) ≈ 0.35 from numpy's covariance; R² ≈ 0.97)
    fit = fit_line([10, 20, 30, 40], [0.8, 2.3, 2.8, 4.0])
    assert fit is not None and fit.a_ms < 0
    assert fit.poor_reasons() == []
    f = fits_for([_pt(10, 0.8), _pt(20, 2.3), _pt(30, 2.8), _pt(40, 4.0)], 99, [])[0]
    assert f["quality"] == "good" and f["poor_reasons"] == []
    f = fits_for([_pt(16, 0.6), _pt(32, 2.2), _pt(64, 5.4)], 99, [])[0]
    assert f["quality"] == "poor"


def test_prediction_outside_the_measured_range_is_extrapolated() -> None:
    # p(T) = 0.5 + 0.01·T measured at 8, 32, 128 (0.58, 0.82, 1.78 ms)
    pts = [_pt(8, 0.58), _pt(32, 0.82), _pt(128, 1.78)]
    budgets = [Budget(8, 1.0), Budget(128, 5.0)]
    fit = fits_for(pts, 99, budgets)[0]
    by = {x["budget_seq_len"]: x for x in fit["longest_seq_len"]}
    # 0.5 + 0.01·T ≤ 5 → T ≤ 450, beyond the longest measured 128
    assert by[128]["seq_len"] == 450 and by[128]["extrapolated"] is True
    assert by[128]["longest_measured_seq_len"] == 128
    # 0.5 + 0.01·T ≤ 1 → T ≤ 50, inside 8..128; measured: 8 and 32 meet 1 ms, 128 does not
    assert by[8]["seq_len"] == 50 and by[8]["extrapolated"] is False
    assert by[8]["longest_measured_seq_len"] == 32
    checks = budget_checks(pts, budgets, 99, [fit])
    c128 = next(c for c in checks if c["seq_len"] == 128)
    assert c128["basis"] == "measured" and c128["measured_ms"] == 1.78 and c128["passed"] is True
    assert c128["predicted_longest_seq_len"] == 450 and c128["predicted_extrapolated"] is True


def test_budget_verdict_is_the_measured_point_not_the_line() -> None:
    # the line through these points predicts ~3.7 ms at T=128 (< 5), the measurement is 10 ms
    pts = [_pt(8, 1.0), _pt(32, 1.0), _pt(64, 1.0), _pt(128, 10.0)]
    fits = fits_for(pts, 99, [Budget(128, 5.0)])
    (check,) = budget_checks(pts, [Budget(128, 5.0)], 99, fits)
    assert check["passed"] is False and check["measured_ms"] == 10.0 and check["basis"] == "measured"
    # a budget whose length was never measured fails; it is never filled in from the line
    (missing,) = budget_checks(pts, [Budget(100, 1e9)], 99, fits)
    assert missing["passed"] is False and missing["basis"] == "not measured"


def _tiny_model(path: Path) -> Path:
    """x [batch, time, 3] → ReduceSum over time: a model with a free time axis (opset 17)."""
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", "time", 3])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["batch", 3])
    axes = helper.make_tensor("axes", TensorProto.INT64, [1], [1])
    node = helper.make_node("ReduceSum", ["x", "axes"], ["y"], keepdims=0)
    graph = helper.make_graph([node], "tiny", [x], [y], initializer=[axes])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.save(model, str(path))
    return path


def test_profile_measures_the_budget_length_and_judges_it_there(tmp_path: Path) -> None:
    from seqgate.profile.run import profile_model

    m = _tiny_model(tmp_path / "tiny.onnx")
    rep = profile_model(m, seq_lens="8,32", budgets=["16=1000"], warmup=0, min_runs=3, min_time=0.0)
    d = rep.to_dict()
    assert sorted({p["seq_len"] for p in d["points"]}) == [8, 16, 32]
    (b,) = d["budgets"]
    assert b["seq_len"] == 16 and b["basis"] == "measured" and b["passed"] is True
    at16 = next(p for p in d["points"] if p["seq_len"] == 16)
    assert b["measured_ms"] == at16["p99_ms"]
    # two lengths only: no line, and a note says why
    d = profile_model(m, seq_lens="8,32", warmup=0, min_runs=3, min_time=0.0).to_dict()
    assert d["fits"] == [] and any("too few lengths to fit" in n for n in d["notes"])


def _report_with_extrapolation() -> dict[str, object]:
    budget = {"seq_len": 48, "batch": 1, "threads": 1, "budget_ms": 20.0, "measured_ms": 0.15, "passed": True,
              "percentile": 99, "predicted_longest_seq_len": 18640, "predicted_extrapolated": True,
              "fit_quality": "good", "longest_measured_seq_len": 192, "basis": "measured"}
    profile = {"budgets": [budget], "points": [], "notes": []}
    return {"passed": True, "exit_code": 0, "model_name": "m", "config_path": "g.toml", "seqgate_version": "0",
            "created": "now", "checks": [{"name": "latency", "passed": True, "detail": "held"}],
            "profile": profile, "provenance": {"files": {}}, "environment": {}, "config": {"percentile": 99}}


def test_gate_reports_label_extrapolated_lengths() -> None:
    from seqgate.report.gate_html import render_gate_html
    from seqgate.report.gate_text import gate_markdown

    d = _report_with_extrapolation()
    md = gate_markdown(d)
    row = next(line for line in md.splitlines() if line.startswith("| 48 |"))
    assert "18640 (extrapolated, not measured)" in row and "measured 192" in row
    html = render_gate_html(d)
    assert "line predicts 18640 (extrapolated, not measured)" in html and "measured: 192" in html
