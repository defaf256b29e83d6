"""Keras non-recurrent layers, model kinds and the ONNX file's structure.

Equivalence: Keras (inference mode) vs onnxruntime on the exported graph, issue 2's rule
``|onnx − keras| <= 1e-4 + 1e-4·|keras|``. Structure: checked with onnx's own checker and by
reading the file, never by asking seqgate what it wrote.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest

import keras_models as km

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")

DENSE_ACTIVATIONS = [
    "linear", "relu", "sigmoid", "tanh", "softmax", "log_softmax", "gelu", "silu", "swish", "elu", "selu",
    "softplus", "softsign", "exponential", "hard_sigmoid", "hard_silu", "hard_swish", "relu6",
    "leaky_relu", "mish", "log_sigmoid", "hard_tanh",
]


@pytest.mark.parametrize("act", DENSE_ACTIVATIONS)
def test_dense_activation(act: str, rng: np.random.Generator) -> None:
    k = km.keras()
    model = km.functional((5,), lambda x: k.layers.Dense(6, activation=act)(x), rng, scale=1.0)
    feeds = [rng.normal(0, 2.0, size=(3, 5)).astype(np.float32)]
    km.check_model(model, feeds, f"Dense({act})")


def test_unexact_activation_is_refused(rng: np.random.Generator) -> None:
    from seqgate.errors import UnsupportedModelError

    k = km.keras()
    model = km.functional((5,), lambda x: k.layers.Dense(6, activation="sparsemax")(x), rng)
    with pytest.raises(UnsupportedModelError, match="sparsemax"):
        km.export(model)


def _layer_cases(k: Any) -> dict[str, tuple[tuple[int | None, ...], Any]]:
    L = k.layers
    return {
        "time_distributed_dense": ((None, 4), lambda x: L.TimeDistributed(L.Dense(3, activation="tanh"))(x)),
        "activation_layers": ((None, 4), lambda x: L.Softmax(axis=1)(L.ELU(alpha=0.7)(L.LeakyReLU(0.3)(
            L.ReLU(max_value=1.5, negative_slope=0.1)(L.Activation("gelu")(x)))))),
        "dropout_noise": ((None, 4), lambda x: L.ActivityRegularization(0.1)(L.AlphaDropout(0.3)(
            L.GaussianNoise(0.5)(L.GaussianDropout(0.3)(L.SpatialDropout1D(0.3)(L.Dropout(0.5)(x))))))),
        "flatten_reshape": ((6, 4), lambda x: L.Reshape((3, 8))(L.Flatten()(x))),
        "repeat_permute": ((4,), lambda x: L.Permute((2, 1))(L.RepeatVector(3)(x))),
        "merges": ((None, 4), lambda x: _merges(L, x)),
        "global_pools": ((None, 4), lambda x: [L.GlobalAveragePooling1D()(x), L.GlobalMaxPooling1D()(x),
                                               L.GlobalAveragePooling1D(keepdims=True)(x),
                                               L.GlobalMaxPooling1D(keepdims=True)(x)]),
        "layer_norm": ((None, 4), lambda x: [L.LayerNormalization(epsilon=1e-3)(x),
                                             L.LayerNormalization(center=False, scale=False)(x)]),
        "layer_norm_two_axes": ((5, 4), lambda x: L.LayerNormalization(axis=(1, 2))(x)),
        "batch_norm": ((None, 4), lambda x: L.BatchNormalization(epsilon=1e-2)(x)),
        "batch_norm_no_affine": ((None, 4), lambda x: L.BatchNormalization(center=False, scale=False)(x)),
    }


def _merges(L: Any, x: Any) -> list[Any]:
    a = L.Dense(4)(x)
    b = L.Dense(4)(x)
    c = L.Dense(4)(x)
    return [L.Concatenate()([a, b]), L.Concatenate(axis=1)([a, c]), L.Add()([a, b, c]), L.Subtract()([a, b]),
            L.Multiply()([a, b, c]), L.Average()([a, b, c]), L.Maximum()([a, b, c]), L.Minimum()([a, b])]


LAYER_CASES = ["time_distributed_dense", "activation_layers", "dropout_noise", "flatten_reshape",
               "repeat_permute", "merges", "global_pools", "layer_norm", "layer_norm_two_axes", "batch_norm",
               "batch_norm_no_affine"]


@pytest.mark.parametrize("case", LAYER_CASES)
def test_layer(case: str, rng: np.random.Generator) -> None:
    shape, body = _layer_cases(km.keras())[case]
    model = km.functional(shape, body, rng)
    for batch, time in ((1, 6), (3, 6)):
        km.check_model(model, km.inputs_for(model, rng, batch, time), case)


CONV_CASES = [
    ("valid", 1, 1, 1), ("same", 1, 1, 1), ("causal", 1, 1, 1), ("same", 2, 1, 1), ("valid", 3, 1, 1),
    ("causal", 1, 2, 1), ("same", 1, 3, 1), ("valid", 1, 2, 2), ("same", 2, 1, 2), ("causal", 1, 1, 4),
]


@pytest.mark.parametrize(("padding", "strides", "dilation", "groups"), CONV_CASES)
def test_conv1d(padding: str, strides: int, dilation: int, groups: int, rng: np.random.Generator) -> None:
    k = km.keras()
    conv = k.layers.Conv1D(8, 3, strides=strides, padding=padding, dilation_rate=dilation, groups=groups,
                           activation="relu")
    model = km.functional((None, 4), lambda x: conv(x), rng)
    for time in (9, 10):  # odd and even lengths exercise the SAME padding split
        km.check_model(model, km.inputs_for(model, rng, 2, time), f"Conv1D {padding} s{strides} d{dilation}")


@pytest.mark.parametrize("pool", ["MaxPooling1D", "AveragePooling1D"])
@pytest.mark.parametrize(("padding", "size", "strides"), [("valid", 2, None), ("valid", 3, 2), ("same", 3, 2),
                                                          ("same", 2, 1)])
def test_pooling(pool: str, padding: str, size: int, strides: int | None, rng: np.random.Generator) -> None:
    k = km.keras()
    layer = getattr(k.layers, pool)(pool_size=size, strides=strides, padding=padding)
    model = km.functional((None, 3), lambda x: layer(x), rng)
    for time in (7, 8):
        km.check_model(model, km.inputs_for(model, rng, 2, time), f"{pool} {padding} {size}/{strides}")


@pytest.mark.parametrize("invert", [False, True])
def test_normalization_adapted(invert: bool, rng: np.random.Generator) -> None:
    k = km.keras()
    norm = k.layers.Normalization(axis=-1, invert=invert)
    norm.adapt(rng.normal(3.0, 2.5, size=(200, 4)).astype(np.float32) * np.array([1, 0.1, 10, 1], np.float32))
    inp = k.Input((None, 4), name="x")
    model = k.Model(inp, k.layers.LSTM(3)(norm(inp)))
    km.randomize(model.layers[-1], rng)
    assert float(np.abs(np.asarray(norm.mean) - 3.0).max()) > 0.1  # adapted, not the identity
    km.check_model(model, [rng.normal(3.0, 2.0, size=(2, 5, 4)).astype(np.float32)], "Normalization")


@pytest.mark.parametrize("dtype", ["int32", "float32"])
def test_embedding_ids(dtype: str, rng: np.random.Generator) -> None:
    k = km.keras()
    model = km.functional((None,), lambda x: k.layers.GRU(4)(k.layers.Embedding(7, 5)(x)), rng, dtypes=[dtype])
    ids = rng.integers(0, 7, size=(3, 6)).astype(dtype)
    km.check_model(model, [ids], f"Embedding {dtype} ids")


# ----- model kinds -------------------------------------------------------------------------
def test_multiple_inputs_outputs_and_shared_tensor(rng: np.random.Generator) -> None:
    k = km.keras()
    L = k.layers

    def body(seq: Any, side: Any) -> list[Any]:
        shared = L.LSTM(5, return_sequences=True, name="shared")(seq)  # feeds three layers
        a = L.GRU(3, name="a")(shared)
        b = L.GlobalAveragePooling1D(name="b")(shared)
        c = L.TimeDistributed(L.Dense(2), name="c")(shared)
        merged = L.Concatenate(name="m")([a, b, L.Dense(4, name="side_dense")(side)])
        return [L.Dense(1, activation="sigmoid", name="head")(merged), c]

    model = km.functional([(None, 3), (2,)], body, rng)
    for batch in (1, 4):
        km.check_model(model, km.inputs_for(model, rng, batch, 6), f"multi io batch {batch}")


def test_nested_sequential_as_layer(rng: np.random.Generator) -> None:
    k = km.keras()
    L = k.layers
    encoder = k.Sequential([k.Input((None, 3)), L.LSTM(4, return_sequences=True),
                            L.Dense(4, activation="relu")],
                           name="encoder")
    inp = k.Input((None, 3), name="x")
    model = k.Model(inp, L.SimpleRNN(2)(encoder(inp)), name="outer")
    km.randomize(model, rng)
    onnx_model = km.export(model)
    docs = " ".join(n.doc_string for n in onnx_model.graph.node)
    assert "'encoder/lstm" in docs  # nested layers keep the nested model's name as prefix
    km.assert_matches(km.onnx_outputs(onnx_model, [x := rng.normal(size=(2, 5, 3)).astype(np.float32)]),
                      km.keras_outputs(model, [x]), "nested Sequential")


# ----- through files: .keras and legacy .h5, export_source ------------------------------------
def _stack_model(rng: np.random.Generator) -> Any:
    k = km.keras()
    L = k.layers
    return km.sequential((None, 3), [
        L.Conv1D(4, 3, padding="causal"), L.LSTM(5, return_sequences=True),
        L.Bidirectional(L.GRU(3, return_sequences=True)),
        L.GRU(3, return_sequences=True, activation=L.LeakyReLU(negative_slope=0.3)),  # a layer object
        L.SimpleRNN(4, go_backwards=True),
        L.Dense(3, activation="softmax"),
    ], rng, name="stack")


@pytest.mark.parametrize("suffix", [".keras", ".h5"])
def test_saved_file_round_trip(suffix: str, tmp_path: Path, rng: np.random.Generator) -> None:
    from seqgate.export.run import export_source

    model = _stack_model(rng)
    src = km.save(model, tmp_path / f"m{suffix}")
    res = export_source(str(src), tmp_path / "m.onnx")
    written = onnx.load(str(tmp_path / "m.onnx"))
    x = rng.normal(size=(2, 8, 3)).astype(np.float32)
    km.assert_matches(km.onnx_outputs(written, [x]), km.keras_outputs(model, [x]), f"saved {suffix}")
    meta = {p.key: p.value for p in written.metadata_props}
    assert meta["seqgate.source.sha256"] == hashlib.sha256(src.read_bytes()).hexdigest()
    assert res.probes == len(json.loads(meta["seqgate.probes"]))


@pytest.fixture(scope="module")
def exported(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """One saved Functional model, exported twice, for the structure tests."""
    from seqgate.export.run import export_source

    rng = np.random.default_rng(7)
    k = km.keras()
    L = k.layers

    def body(tokens: Any, feats: Any) -> list[Any]:
        e = L.Embedding(9, 4, name="embed")(tokens)
        y = L.Concatenate(name="cat")([e, feats])
        y, h, c = L.LSTM(5, return_sequences=True, return_state=True, name="lstm")(y)
        z = L.Bidirectional(L.GRU(3), merge_mode="ave", name="bigru")(y)
        return [L.Dense(2, name="logits")(z), h, c]

    model = km.functional([(None,), (None, 2)], body, rng, name="tagger", dtypes=["int32", "float32"])
    d = tmp_path_factory.mktemp("structure")
    src = km.save(model, d / "tagger.keras")
    export_source(str(src), d / "a.onnx")
    export_source(str(src), d / "b.onnx")
    fixed = km.functional((12, 3), lambda x: L.LSTM(4)(x), rng, name="fixed", batch_size=4)
    fsrc = km.save(fixed, d / "fixed.keras")
    export_source(str(fsrc), d / "fixed.onnx")
    return {"model": model, "dir": d, "src": src, "onnx": onnx.load(str(d / "a.onnx")),
            "fixed": onnx.load(str(d / "fixed.onnx"))}


def _dims(vi: onnx.ValueInfoProto) -> list[int | str]:
    return [d.dim_param or d.dim_value for d in vi.type.tensor_type.shape.dim]


def test_io_names_order_and_dims(exported: dict[str, Any]) -> None:
    m, model = exported["onnx"], exported["model"]
    assert [i.name for i in m.graph.input] == [t.name for t in model.inputs] == ["in_0", "in_1"]
    # Keras repeats a layer's name per output; seqgate names a repeat <layer>:<output index>
    assert list(model.output_names) == ["logits", "lstm", "lstm"]
    assert [o.name for o in m.graph.output] == ["logits", "lstm", "lstm:2"]
    # two inputs with unknown lengths get one time dim each (Keras does not say they are equal)
    assert [_dims(i) for i in m.graph.input] == [["batch", "in_0_time"], ["batch", "in_1_time", 2]]
    assert [_dims(o) for o in m.graph.output] == [["batch", 2], ["batch", 5], ["batch", 5]]
    assert m.graph.input[0].type.tensor_type.elem_type == onnx.TensorProto.INT32


def test_fixed_dims_stay_fixed(exported: dict[str, Any]) -> None:
    m = exported["fixed"]
    assert _dims(m.graph.input[0]) == [4, 12, 3]
    assert _dims(m.graph.output[0]) == [4, 4]


def test_checker_and_native_ops(exported: dict[str, Any]) -> None:
    m = exported["onnx"]
    onnx.checker.check_model(m, full_check=True)
    onnx.shape_inference.infer_shapes(m, check_type=True, strict_mode=True)
    ops = [n.op_type for n in m.graph.node]
    assert ops.count("LSTM") == 1 and ops.count("GRU") == 1
    assert not {"Loop", "Scan", "If"} & set(ops)


def test_exports_are_byte_identical(exported: dict[str, Any]) -> None:
    d = exported["dir"]
    assert (d / "a.onnx").read_bytes() == (d / "b.onnx").read_bytes()


def test_doc_strings_name_layers(exported: dict[str, Any]) -> None:
    layer_names = {layer.name for layer in exported["model"].layers}
    for n in exported["onnx"].graph.node:
        named = [name for name in layer_names if f"layer '{name}'" in n.doc_string]
        assert named or n.doc_string.startswith("seqgate glue"), (n.name, n.doc_string)
    recurrent = {n.op_type: n.doc_string for n in exported["onnx"].graph.node if n.op_type in ("LSTM", "GRU")}
    assert "'lstm'" in recurrent["LSTM"] and "'bigru'" in recurrent["GRU"]


def test_metadata(exported: dict[str, Any]) -> None:
    from seqgate import __version__

    meta = {p.key: p.value for p in exported["onnx"].metadata_props}
    assert exported["onnx"].producer_name == "seqgate"
    assert meta["seqgate.version"] == __version__
    assert meta["seqgate.source.framework"] == "keras"
    assert meta["seqgate.source.framework_version"] == km.keras().__version__
    assert meta["seqgate.source.sha256"] == hashlib.sha256(exported["src"].read_bytes()).hexdigest()
    probes = json.loads(meta["seqgate.probes"])
    names = {p["name"] for p in probes}
    assert {"lstm/forward/hidden_sequence", "lstm/forward/hidden_final", "lstm/forward/cell_final",
            "bigru/forward/hidden_final", "bigru/reverse/hidden_sequence"} <= names
    node_names = {n.name for n in exported["onnx"].graph.node}
    assert all(p["node"] in node_names for p in probes)


def test_structure_model_runs(exported: dict[str, Any], rng: np.random.Generator) -> None:
    model = exported["model"]
    feeds = [rng.integers(0, 9, size=(2, 7)).astype(np.int32), rng.normal(size=(2, 7, 2)).astype(np.float32)]
    km.assert_matches(km.onnx_outputs(exported["onnx"], feeds), km.keras_outputs(model, feeds), "tagger")


def test_keras_ops_in_graph_are_refused(rng: np.random.Generator) -> None:
    """A raw keras.ops node (``x * 2.0``) is not a layer: refused by name, not mapped by class name."""
    from seqgate.errors import UnsupportedModelError

    k = km.keras()
    inp = k.Input((None, 3), name="x")
    model = k.Model(inp, k.layers.LSTM(2)(inp * 2.0))
    with pytest.raises(UnsupportedModelError, match=r"Keras operation Multiply \(keras.ops\)"):
        km.export(model)


def test_sequential_without_input_is_bad_input() -> None:
    from seqgate.errors import BadInputError

    k = km.keras()
    model = k.Sequential([k.layers.LSTM(3)], name="no_input")
    with pytest.raises(BadInputError, match="has no Input"):
        km.export(model)
