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
            seq, last, states = keras_masked_rnn(kind, _weights(model, name), x, mask,
                                                 go_backwards=go_backwards, zero_output_for_mask=zero_output,
                                                 reset_after=bool(opts.get("reset_after", False)))
            if name == "seq":
                km.assert_matches(got[:1 + len(states)], [seq, *states], f"oracle {kind} {pattern}")
            else:
                km.assert_matches([got[offset]], [last], f"oracle last {kind} {pattern}")


def _ids(rng: np.random.Generator, mask: np.ndarray[Any, Any], vocab: int = 12) -> np.ndarray[Any, Any]:
    """Token ids in 1..vocab−1 at valid steps, the padding id 0 at masked ones."""
    return np.where(mask, rng.integers(1, vocab, size=mask.shape), 0).astype(np.int32)


@pytest.mark.parametrize("mode", ["concat", "sum", "mul", "ave", None])
def test_bidirectional_every_merge_mode(mode: str | None) -> None:
    k = km.keras()
    rng = np.random.default_rng(5)

    def body(x: Any) -> list[Any]:
        e = k.layers.Embedding(12, F, mask_zero=True, name="emb")(x)
        seq = k.layers.Bidirectional(k.layers.LSTM(H, return_sequences=True, return_state=True),
                                     merge_mode=mode, name="bi_seq")(e)
        last = k.layers.Bidirectional(k.layers.GRU(H), merge_mode=mode, name="bi_last")(e)
        return [*seq, *(last if isinstance(last, list | tuple) else [last])]

    model = km.functional((None,), body, rng, dtypes=["int32"], name="bi")
    onnx_model = km.export(model)
    emb = np.asarray(model.get_layer("emb").get_weights()[0], np.float64)
    for pattern, mask in mask_patterns(rng, 4, 8).items():
        ids = _ids(rng, mask)
        ref = km.keras_outputs(model, [ids])
        got = km.onnx_outputs(onnx_model, [ids])
        km.assert_matches(got, ref, f"bidirectional {mode} {pattern}")
        if mode != "concat":
            continue
        # Keras docs: Bidirectional returning sequences zeroes masked outputs in both directions;
        # the backward layer runs go_backwards and its sequence is flipped back to input order.
        bi = model.get_layer("bi_seq")
        x = emb[ids]
        f_seq, _, f_states = keras_masked_rnn("lstm", [np.asarray(w) for w in bi.forward_layer.get_weights()],
                                              x, mask, zero_output_for_mask=True)
        b_seq, _, b_states = keras_masked_rnn("lstm", [np.asarray(w) for w in bi.backward_layer.get_weights()],
                                              x, mask, go_backwards=True, zero_output_for_mask=True)
        expected = [np.concatenate([f_seq, b_seq[:, ::-1]], axis=-1), *f_states, *b_states]
        km.assert_matches(got[:5], expected, f"oracle bidirectional {pattern}")


def test_stack_time_distributed_and_masked_average_pooling() -> None:
    k = km.keras()
    rng = np.random.default_rng(8)
    model = km.sequential((None, F), [
        k.layers.Masking(0.0), k.layers.LSTM(H, return_sequences=True), k.layers.GRU(H, return_sequences=True),
        k.layers.TimeDistributed(k.layers.Dense(2)), k.layers.GlobalAveragePooling1D(),
    ], rng)
    onnx_model = km.export(model)
    for pattern, mask in mask_patterns(rng, 4, 10).items():
        x = _masked_input(rng, mask)
        ref = km.keras_outputs(model, [x])[0]
        got = km.onnx_outputs(onnx_model, [x])[0]
        empty = ~mask.any(axis=1)
        # keras GlobalAveragePooling1D: Σ masked / Σ mask → 0/0 = NaN for a window without valid
        # steps (IEEE 754: 0/0 is NaN), in Keras and in the export alike
        assert np.isnan(ref[empty]).all() and np.isnan(got[empty]).all()
        km.assert_matches([got[~empty]], [ref[~empty]], f"stack {pattern}")


