"""The release gate end to end on both demo models, a tampered model, an impossible budget and
bad configs; the HTML report parsed for its verdict, inline charts and absence of external links."""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import numpy_helper
from typer.testing import CliRunner

from seqgate.cli.app import app

DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
runner = CliRunner()

FAST_PROFILE = """
[profile]
seq_lens = [8, 32]
batch_sizes = [1]
threads = [1]
percentile = 90
warmup = 1
min_runs = 3
min_time = 0.0
compare_source = {compare}
"""


def _pressure_config(
    tmp_path: Path, extra: str = "", budget_ms: float = 1000.0, compare: str = "false"
) -> Path:
    text = f"""
[model]
source = "{DEMO / "pressure" / "pressure_forecaster.keras"}"
{extra}
[verify]
recordings = ["{DEMO / "pressure" / "field_week.npz"}"]
synthetic = true
seed = 3
{FAST_PROFILE.format(compare=compare)}
[[profile.budget]]
seq_len = 32
ms = {budget_ms}
"""
    p = tmp_path / "gate.toml"
    p.write_text(text, encoding="utf-8")
    return p


def _vibration_config(tmp_path: Path) -> Path:
    text = f"""
[model]
source = "{DEMO / "vibration" / "vibration_model.py"}:build_model"
weights = "{DEMO / "vibration" / "vibration_model.pt"}"
[verify]
recordings = ["{DEMO / "vibration" / "pump_windows.npz"}"]
synthetic = true
task = "classify"
{FAST_PROFILE.format(compare="true")}
"""
    p = tmp_path / "gate.toml"
    p.write_text(text, encoding="utf-8")
    return p


class _Html(HTMLParser):
    """Collects every URL-bearing attribute and the document's images (stdlib html.parser)."""

    def __init__(self) -> None:
        super().__init__()
        self.urls: list[str] = []
        self.images: list[str] = []
        self.tags: set[str] = set()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.add(tag)
        for k, v in attrs:
            if k in ("src", "href", "action", "data") and v is not None:
                self.urls.append(v)
                if tag == "img":
                    self.images.append(v)


def _parse_html(path: Path) -> tuple[_Html, str]:
    text = path.read_text(encoding="utf-8")
    p = _Html()
    p.feed(text)
    return p, text


def _assert_self_contained(p: _Html, text: str) -> None:
    assert all(u.startswith("data:image/png;base64,") for u in p.urls), p.urls
    assert "script" not in p.tags and "link" not in p.tags
    assert not re.search(r"url\(", text), "CSS must not load anything"


def test_gate_passes_on_keras_demo(tmp_path: Path) -> None:
    out = tmp_path / "out"
    r = runner.invoke(app, ["gate", str(_pressure_config(tmp_path)), "--out-dir", str(out), "--quiet"])
    assert r.exit_code == 0, r.output
    for name in ("model.onnx", "report.json", "report.md", "junit.xml", "report.html"):
        assert (out / name).is_file(), name
    rep = json.loads((out / "report.json").read_text())
    assert rep["schema"] == "seqgate.gate/1" and rep["passed"] is True
    assert [c["name"] for c in rep["checks"]] == ["export", "provenance", "verify", "latency"]
    assert rep["verify"]["schema"] == "seqgate.verify/1"
    assert rep["profile"]["schema"] == "seqgate.profile/1"
    kinds = {t["kind"] for t in rep["verify"]["tensors"]}
    assert {"output", "hidden_sequence", "hidden_final", "cell_final"} <= kinds
    p, text = _parse_html(out / "report.html")
    _assert_self_contained(p, text)
    assert "PASSED" in text and "FAILED" not in text
    assert len(p.images) >= 2  # per-step error chart(s) and the latency chart
    assert "First divergence" not in text
    junit = (out / "junit.xml").read_text()
    assert "<failure" not in junit and 'name="verify"' in junit


def test_gate_passes_on_torch_demo(tmp_path: Path) -> None:
    out = tmp_path / "out"
    r = runner.invoke(app, ["gate", str(_vibration_config(tmp_path)), "--out-dir", str(out), "--quiet"])
    assert r.exit_code == 0, r.output
    rep = json.loads((out / "report.json").read_text())
    assert rep["passed"] is True
    runtimes = {pt["runtime"] for pt in rep["profile"]["points"]}
    assert runtimes == {"onnxruntime", "torch"}
    out_t = [t for t in rep["verify"]["tensors"] if t["kind"] == "output"]
    assert out_t and out_t[0]["metrics"]["top1_agreement"] == 1.0


