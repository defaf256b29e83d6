"""Streaming latency (profile) and the demo's streaming gate.

No speed target is asserted here (those live in benchmarks): the budgets below are either
unmissable (1000 ms per call) or physically impossible (1e-6 ms = 1 ns per onnxruntime call,
far below one Python function call), so each verdict is known before measuring.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from typer.testing import CliRunner

import keras_models as km
from seqgate.export.streaming import make_streaming

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def stream_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    k = km.keras()
    model = km.functional((None, 3), lambda x: k.layers.Dense(1)(k.layers.LSTM(4, return_sequences=True)(x)),
                          np.random.default_rng(2), name="tiny")
    path = tmp_path_factory.mktemp("stream") / "tiny_stream.onnx"
    path.write_bytes(make_streaming(km.export(model), "tiny").SerializeToString())
    return path


def _profile(path: Path, budget_ms: float) -> Any:
    from seqgate.profile.run import profile_model

    return profile_model(path, seq_lens=[4], warmup=1, min_runs=5, min_time=0.0, chunks=[1, 3],
                         call_budgets=[f"1={budget_ms}"])


def test_per_call_latency_reported_and_judged(stream_file: Path) -> None:
    ok = _profile(stream_file, 1000.0).to_dict()
    st = ok["streaming"]
    assert ok["passed"] and st["passed"] and st["chunks"] == [1, 3] and st["states"] == 2
    for p in st["points"]:
        # µs per new sample is the call's figure divided by the steps it carried (definition)
        assert p["us_per_sample"]["p99"] == pytest.approx(p["p99_ms"] * 1000.0 / p["chunk"])
        assert p["p50_ms"] <= p["p90_ms"] <= p["p99_ms"]
    bad = _profile(stream_file, 1e-6).to_dict()
    assert not bad["passed"] and bad["streaming"]["call_budgets"][0]["passed"] is False


def test_call_budget_option_is_parsed_like_budgets(stream_file: Path) -> None:
    from seqgate.cli.app import app

    r = CliRunner().invoke(app, ["profile", str(stream_file), "--call-budget", "1=fast"])
    assert r.exit_code == 2, r.output
    assert "--call-budget" in r.output and "not a number of milliseconds" in r.output


def test_demo_streaming_gate(tmp_path: Path) -> None:
    """fixtures/demo/pressure/stream_gate.toml: a streaming export, the streaming check against
    Keras (source framework) and a per-call budget, all in the reports."""
    import json

    from seqgate.gate.run import run_gate

    rep = run_gate(REPO / "fixtures" / "demo" / "pressure" / "stream_gate.toml", tmp_path / "out")
    assert rep.passed, [c for c in rep.to_dict()["checks"] if not c["passed"]]
    data = json.loads((tmp_path / "out" / "report.json").read_text())
    names = [c["name"] for c in data["checks"]]
    assert "streaming" in names
    assert data["verify"]["streaming"]["chunk_sizes"] == [1, 4, 7]
    assert data["profile"]["streaming"]["call_budgets"][0]["chunk"] == 1
    html = (tmp_path / "out" / "report.html").read_text()
    assert "<h2>Streaming</h2>" in html and "streaming drift chart" in html
    assert "long_stream" in names and data["verify"]["long_stream"]["factor"] == 10  # the default
    assert "long-stream error growth chart" in html