def test_masking_layer_output_and_nonzero_mask_value() -> None:
    """keras Masking.call: ``where(any(x != v, -1), x, 0)``; the mask value need not be 0."""
    k = km.keras()
    rng = np.random.default_rng(3)

    def body(x: Any) -> list[Any]:
        seq = k.layers.SimpleRNN(H, return_sequences=True)(k.layers.Masking(-1.0)(x))
        return [k.layers.Masking(-1.0)(x), seq]

    model = km.functional((None, F), body, rng, name="mv")
    mask = mask_patterns(rng, 3, 6)["holes"]
    x = np.where(mask[..., None], rng.normal(size=(3, 6, F)), -1.0).astype(np.float32)
    x[0, 0, 0] = -1.0  # one feature equal to the mask value: the step stays valid (any, not all)
    ref = km.keras_outputs(model, [x])
    got = km.onnx_outputs(km.export(model), [x])
    km.assert_matches(got, ref, "masking -1")
    assert (got[0][~mask] == 0).all()  # masked steps are zeroed (hand-worked from Masking.call)


def test_initial_state_with_explicit_mask() -> None:
    """A row without valid steps keeps the initial state (Keras: states are carried)."""
    k = km.keras()
    rng = np.random.default_rng(4)
    x_in = k.Input((None, F), name="x")
    h_in, c_in = k.Input((H,), name="h"), k.Input((H,), name="c")
    masked = k.layers.Masking(0.0)(x_in)
    outs = k.layers.LSTM(H, return_sequences=True, return_state=True, name="seq")(
        masked, initial_state=[h_in, c_in], mask=masked._keras_mask)
    model = km.randomize(k.Model([x_in, h_in, c_in], outs), rng)
    for pattern, mask in mask_patterns(rng, 4, 7).items():
        feeds = [_masked_input(rng, mask), *(rng.normal(size=(4, H)).astype(np.float32) for _ in range(2))]
        ref = km.keras_outputs(model, feeds)
        got = km.onnx_outputs(km.export(model), feeds)
        km.assert_matches(got, ref, f"initial state {pattern}")
        seq, _, states = keras_masked_rnn("lstm", _weights(model, "seq"), feeds[0], mask, feeds[1], feeds[2])
        km.assert_matches(got, [seq, *states], f"oracle initial state {pattern}")  # Keras RNN docs


@pytest.mark.parametrize("batch", [1, 3])
def test_long_holey_sequences(batch: int) -> None:
    """T = 1000, batch 1 and 3, holes: the export, Keras (compiled) and the oracle agree."""
    rng = np.random.default_rng(21)
    model = _two_branch_model("gru", rng)
    mask = rng.random((batch, 1000)) < 0.7
    mask[0, -50:] = False  # trailing padding too
    x = _masked_input(rng, mask)
    ref = km.keras_outputs(model, [x], compiled=True)
    got = km.onnx_outputs(km.export(model), [x])
    km.assert_matches(got, ref, f"T=1000 batch {batch}")
    # reset_after=True: the Keras GRU default
    seq, _, states = keras_masked_rnn("gru", _weights(model, "seq"), x, mask, reset_after=True)
    km.assert_matches(got[:2], [seq, states[0]], "oracle T=1000")


def test_layer_that_would_ignore_a_mask_is_refused() -> None:
    from seqgate.errors import Refusal
    from seqgate.export.core.builder import Value
    from seqgate.export.keras.call import KerasCall
    from seqgate.export.keras.masking import refuse_unhandled_mask

    marker = object()
    call = KerasCall(layer=None, name="attn", inputs=[], kwargs={"mask": marker}, outputs=[],
                     values={id(marker): Value("m", (None, None), "bool")})
    with pytest.raises(Refusal, match="cannot apply a mask"):
        refuse_unhandled_mask("Attention", call)
    refuse_unhandled_mask("LSTM", call)  # a consumer seqgate reproduces: no refusal
