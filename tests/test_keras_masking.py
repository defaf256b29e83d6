"""Keras masking exported exactly for every mask pattern: right padding, left padding, holes.

Three independent computations agree on each pattern: Keras itself, the NumPy oracle of
``masked_reference`` (written from the Keras documentation of masking and of ``RNN``), and
the exported graph in onnxruntime. Tolerance: ``keras_models.ATOL/RTOL`` (float32 vs float64,
FACTS.md: ~2e-7 measured for these sizes).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

import keras_models as km
from masked_reference import keras_masked_rnn, mask_patterns

KINDS = ["rnn", "gru", "lstm"]
F, H = 3, 4


def _masked_input(rng: np.random.Generator, mask: np.ndarray[Any, Any]) -> np.ndarray[Any, Any]:
    """Features N(0, 1) away from 0 at valid steps, all 0.0 (the mask value) at masked steps."""
    x = rng.normal(size=(*mask.shape, F)) + np.sign(rng.normal(size=(*mask.shape, F))) * 0.1
    return np.where(mask[..., None], x, 0.0).astype(np.float32)


def _two_branch_model(kind: str, rng: np.random.Generator, **opts: Any) -> Any:
    """Masking → (layer with sequences and states, layer with last output only)."""
    k = km.keras()

    def body(x: Any) -> list[Any]:
        m = k.layers.Masking(0.0)(x)
        seq = km.recurrent(kind, H, return_sequences=True, return_state=True, name="seq", **opts)(m)
        last = km.recurrent(kind, H, name="last", **opts)(m)
        return [*seq, last]

    return km.functional((None, F), body, rng, name=f"masked_{kind}")


def _weights(model: Any, name: str) -> list[np.ndarray[Any, Any]]:
    return [np.asarray(w) for w in model.get_layer(name).get_weights()]


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("go_backwards", [False, True])
@pytest.mark.parametrize("zero_output", [False, True])
def test_masked_layer_matches_keras_and_oracle(kind: str, go_backwards: bool, zero_output: bool) -> None:
    rng = np.random.default_rng(11)
    opts = {"go_backwards": go_backwards, "zero_output_for_mask": zero_output}
    if kind == "gru":
        opts["reset_after"] = bool(go_backwards)  # both GRU forms
    model = _two_branch_model(kind, rng, **opts)
    onnx_model = km.export(model)
    for pattern, mask in mask_patterns(rng, 4, 9).items():
        x = _masked_input(rng, mask)
        ref = km.keras_outputs(model, [x])
        got = km.onnx_outputs(onnx_model, [x])
        km.assert_matches(got, ref, f"{kind} {pattern} {opts}")
        # Keras masking docs (RNN: masked steps skipped; zero_output_for_mask; go_backwards)
        for name, offset in (("seq", 0), ("last", len(ref) - 1)):
            seq, last, states = keras_masked_rnn(kind, _weights(model, name), x, mask, go_backwards=go_backwards,
                                                 zero_output_for_mask=zero_output,
                                                 reset_after=bool(opts.get("reset_after", False)))
            if name == "seq":
                km.assert_matches(got[:1 + len(states)], [seq, *states], f"oracle {kind} {pattern}")
            else:
                km.assert_matches([got[offset]], [last], f"oracle last {kind} {pattern}")