def _tampered_copy(src_dir: Path, dst: Path) -> str:
    """Scale the forget-gate block of the last LSTM's recurrence weights by 1.02; return its layer."""
    m = onnx.load(str(src_dir / "model.onnx"))
    lstm = [n for n in m.graph.node if n.op_type == "LSTM"][-1]
    inits = {i.name: i for i in m.graph.initializer}
    r_init = inits[lstm.input[2]]
    r = numpy_helper.to_array(r_init).copy()
    h = r.shape[2]
    r[:, 2 * h : 3 * h, :] *= 1.02  # ONNX gate order i, o, f, c: block 2 is f
    r_init.CopyFrom(numpy_helper.from_array(r, r_init.name))
    onnx.save(m, str(dst))
    return lstm.doc_string.split("'")[1]


def test_tampered_model_fails_with_first_divergence(tmp_path: Path) -> None:
    good = tmp_path / "good"
    r = runner.invoke(app, ["gate", str(_pressure_config(tmp_path)), "--out-dir", str(good), "--quiet"])
    assert r.exit_code == 0
    layer = _tampered_copy(good, tmp_path / "shipped.onnx")
    cfg = _pressure_config(tmp_path, extra=f'onnx = "{tmp_path / "shipped.onnx"}"')
    out = tmp_path / "bad"
    r = runner.invoke(app, ["gate", str(cfg), "--out-dir", str(out), "--quiet"])
    assert r.exit_code == 1, r.output
    rep = json.loads((out / "report.json").read_text())
    assert rep["passed"] is False
    fd = rep["verify"]["first_divergence"]
    assert fd["layer"] == layer and fd["kind"] == "hidden_sequence"
    p, text = _parse_html(out / "report.html")
    _assert_self_contained(p, text)
    assert "FAILED" in text and "First divergence" in text and fd["tensor"] in text
    assert "<failure" in (out / "junit.xml").read_text()


def test_impossible_budget_fails(tmp_path: Path) -> None:
    out = tmp_path / "out"
    r = runner.invoke(
        app, ["gate", str(_pressure_config(tmp_path, budget_ms=1e-6)), "--out-dir", str(out), "--quiet"]
    )
    assert r.exit_code == 1, r.output
    rep = json.loads((out / "report.json").read_text())
    latency = next(c for c in rep["checks"] if c["name"] == "latency")
    assert latency["passed"] is False
    assert [c["passed"] for c in rep["checks"] if c["name"] != "latency"] == [True, True, True]
    assert "FAILED" in (out / "report.html").read_text()


@pytest.mark.parametrize(
    ("body", "needle"),
    [
        ('[model]\nsource = "nope.keras"\n[verify]\nsynthetic = true\n', "does not exist"),
        ('[model]\nsorce = "m.keras"\n', "did you mean 'source'"),
        ("[model]\nsource = 3\n", "source must be a string"),
        ("[model\n", "not valid TOML"),
    ],
)
def test_bad_config_exit_2(tmp_path: Path, body: str, needle: str) -> None:
    cfg = tmp_path / "gate.toml"
    cfg.write_text(body, encoding="utf-8")
    r = runner.invoke(app, ["gate", str(cfg), "--out-dir", str(tmp_path / "out")])
    assert r.exit_code == 2
    assert needle in r.output
    assert "Traceback" not in r.output
    assert not (tmp_path / "out").exists()  # validated before any work


def test_python_api_mirrors_command(tmp_path: Path) -> None:
    import seqgate

    rep = seqgate.gate(_pressure_config(tmp_path), out=tmp_path / "api")
    assert rep.passed and rep.exit_code == 0
    assert (tmp_path / "api" / "report.html").is_file()
    assert np.isfinite(
        json.loads((tmp_path / "api" / "report.json").read_text())["verify"]["tensors"][0]["metrics"][
            "max_abs"
        ]
    )


def test_unsupported_model_exit_3_with_reports(tmp_path: Path, keras) -> None:  # type: ignore[no-untyped-def]
    inp = keras.Input((None, 3), name="x")
    out = keras.layers.LSTM(4, activation="gelu", name="gelu_rnn")(inp)  # gelu has no ONNX cell slot
    keras.Model(inp, out).save(tmp_path / "masked.keras")
    cfg = tmp_path / "gate.toml"
    body = f'[model]\nsource = "{tmp_path / "masked.keras"}"\n[verify]\nsynthetic = true\n'
    cfg.write_text(body, encoding="utf-8")
    r = runner.invoke(app, ["gate", str(cfg), "--out-dir", str(tmp_path / "out"), "--quiet"])
    assert r.exit_code == 3, r.output
    rep = json.loads((tmp_path / "out" / "report.json").read_text())
    assert rep["exit_code"] == 3 and rep["error"]["stage"] == "export"
    assert [c["name"] for c in rep["checks"]] == ["export"]
    assert "gelu_rnn (LSTM)" in rep["error"]["message"]
    assert not (tmp_path / "out" / "model.onnx").exists()
    text = (tmp_path / "out" / "report.html").read_text()
    assert "Why the gate stopped" in text and "gelu_rnn (LSTM)" in text
