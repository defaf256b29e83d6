"""Provenance of a Keras source's custom code: the export records the ``--custom-code`` file's
name and sha256; verify and the gate compare the file they are given with the record, exactly
as they compare the model file (a changed file differs; the gate's provenance check fails).

Expected digests are computed here with ``hashlib.sha256`` over the files' bytes (Python
standard library), independently of seqgate's own hashing.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest

import keras_models as km
from cli_helpers import invoke as _invoke
from seqgate.onnxfile.probes import read_metadata

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")

CELLS = km.leaky_tanh_cell_source("TinyCell", "seqgate_provenance_test")


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


@pytest.fixture
def exported(tmp_path: Path) -> dict[str, Path]:
    """A model with a custom cell, saved and exported with ``--custom-code``."""
    from seqgate.sources.keras import load_custom_code

    cells = tmp_path / "tiny_cells.py"
    cells.write_text(CELLS, encoding="utf-8")
    module = load_custom_code(cells)
    k = km.keras()
    model = km.functional((None, 2), lambda x: k.layers.RNN(module.TinyCell(3), name="rnn")(x),
                          np.random.default_rng(7))
    keras_path = km.save(model, tmp_path / "m.keras")
    shipped = tmp_path / "m.onnx"
    r = _invoke("export", str(keras_path), "-o", str(shipped), "--custom-code", str(cells))
    assert r.exit_code == 0, r.output
    return {"dir": tmp_path, "cells": cells, "keras": keras_path, "onnx": shipped}


def _changed(files: dict[str, Path]) -> Path:
    """The custom-code file with one more comment line: other bytes (sha256), same classes."""
    other = files["dir"] / "tiny_cells_edited.py"
    other.write_text(CELLS + "\n# edited after the export\n", encoding="utf-8")
    return other


def _verify(files: dict[str, Path], cells: Path) -> tuple[Any, dict[str, Any]]:
    rep = files["dir"] / "v.json"
    r = _invoke("verify", str(files["onnx"]), "--source", str(files["keras"]), "--custom-code", str(cells),
                "--synthetic", "--quiet", "--report", str(rep))
    return r, json.loads(rep.read_text())


def test_export_records_the_custom_code_file(exported: dict[str, Path]) -> None:
    meta = read_metadata(onnx.load(str(exported["onnx"])))
    assert meta["seqgate.source.custom_code"] == "tiny_cells.py"
    assert meta["seqgate.source.custom_code_sha256"] == _sha(exported["cells"])
    assert meta["seqgate.source.sha256"] == _sha(exported["keras"])


def test_verify_reports_a_changed_custom_code_file_as_it_does_a_changed_model_file(
        exported: dict[str, Path]) -> None:
    r, rep = _verify(exported, exported["cells"])
    assert r.exit_code == 0, r.output
    prov = rep["provenance"]
    assert prov["status"] == "match", prov
    entry = next(e for e in prov["files"] if e["role"] == "custom_code")
    assert entry["matches"] is True and entry["sha256"] == entry["recorded_sha256"] == _sha(exported["cells"])
    edited = _changed(exported)
    r, rep = _verify(exported, edited)
    assert r.exit_code == 0, r.output  # the same computation: the numbers still agree
    prov = rep["provenance"]
    assert prov["status"] == "differs"
    entry = next(e for e in prov["files"] if e["role"] == "custom_code")
    assert entry["matches"] is False
    assert entry["sha256"] == _sha(edited) and entry["recorded_sha256"] == _sha(exported["cells"])
    assert any("provenance" in w and "custom_code" in w for w in rep["warnings"])
    # the model file changed instead: the same kind of entry, for the role "source"
    other_model = exported["dir"] / "m_copy.keras"
    shutil.copy(exported["keras"], other_model)
    with other_model.open("ab") as f:
        f.write(b"\0")  # other bytes, so another sha256 (the file is only hashed here)
    from seqgate.sources.spec import parse_source
    from seqgate.verify.provenance import compare_provenance

    prov = compare_provenance(onnx.load(str(exported["onnx"])), parse_source(str(other_model), None,
                                                                            exported["cells"]))
    assert prov["status"] == "differs"
    assert [e["role"] for e in prov["files"] if e["matches"] is False] == ["source"]


def test_custom_code_missing_or_extra_differs(exported: dict[str, Path]) -> None:
    from seqgate.sources.spec import parse_source
    from seqgate.verify.provenance import compare_provenance

    model = onnx.load(str(exported["onnx"]))
    prov = compare_provenance(model, parse_source(str(exported["keras"])))
    entry = next(e for e in prov["files"] if e["role"] == "custom_code")
    assert prov["status"] == "differs" and entry["sha256"] is None and "none was given" in entry["note"]
    plain = km.save(km.sequential((None, 2), [km.keras().layers.GRU(2)], np.random.default_rng(1)),
                    exported["dir"] / "plain.keras")
    out = exported["dir"] / "plain.onnx"
    assert _invoke("export", str(plain), "-o", str(out)).exit_code == 0
    prov = compare_provenance(onnx.load(str(out)), parse_source(str(plain), None, exported["cells"]))
    entry = next(e for e in prov["files"] if e["role"] == "custom_code")
    assert prov["status"] == "differs" and "without custom code" in entry["note"]
    assert compare_provenance(onnx.load(str(out)), parse_source(str(plain)))["status"] == "match"


def _gate(files: dict[str, Path], cells: Path, onnx_line: str) -> tuple[Any, dict[str, Any]]:
    cfg = files["dir"] / "gate.toml"
    cfg.write_text(f'[model]\nsource = "{files["keras"]}"\ncustom_code = "{cells}"\n{onnx_line}\n'
                   f"[verify]\nsynthetic = true\n", encoding="utf-8")
    out = files["dir"] / "gate-out"
    shutil.rmtree(out, ignore_errors=True)
    r = _invoke("gate", str(cfg), "--out", str(out), "--quiet")
    return r, json.loads((out / "report.json").read_text())


def test_gate_fails_provenance_on_a_changed_custom_code_file(exported: dict[str, Path]) -> None:
    r, rep = _gate(exported, exported["cells"], "")  # exported by the gate itself
    assert r.exit_code == 0, r.output
    checks = {c["name"]: c for c in rep["checks"]}
    assert checks["provenance"]["passed"] is True
    assert rep["provenance"]["files"][str(exported["cells"])] == _sha(exported["cells"])
    edited = _changed(exported)
    r, rep = _gate(exported, edited, f'onnx = "{exported["onnx"]}"')  # the shipped file, other code
    assert r.exit_code == 1, r.output
    checks = {c["name"]: c for c in rep["checks"]}
    assert checks["provenance"]["passed"] is False and checks["provenance"]["status"] == "differs"
    assert checks["verify"]["passed"] is True
    entry = next(f for f in checks["provenance"]["files"] if f["role"] == "custom_code")
    assert entry["sha256"] == _sha(edited) and entry["recorded_sha256"] == _sha(exported["cells"])
    assert "custom_code" in checks["provenance"]["detail"]


def test_custom_code_with_a_pytorch_source_is_bad_usage(tmp_path: Path) -> None:
    from seqgate.errors import BadInputError
    from seqgate.sources.spec import parse_source

    (tmp_path / "net.py").write_text("def build():\n    return None\n", encoding="utf-8")
    (tmp_path / "cells.py").write_text("", encoding="utf-8")
    with pytest.raises(BadInputError, match=r"--custom-code.*Keras"):
        parse_source(f"{tmp_path / 'net.py'}:build", None, tmp_path / "cells.py")


def test_profile_records_the_custom_code_file(exported: dict[str, Path]) -> None:
    """``profile --source K.keras --custom-code F.py`` lists the custom-code file with its sha256
    beside the model file; ``--custom-code`` without ``--source`` is bad usage (exit 2)."""
    rep = exported["dir"] / "p.json"
    r = _invoke("profile", str(exported["onnx"]), "--source", str(exported["keras"]), "--custom-code",
                str(exported["cells"]), "--seq-lens", "4", "--batch-sizes", "1", "--threads", "1",
                "--warmup", "1", "--min-runs", "3", "--min-time", "0", "--quiet", "--report", str(rep))
    assert r.exit_code == 0, r.output
    files = {Path(f["path"]).name: f["sha256"] for f in json.loads(rep.read_text())["source"]["files"]}
    assert files == {"m.keras": _sha(exported["keras"]), "tiny_cells.py": _sha(exported["cells"])}
    r = _invoke("profile", str(exported["onnx"]), "--custom-code", str(exported["cells"]), "--quiet")
    assert r.exit_code == 2 and "--custom-code was given without --source" in r.output, r.output
