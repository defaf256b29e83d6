"""The maintenance-log demo (a packed bidirectional LSTM over padded event ids) gated end to end:
verify counts the recording's padding steps (checked with numpy against the recording), profile
times padded batches drawn from the recording beside full ones, and the HTML report carries the
mask chart (parsed with the stdlib HTML parser, as in test_gate)."""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import numpy as np
from test_gate import DEMO, FAST_PROFILE, _assert_self_contained, _parse_html, runner

from seqgate.cli.app import app
from seqgate.gate.config import load_gate_config

MAINT = DEMO / "maintenance"


def _config(tmp_path: Path) -> Path:
    text = f"""
[model]
source = "{MAINT / "maintenance_model.py"}:build_model"
weights = "{MAINT / "maintenance_model.pt"}"
[verify]
recordings = ["{MAINT / "service_logs.npz"}"]
synthetic = true
task = "classify"
{FAST_PROFILE.format(compare="true")}
lengths = "{MAINT / "service_logs.npz"}"
[[profile.budget]]
seq_len = 32
ms = 1000.0
"""
    p = tmp_path / "gate.toml"
    p.write_text(text, encoding="utf-8")
    return p


def test_demo_config_is_the_padded_one_and_small() -> None:
    cfg = load_gate_config(MAINT / "gate.toml")
    assert cfg.lengths == MAINT / "service_logs.npz" and cfg.lengths.is_file()  # resolved against the config
    with open(MAINT / "gate.toml", "rb") as f:
        assert tomllib.load(f)["verify"]["task"] == "classify"
    assert sum(p.stat().st_size for p in MAINT.iterdir()) < 300_000


def test_maintenance_gate_passes_with_padding_counts_and_mask_chart(tmp_path: Path) -> None:
    out = tmp_path / "out"
    r = runner.invoke(app, ["gate", str(_config(tmp_path)), "--out-dir", str(out), "--quiet"])
    assert r.exit_code == 0, r.output
    rep = json.loads((out / "report.json").read_text())
    assert rep["passed"] is True and [c["passed"] for c in rep["checks"]] == [True] * 4
    recs = {x["label"]: x for x in rep["verify"]["recordings"]}
    with np.load(MAINT / "service_logs.npz") as z:
        events, lengths = z["events"], z["lengths"]
    notes = recs[str(MAINT / "service_logs.npz")]["notes"]
    # numpy, two ways: steps past each length, and the padding id 0 (never a real event here)
    assert notes["padding_steps"] == int((events.shape[1] - lengths).sum()) == int((events == 0).sum())
    assert notes["steps"] == events.size
    assert "synthetic:padded_random_lengths" in recs
    out_t = [t for t in rep["verify"]["tensors"] if t["kind"] == "output"]
    assert out_t[0]["metrics"]["top1_agreement"] == 1.0
    points = rep["profile"]["points"]
    assert {(p["runtime"], p["lengths"]) for p in points} == {
        (rt, how) for rt in ("onnxruntime", "torch") for how in ("full", "recording")}
    for p in points:
        assert p["padded"] == (p["lengths"] == "recording")
        assert p["valid_steps"] <= p["batch"] * p["seq_len"]
    full = [p["p90_ms"] for p in points if not p["padded"] and p["runtime"] == "onnxruntime"]
    assert rep["profile"]["budgets"] and all(b["measured_ms"] in full for b in rep["profile"]["budgets"])
    html, text = _parse_html(out / "report.html")
    _assert_self_contained(html, text)
    assert "Masks: valid and padded steps" in text
    assert 'alt="valid and padded steps per window set"' in text
    # the mask chart and the latency chart (packed layers compare final states only: no drift curve)
    assert len(html.images) >= 2
    assert "padded batches (recording lengths)" in text  # the latency table's rows label
