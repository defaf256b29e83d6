"""Test helpers: small Keras models with non-trivial random weights, export and run helpers.

Weights are drawn from a seeded generator (never the initialisers' zeros/ones): kernels and
biases ``N(0, scale²)``, variances ``U(0.5, 2)`` so normalisation layers do real work. Keras
is imported lazily, so importing this module is cheap.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

Array = np.ndarray[Any, Any]

# Issue 2 acceptance rule: |onnx − keras| <= ATOL + RTOL·|keras|, elementwise.
ATOL = 1e-4
RTOL = 1e-4


def keras() -> Any:
    from seqgate.util.frameworks import import_keras

    return import_keras()


def randomize(model: Any, rng: np.random.Generator, scale: float = 0.5) -> Any:
    """Overwrite every float weight of ``model`` with seeded random values; return the model."""
    for w in model.weights:
        if "int" in str(w.dtype):
            continue
        short = w.name.split("/")[-1]
        shape = tuple(w.shape)
        if "variance" in short:
            value = rng.uniform(0.5, 2.0, size=shape)
        elif short == "gamma":
            value = rng.uniform(0.5, 1.5, size=shape)
        else:
            value = rng.normal(0.0, scale, size=shape)
        w.assign(value.astype(str(w.dtype)))
    return model


def recurrent(kind: str, units: int, **opts: Any) -> Any:
    """A Keras SimpleRNN / GRU / LSTM layer (``kind`` "rnn" | "gru" | "lstm")."""
    cls = {"rnn": "SimpleRNN", "gru": "GRU", "lstm": "LSTM"}[kind]
    return getattr(keras().layers, cls)(units, **opts)


def functional(
    inputs: Sequence[tuple[int | None, ...]] | tuple[int | None, ...],
    body: Any,
    rng: np.random.Generator,
    name: str = "model",
    dtypes: Sequence[str] | None = None,
    batch_size: int | None = None,
    scale: float = 0.5,
) -> Any:
    """``keras.Model(inputs, body(*inputs))`` with randomized weights.

    ``inputs`` is one shape (without batch) or a list of shapes; ``body`` maps the input
    tensors to one output or a list of outputs.
    """
    k = keras()
    shapes = [inputs] if inputs and not isinstance(inputs[0], tuple | list) else list(inputs)
    dts = list(dtypes) if dtypes else ["float32"] * len(shapes)
    ins = [k.Input(shape=tuple(s), dtype=dt, batch_size=batch_size, name=f"in_{i}" if len(shapes) > 1 else "x")
           for i, (s, dt) in enumerate(zip(shapes, dts, strict=True))]
    outs = body(*ins)
    model = k.Model(ins if len(ins) > 1 else ins[0], outs, name=name)
    return randomize(model, rng, scale)


def sequential(input_shape: tuple[int | None, ...], layers: list[Any], rng: np.random.Generator,
               name: str = "seq", scale: float = 0.5) -> Any:
    """A Sequential model starting with ``keras.Input(input_shape)``, randomized."""
    k = keras()
    model = k.Sequential([k.Input(shape=input_shape), *layers], name=name)
    return randomize(model, rng, scale)


def keras_outputs(model: Any, feeds: Sequence[Array], compiled: bool = False) -> list[Array]:
    """The Keras model's outputs (inference mode) as NumPy arrays, in output order.

    ``compiled`` runs the call as one ``tf.function`` graph (what ``model.predict`` does): much
    faster for long sequences than the eager step-by-step loop.
    """
    x = list(feeds) if len(feeds) > 1 else feeds[0]
    if compiled:
        import tensorflow as tf

        out = tf.function(lambda v: model(v, training=False))(x)
    else:
        out = model(x, training=False)
    outs = out if isinstance(out, list | tuple) else [out]
    return [np.asarray(o.numpy() if hasattr(o, "numpy") else o) for o in outs]


def export(model: Any, opset: int = 17) -> Any:
    """Export an in-memory Keras model with seqgate (no file); return the ONNX ModelProto."""
    from seqgate.export.keras.walk import export_keras_model

    return export_keras_model(model, opset, {"seqgate.version": "test"})


def session(onnx_model: Any) -> Any:
    """A single-threaded onnxruntime CPU session of ``onnx_model``."""
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.intra_op_num_threads = 1
    so.inter_op_num_threads = 1
    return ort.InferenceSession(onnx_model.SerializeToString(), so, providers=["CPUExecutionProvider"])


def onnx_outputs(onnx_model: Any, feeds: Sequence[Array], names: Sequence[str] | None = None) -> list[Array]:
    """Run the graph with inputs fed in graph-input order; return every output (or ``names``)."""
    s = session(onnx_model)
    inputs = {i.name: f for i, f in zip(s.get_inputs(), feeds, strict=True)}
    return s.run(list(names) if names else None, inputs)


def max_violation(onnx_value: Array, ref: Array, atol: float = ATOL, rtol: float = RTOL) -> float:
    """max(|onnx − ref| − (atol + rtol·|ref|)); ≤ 0 means the acceptance rule holds everywhere."""
    o = np.asarray(onnx_value, np.float64)
    r = np.asarray(ref, np.float64)
    assert o.shape == r.shape, f"shape {o.shape} != {r.shape}"
    return float(np.max(np.abs(o - r) - (atol + rtol * np.abs(r)), initial=-np.inf))


def assert_matches(onnx_vals: Sequence[Array], ref_vals: Sequence[Array], what: str = "",
                   atol: float = ATOL, rtol: float = RTOL) -> float:
    """Assert the acceptance rule for every output pair; return the max absolute difference."""
    assert len(onnx_vals) == len(ref_vals), f"{what}: {len(onnx_vals)} outputs vs {len(ref_vals)}"
    worst = 0.0
    for i, (o, r) in enumerate(zip(onnx_vals, ref_vals, strict=True)):
        v = max_violation(o, r, atol, rtol)
        diff = float(np.max(np.abs(np.asarray(o, np.float64) - np.asarray(r, np.float64)), initial=0.0))
        assert v <= 0.0, f"{what} output {i}: max |Δ| {diff:.3g} exceeds {atol} + {rtol}·|ref|"
        assert np.isfinite(r).all(), f"{what} output {i}: reference has non-finite values"
        worst = max(worst, diff)
    return worst


def check_model(model: Any, feeds: Sequence[Array], what: str = "", opset: int = 17,
                compiled: bool = False) -> float:
    """Export ``model`` in memory, run Keras and onnxruntime on ``feeds``, assert they agree."""
    onnx_model = export(model, opset)
    ref = keras_outputs(model, feeds, compiled)
    return assert_matches(onnx_outputs(onnx_model, feeds), ref, what or model.name)


def inputs_for(model: Any, rng: np.random.Generator, batch: int = 2, time: int = 7) -> list[Array]:
    """Random float inputs (or int ids < 5) for every model input; None dims get batch / time."""
    feeds = []
    for t in model.inputs:
        shape = [batch if i == 0 and d is None else (time if d is None else int(d))
                 for i, d in enumerate(t.shape)]
        if "int" in str(t.dtype):
            feeds.append(rng.integers(0, 5, size=shape).astype(str(t.dtype)))
        else:
            feeds.append(rng.normal(size=shape).astype(np.float32))
    return feeds


def save(model: Any, path: Path) -> Path:
    """Save to ``path`` (.keras or legacy .h5) quietly; return the path."""
    from seqgate.util.frameworks import quiet_stderr

    with quiet_stderr():
        model.save(str(path))
    return path


def leaky_tanh_cell_source(class_name: str, package: str) -> str:
    """Source of a user file defining a custom Keras RNN cell ``h_t = tanh(x_t·K + 0.5·h_{t-1})``
    registered under ``package`` (a cell no recogniser matches, so it exports as a ``Scan``)."""
    return f'''
import keras
from keras import ops


@keras.saving.register_keras_serializable(package="{package}")
class {class_name}(keras.layers.Layer):
    def __init__(self, units, **kw):
        super().__init__(**kw)
        self.units = units
        self.state_size = units

    def build(self, input_shape):
        self.kernel = self.add_weight(shape=(input_shape[-1], self.units), name="kernel")

    def call(self, inputs, states):
        out = ops.tanh(ops.matmul(inputs, self.kernel) + 0.5 * states[0])
        return out, [out]

    def get_config(self):
        return {{**super().get_config(), "units": self.units}}
'''
