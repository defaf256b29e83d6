"""verify's streaming check: passes on a correct streaming file, catches and names planted state bugs.

The broken files are made by editing the ONNX graph here (not by seqgate), so each bug is a
known, independent change; the check must fail and name the bug.
"""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import keras_models as km
from seqgate.export.streaming import make_streaming
from seqgate.verify.streaming import streaming_check


@pytest.fixture(scope="module")
def stack() -> tuple[Any, Any]:
    """A Keras LSTM(4) → LSTM(4) → Dense stack (same sizes, so states can be mis-wired), streaming file."""
    k = km.keras()
    L = k.layers
    rng = np.random.default_rng(11)
    model = km.functional((None, 3), lambda x: L.Dense(2, name="head")(
        L.LSTM(4, return_sequences=True, name="second")(L.LSTM(4, return_sequences=True, name="first")(x))),
        rng, name="pair")
    return model, make_streaming(km.export(model), "pair")


def _node(model: Any, name: str) -> Any:
    return next(n for n in model.graph.node if n.name == name)


def _check(model: Any, x: np.ndarray[Any, Any]) -> dict[str, Any]:
    return streaming_check(model, [("rec", {"x": x})], 1e-5, 1e-5, chunk=4)


def _failures(report: dict[str, Any]) -> str:
    return "\n".join(f for r in report["runs"] for f in r["failures"])


def test_correct_file_passes(stack: tuple[Any, Any]) -> None:
    x = np.random.default_rng(1).normal(size=(2, 11, 3)).astype(np.float32)
    rep = _check(stack[1], x)
    assert rep["passed"], _failures(rep)
    assert rep["chunk_sizes"] == [1, 4, 7]
    assert [r["calls"] for r in rep["runs"]] == [11, 3, 2]  # ceil(11 / chunk) calls per stream


def test_c_and_h_swapped_is_named(stack: tuple[Any, Any]) -> None:
    bad = copy.deepcopy(stack[1])
    h, c = _node(bad, "streaming/first/h_out"), _node(bad, "streaming/first/c_out")
    h.input[0], c.input[0] = c.input[0], h.input[0]
    rep = _check(bad, np.random.default_rng(2).normal(size=(2, 9, 3)).astype(np.float32))
    assert not rep["passed"]
    assert "state 'first/h_out' (layer first, h) after chunk 1" in _failures(rep)
    assert "c and h are swapped" in _failures(rep)


def test_state_wired_to_wrong_layer_is_named(stack: tuple[Any, Any]) -> None:
    bad = copy.deepcopy(stack[1])
    _node(bad, "streaming/first/h_out").input[0] = _node(bad, "streaming/second/h_out").input[0]
    rep = _check(bad, np.random.default_rng(3).normal(size=(2, 9, 3)).astype(np.float32))
    assert not rep["passed"]
    assert "holds layer second's h — the state output is wired to the wrong layer" in _failures(rep)


def test_state_not_fed_forward_is_named(stack: tuple[Any, Any]) -> None:
    bad = copy.deepcopy(stack[1])
    lstm = next(n for n in bad.graph.node if n.op_type == "LSTM" and n.name.startswith("second"))
    lstm.input[5] = ""  # the node no longer reads second/h_in: it restarts from zeros each call
    rep = _check(bad, np.random.default_rng(4).normal(size=(2, 9, 3)).astype(np.float32))
    assert not rep["passed"]
    text = _failures(rep)
    assert "state 'second/h_out'" in text and "the state is not fed forward" in text
    assert "'second/h_out' goes back in as 'second/h_in'" in text


def test_verify_reports_streaming(stack: tuple[Any, Any], tmp_path: Path) -> None:
    """verify on a streaming file: the usual comparison with Keras (source framework), and the
    streaming section with per-chunk max |Δ| along each stream."""
    from seqgate.verify.run import verify_model

    model, sm = stack
    src = km.save(model, tmp_path / "pair.keras")
    path = tmp_path / "pair_stream.onnx"
    path.write_bytes(sm.SerializeToString())
    rec = tmp_path / "rec.npz"
    np.savez(rec, x=np.random.default_rng(5).normal(size=(6, 10, 3)).astype(np.float32))
    rep = verify_model(path, str(src), recordings=[rec], chunk=3)
    assert rep.passed, rep.headline()
    st = rep.to_json()["streaming"]
    assert st["compared_with_source"] and st["chunk_sizes"] == [1, 3, 7]
    assert [len(r["per_chunk_max_abs"]) for r in st["runs"]] == [10, 4, 2]
    assert all(len(r["per_chunk_source_max_abs"]) == len(r["per_chunk_max_abs"]) for r in st["runs"])
    assert {t["name"] for t in rep.tensors} >= {"head", "first/forward/hidden_final"}
