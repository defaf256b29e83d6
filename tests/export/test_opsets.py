"""Every opset in ``MIN_OPSET..MAX_OPSET`` exports, passes the checker and runs in onnxruntime 1.32.

One model uses every opset-sensitive helper (Squeeze/Unsqueeze, Reduce*, Slice for reversed
time, LayerNormalization) and all three recurrent ops; each opset's graph must match Keras.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import onnx
import pytest

import keras_models as km
from seqgate.export.run import DEFAULT_OPSET, MAX_OPSET, MIN_OPSET, check_opset

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")


@pytest.fixture(scope="module")
def case() -> tuple[Any, list[np.ndarray], list[np.ndarray]]:
    k = km.keras()
    L = k.layers
    rng = np.random.default_rng(11)

    def body(x: Any) -> list[Any]:
        y = L.LayerNormalization()(L.Conv1D(4, 3, padding="same")(x))
        y = L.LSTM(5, return_sequences=True, go_backwards=True)(y)
        y = L.Bidirectional(L.GRU(3, return_sequences=True), merge_mode="ave")(y)
        y = L.Bidirectional(L.SimpleRNN(3, return_sequences=True), merge_mode="mul")(y)
        pooled = L.Concatenate()([L.GlobalMaxPooling1D()(y), L.GlobalAveragePooling1D()(y)])
        last, h_f, _, _, _ = L.Bidirectional(L.LSTM(2, return_state=True), merge_mode="sum")(y)
        return [L.Dense(3, activation="softmax")(L.Concatenate()([pooled, last])), h_f]

    model = km.functional((None, 3), body, rng)
    feeds = km.inputs_for(model, rng, batch=2, time=6)
    return model, feeds, km.keras_outputs(model, feeds)


def test_range_is_sane() -> None:
    assert MIN_OPSET <= DEFAULT_OPSET <= MAX_OPSET
    assert MIN_OPSET >= 17  # LayerNormalization became a native op at opset 17 (ONNX changelog)
    assert MAX_OPSET <= onnx.defs.onnx_opset_version()


@pytest.mark.parametrize("opset", range(MIN_OPSET, MAX_OPSET + 1))
def test_every_opset_exports_and_runs(opset: int, case: tuple[Any, list[np.ndarray], list[np.ndarray]]) -> None:
    model, feeds, want = case
    m = km.export(model, opset)
    assert m.opset_import[0].version == opset
    onnx.checker.check_model(m, full_check=True)
    km.assert_matches(km.onnx_outputs(m, feeds), want, f"opset {opset}")


@pytest.mark.parametrize("opset", [MIN_OPSET - 1, MAX_OPSET + 1, 0, -3])
def test_out_of_range_opset_is_bad_input(opset: int) -> None:
    from seqgate.errors import BadInputError

    with pytest.raises(BadInputError, match=f"--opset {opset} is outside"):
        check_opset(opset)
