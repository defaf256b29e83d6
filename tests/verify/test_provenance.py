"""Provenance: untrained exports are refused unless asked for; verify compares the files it is given
with the sha256 the ONNX file records; the gate fails its own ``provenance`` check when they differ,
unless the config states why another source is expected.

The expected digests are computed here with ``hashlib.sha256`` over the files' bytes (Python
standard library), independently of seqgate's own hashing.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import textwrap
from pathlib import Path
from typing import Any

import onnx
import pytest
import torch

from cli_helpers import invoke as _invoke
from seqgate.onnxfile.probes import read_metadata
from seqgate.sources.spec import parse_source
from seqgate.sources.torch import load_torch
from torch_models import FACTORY_FILE

torch.set_num_threads(1)
DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _weights(py: Path, path: Path, seed: int) -> Path:
    module = load_torch(parse_source(f"{py}:build"))
    torch.manual_seed(seed)
    for p in module.parameters():
        torch.nn.init.uniform_(p, -0.5, 0.5)
    torch.save(module.state_dict(), path)
    return path


@pytest.fixture
def net(tmp_path: Path) -> dict[str, Path]:
    py = tmp_path / "net.py"
    py.write_text(textwrap.dedent(FACTORY_FILE))
    return {"dir": tmp_path, "py": py, "w1": _weights(py, tmp_path / "w1.pt", 1),
            "w2": _weights(py, tmp_path / "w2.pt", 2)}


# ----- export ------------------------------------------------------------------------------
def test_factory_without_weights_is_refused(net: dict[str, Path]) -> None:
    out = net["dir"] / "o.onnx"
    r = _invoke("export", f"{net['py']}:build", "-o", str(out))
    assert r.exit_code == 2, r.output
    assert "no weights" in r.output and "--weights" in r.output and "--untrained" in r.output
    assert not out.exists() and not list(net["dir"].glob(".o.onnx*"))


def test_untrained_export_is_recorded(net: dict[str, Path]) -> None:
    out = net["dir"] / "u.onnx"
    r = _invoke("export", f"{net['py']}:build", "--untrained", "-o", str(out))
    assert r.exit_code == 0, r.output
    assert "UNTRAINED" in r.output
    meta = read_metadata(onnx.load(str(out)))
    assert meta["seqgate.source.untrained"] == "true"
    assert "seqgate.source.weights_sha256" not in meta
    out2 = net["dir"] / "t.onnx"
    assert _invoke("export", f"{net['py']}:build", "--weights", str(net["w1"]), "-o", str(out2)).exit_code == 0
    meta2 = read_metadata(onnx.load(str(out2)))
    assert "seqgate.source.untrained" not in meta2
    assert meta2["seqgate.source.weights_sha256"] == _sha(net["w1"])
    assert meta2["seqgate.source.sha256"] == _sha(net["py"])


@pytest.mark.parametrize("which", ["torch_with_weights", "keras"])
def test_untrained_flag_contradictions_exit_2(which: str, net: dict[str, Path]) -> None:
    out = net["dir"] / "c.onnx"
    if which == "keras":
        args = [str(DEMO / "pressure" / "pressure_forecaster.keras"), "--untrained"]
    else:
        args = [f"{net['py']}:build", "--untrained", "--weights", str(net["w1"])]
    r = _invoke("export", *args, "-o", str(out))
    assert r.exit_code == 2 and "--untrained" in r.output, r.output
    assert not out.exists()


# ----- verify ------------------------------------------------------------------------------
def _verify(net: dict[str, Path], model: Path, *extra: str) -> tuple[Any, dict[str, Any], str]:
    rep, md = net["dir"] / "v.json", net["dir"] / "v.md"
    r = _invoke("verify", str(model), "--source", f"{net['py']}:build", "--synthetic", "--quiet",
                "--report", str(rep), "--summary", str(md), *extra)
    return r, json.loads(rep.read_text()) if rep.exists() else {}, md.read_text() if md.exists() else ""


def test_verify_compares_weights_with_the_record(net: dict[str, Path]) -> None:
    model = net["dir"] / "m.onnx"
    assert _invoke("export", f"{net['py']}:build", "--weights", str(net["w1"]), "-o", str(model)).exit_code == 0
    r, rep, md = _verify(net, model, "--weights", str(net["w1"]))
    assert r.exit_code == 0, r.output
    prov = rep["provenance"]
    assert prov["status"] == "match" and prov["untrained"] is False
    by_role = {e["role"]: e for e in prov["files"]}
    assert by_role["weights"]["sha256"] == _sha(net["w1"]) == by_role["weights"]["recorded_sha256"]
    assert by_role["source"]["sha256"] == _sha(net["py"])
    assert "## Provenance" in md and "**match**" in md
    # other weights: the comparison fails (different numbers) and provenance says why
    r, rep, md = _verify(net, model, "--weights", str(net["w2"]))
    assert r.exit_code == 1
    prov = rep["provenance"]
    assert prov["status"] == "differs"
    w = next(e for e in prov["files"] if e["role"] == "weights")
    assert w["matches"] is False and w["sha256"] == _sha(net["w2"]) and w["recorded_sha256"] == _sha(net["w1"])
    assert "**differs**" in md and "**NO**" in md
    assert any("provenance" in x for x in rep["warnings"])


def test_verify_without_weights_against_a_trained_file_differs(net: dict[str, Path]) -> None:
    model = net["dir"] / "m.onnx"
    _invoke("export", f"{net['py']}:build", "--weights", str(net["w1"]), "-o", str(model))
    _, rep, _ = _verify(net, model)
    w = next(e for e in rep["provenance"]["files"] if e["role"] == "weights")
    assert rep["provenance"]["status"] == "differs" and w["matches"] is False and w["sha256"] is None


def test_verify_of_untrained_file_says_so(net: dict[str, Path]) -> None:
    model = net["dir"] / "u.onnx"
    _invoke("export", f"{net['py']}:build", "--untrained", "-o", str(model))
    r, rep, md = _verify(net, model)
    assert r.exit_code == 0, r.output
    assert rep["provenance"]["untrained"] is True and rep["provenance"]["status"] == "match"
    assert "UNTRAINED MODEL" in md.split("## Provenance")[0]  # above everything else
    _, rep, _ = _verify(net, model, "--weights", str(net["w1"]))
    assert rep["provenance"]["status"] == "differs"


# ----- gate --------------------------------------------------------------------------------
def _gate(net: dict[str, Path], model_lines: str) -> tuple[Any, Path]:
    cfg = net["dir"] / "gate.toml"
    cfg.write_text(f"[model]\n{model_lines}\n[verify]\nsynthetic = true\n", encoding="utf-8")
    out = net["dir"] / "gate-out"
    shutil.rmtree(out, ignore_errors=True)
    return _invoke("gate", str(cfg), "--out", str(out), "--quiet"), out


def _same_code_other_file(net: dict[str, Path]) -> Path:
    """The factory file with one more comment line: other bytes (sha256), same computation."""
    other = net["dir"] / "net_copy.py"
    other.write_text(net["py"].read_text() + "\n# reformatted\n")
    return other


def test_gate_fails_provenance_when_the_onnx_file_comes_from_other_files(net: dict[str, Path]) -> None:
    shipped = net["dir"] / "shipped.onnx"
    _invoke("export", f"{net['py']}:build", "--weights", str(net["w1"]), "-o", str(shipped))
    other = _same_code_other_file(net)
    r, out = _gate(net, f'source = "{other}:build"\nweights = "{net["w1"]}"\nonnx = "{shipped}"')
    assert r.exit_code == 1, r.output
    rep = json.loads((out / "report.json").read_text())
    checks = {c["name"]: c for c in rep["checks"]}
    assert checks["provenance"]["passed"] is False and checks["provenance"]["status"] == "differs"
    assert checks["verify"]["passed"] is True  # the same computation: only provenance fails
    assert rep["passed"] is False and rep["exit_code"] == 1
    src = next(f for f in checks["provenance"]["files"] if f["role"] == "source")
    assert src["sha256"] == _sha(other) and src["recorded_sha256"] == _sha(net["py"])
    assert "provenance" in (out / "junit.xml").read_text()
    assert "**differs**" in (out / "report.md").read_text()


def test_gate_accepts_another_source_with_a_reason(net: dict[str, Path]) -> None:
    shipped = net["dir"] / "shipped.onnx"
    _invoke("export", f"{net['py']}:build", "--weights", str(net["w1"]), "-o", str(shipped))
    other = _same_code_other_file(net)
    reason = "factory file reformatted after release 4.2; weights unchanged"
    r, out = _gate(net, f'source = "{other}:build"\nweights = "{net["w1"]}"\nonnx = "{shipped}"\n'
                        f'expect_other_source = "{reason}"')
    assert r.exit_code == 0, r.output
    rep = json.loads((out / "report.json").read_text())
    prov = next(c for c in rep["checks"] if c["name"] == "provenance")
    assert prov["passed"] is True and prov["status"] == "differs" and prov["expected_other_source"] == reason
    for name in ("report.md", "report.html"):
        assert reason in (out / name).read_text(), name


def test_gate_untrained_is_shown_in_every_report(net: dict[str, Path]) -> None:
    r, out = _gate(net, f'source = "{net["py"]}:build"\nuntrained = true')
    assert r.exit_code == 0, r.output
    rep = json.loads((out / "report.json").read_text())
    assert rep["untrained"] is True
    md = (out / "report.md").read_text()
    assert "UNTRAINED MODEL" in md.split("## Checks")[0]
    html = (out / "report.html").read_text()
    assert html.index("UNTRAINED MODEL") < html.index("<table")
    assert read_metadata(onnx.load(str(out / "model.onnx")))["seqgate.source.untrained"] == "true"


def test_gate_without_weights_or_untrained_is_refused(net: dict[str, Path]) -> None:
    r, _ = _gate(net, f'source = "{net["py"]}:build"')
    assert r.exit_code == 2 and "untrained = true" in r.output, r.output


@pytest.mark.parametrize(("lines", "needle"), [
    ('expect_other_source = "  "', "expect_other_source needs the reason"),
    ('untrained = true\nweights = "{w1}"', "contradict"),
    ("expect_other_source = true", "expect_other_source needs the reason"),
])
def test_gate_config_provenance_keys_checked(lines: str, needle: str, net: dict[str, Path]) -> None:
    r, _ = _gate(net, f'source = "{net["py"]}:build"\n' + lines.format(w1=net["w1"]))
    assert r.exit_code == 2 and needle in r.output, r.output
