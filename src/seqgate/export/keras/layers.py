"""Keras non-recurrent layers → ONNX ops, and the full ``LAYERS`` table.

Each mapping is ``fn(builder, call) -> [one ONNX value per Keras output]``. Equations:

- Dense: ``y = act(x·K + b)`` on the last axis (MatMul broadcasts over leading axes, which is
  also TimeDistributed(Dense)).
- Conv1D (channels_last): transposed to ONNX ``[N, C, T]``, ``W = kernelᵀ(2,1,0)``; ``causal``
  pads ``(K−1)·d`` on the left; ``same`` pads ``(K−1)·d`` split with the extra one at the end
  (TensorFlow's rule; ``SAME_UPPER`` when strides > 1).
- BatchNormalization at inference, as TensorFlow computes it: ``inv = γ/√(var+ε)``,
  ``y = x·inv + (β − mean·inv)``.
- Normalization: ``(x − mean) / max(√var, 1e-7)``; ``invert``: ``mean + x·max(√var, 1e-7)``.
- LayerNormalization: ONNX LayerNormalization over the trailing axes.
- Embedding: Gather of the table rows (ids cast to int64 when they arrive as floats).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.errors import Refusal
from seqgate.export.core.activations import emit_activation
from seqgate.export.core.builder import GraphBuilder
from seqgate.export.keras.activation import keras_activation
from seqgate.export.keras.call import KerasCall
from seqgate.export.keras.masking import emit_masking, mask_of
from seqgate.export.keras.recurrent import RECURRENT_LAYERS

F32 = np.float32
KERAS_EPSILON = 1e-7  # keras.backend.epsilon() default


def _act(b: GraphBuilder, x: str, activation: Any) -> str:
    kind, params = keras_activation(activation)
    return emit_activation(b, kind, x, params)


def _dense(b: GraphBuilder, call: KerasCall) -> list[str]:
    layer = call.layer
    if getattr(layer, "lora_enabled", False):
        raise Refusal("LoRA-enabled Dense", "merge the LoRA weights before export")
    if getattr(layer, "quantization_mode", None):
        raise Refusal(f"quantized Dense ({layer.quantization_mode})")
    y = b.op("MatMul", [call.inputs[0].name, b.const(layer.kernel.numpy().astype(F32), "kernel")])
    if layer.use_bias:
        y = b.op("Add", [y, b.const(layer.bias.numpy().astype(F32), "bias")])
    return [_act(b, y, layer.activation)]


def _time_distributed(b: GraphBuilder, call: KerasCall) -> list[str]:
    """TimeDistributed(inner); a mask is passed on only to an inner layer that takes one
    (keras TimeDistributed.call), and none of the supported inner layers does."""
    inner = call.layer.layer
    cls = type(inner).__name__
    fn = _TIME_DISTRIBUTABLE.get(cls)
    if fn is None:
        raise Refusal(f"TimeDistributed({cls})", "only Dense, Activation and dropout layers")
    if mask_of(call) is not None and getattr(inner, "_call_has_mask_arg", False):
        raise Refusal(f"TimeDistributed({cls}) with a mask", "the inner layer would read the mask")
    sub = KerasCall(inner, call.name, call.inputs, {}, call.outputs, (), call.values, call.table)
    return fn(b, sub)


def _identity(b: GraphBuilder, call: KerasCall) -> list[str]:
    return [call.inputs[0].name]


def _activation_layer(b: GraphBuilder, call: KerasCall) -> list[str]:
    return [_act(b, call.inputs[0].name, call.layer)]


def _flatten(b: GraphBuilder, call: KerasCall) -> list[str]:
    x = call.inputs[0]
    if getattr(call.layer, "data_format", "channels_last") == "channels_first" and x.rank > 2:
        raise Refusal("Flatten with data_format='channels_first'")
    return [b.op("Flatten", [x.name], axis=1)]


def _reshape(b: GraphBuilder, call: KerasCall) -> list[str]:
    target = [int(d) for d in call.layer.target_shape]
    return [b.reshape(call.inputs[0].name, [0, *target])]


def _permute(b: GraphBuilder, call: KerasCall) -> list[str]:
    return [b.transpose(call.inputs[0].name, [0, *[int(d) for d in call.layer.dims]])]


def _repeat_vector(b: GraphBuilder, call: KerasCall) -> list[str]:
    n = int(call.layer.n)
    x = b.unsqueeze(call.inputs[0].name, [1])
    return [b.op("Tile", [x, b.ints([1, n, 1], "repeats")])]


def _concatenate(b: GraphBuilder, call: KerasCall) -> list[str]:
    rank = call.inputs[0].rank
    axis = int(call.layer.axis)
    return [b.op("Concat", [v.name for v in call.inputs], axis=axis % rank)]


def _chain(op: str) -> Any:
    def fn(b: GraphBuilder, call: KerasCall) -> list[str]:
        names = [v.name for v in call.inputs]
        y = names[0]
        for n in names[1:]:
            y = b.op(op, [y, n])
        return [y]

    return fn


def _average(b: GraphBuilder, call: KerasCall) -> list[str]:
    y = _chain("Add")(b, call)[0]
    return [b.op("Div", [y, b.scalar(float(len(call.inputs)), "count")])]


def _conv1d(b: GraphBuilder, call: KerasCall) -> list[str]:
    layer = call.layer
    last = layer.data_format == "channels_last"
    k = int(layer.kernel_size[0])
    s = int(layer.strides[0])
    d = int(layer.dilation_rate[0])
    w = np.transpose(layer.kernel.numpy().astype(F32), (2, 1, 0))
    x = b.transpose(call.inputs[0].name, [0, 2, 1]) if last else call.inputs[0].name
    ins = [x, b.const(w, "kernel")]
    if layer.use_bias:
        ins.append(b.const(layer.bias.numpy().astype(F32), "bias"))
    attrs: dict[str, Any] = {"kernel_shape": [k], "strides": [s], "dilations": [d],
                             "group": int(layer.groups)}
    if layer.padding == "valid":
        attrs["pads"] = [0, 0]
    elif layer.padding == "causal":
        attrs["pads"] = [(k - 1) * d, 0]
    elif layer.padding == "same" and s == 1:
        # explicit pads: onnxruntime refuses auto_pad SAME_* with dilation > 1
        total = (k - 1) * d
        attrs["pads"] = [total // 2, total - total // 2]
    elif layer.padding == "same":
        attrs["auto_pad"] = "SAME_UPPER"  # Keras forbids strides > 1 with dilation > 1
    else:
        raise Refusal(f"padding={layer.padding!r}")
    y = b.op("Conv", ins, **attrs)
    if last:
        y = b.transpose(y, [0, 2, 1])
    return [_act(b, y, layer.activation)]


def _pool(op: str) -> Any:
    def fn(b: GraphBuilder, call: KerasCall) -> list[str]:
        layer = call.layer
        last = layer.data_format == "channels_last"
        p = int(layer.pool_size[0])
        s = int(layer.strides[0]) if layer.strides is not None else p
        x = b.transpose(call.inputs[0].name, [0, 2, 1]) if last else call.inputs[0].name
        attrs: dict[str, Any] = {"kernel_shape": [p], "strides": [s]}
        if layer.padding == "same":
            attrs["auto_pad"] = "SAME_UPPER"
        else:
            attrs["pads"] = [0, 0]
        if op == "AveragePool":
            attrs["count_include_pad"] = 0  # TensorFlow averages over the valid cells only
        y = b.op(op, [x], **attrs)
        return [b.transpose(y, [0, 2, 1]) if last else y]

    return fn


def _global_pool(op: str) -> Any:
    def fn(b: GraphBuilder, call: KerasCall) -> list[str]:
        layer = call.layer
        axis = 1 if layer.data_format == "channels_last" else 2
        mask = mask_of(call)
        if mask is not None:
            return [_masked_average(b, call.inputs[0].name, mask.name, axis, bool(layer.keepdims))]
        return [b.reduce(op, call.inputs[0].name, [axis], keepdims=bool(layer.keepdims))]

    return fn


def _masked_average(b: GraphBuilder, x: str, mask: str, axis: int, keepdims: bool) -> str:
    """keras GlobalAveragePooling1D with a mask: ``Σ_t where(m, x, 0) / Σ_t m`` (0/0 = NaN for a
    window with no valid step, as in Keras)."""
    m = b.unsqueeze(b.op("Cast", [mask], to=9), [2 if axis == 1 else 1])  # TensorProto.BOOL
    kept = b.op("Where", [m, x, b.scalar(0.0, "zero")])
    count = b.reduce("ReduceSum", b.op("Cast", [m], to=1), [axis], keepdims=keepdims)  # FLOAT
    return b.op("Div", [b.reduce("ReduceSum", kept, [axis], keepdims=keepdims), count])


def _layer_norm(b: GraphBuilder, call: KerasCall) -> list[str]:
    layer = call.layer
    x = call.inputs[0]
    if getattr(layer, "rms_scaling", False):
        raise Refusal("rms_scaling=True", "RMS normalization is not supported yet")
    axes = sorted(a % x.rank for a in ([layer.axis] if isinstance(layer.axis, int) else layer.axis))
    if axes != list(range(axes[0], x.rank)):
        raise Refusal(f"axis={layer.axis}", "normalize over trailing axes only")
    norm_shape = [int(x.shape[a]) for a in axes]  # type: ignore[arg-type]
    gamma = layer.gamma.numpy() if layer.scale else np.ones(norm_shape, F32)
    ins = [x.name, b.const(gamma.astype(F32).reshape(norm_shape), "gamma")]
    if layer.center:
        ins.append(b.const(layer.beta.numpy().astype(F32).reshape(norm_shape), "beta"))
    return [b.op("LayerNormalization", ins, axis=axes[0], epsilon=float(layer.epsilon))]


def _broadcast_shape(rank: int, axes: list[int], shape: tuple[int, ...]) -> list[int]:
    out = [1] * rank
    for a, n in zip(axes, shape, strict=True):
        out[a] = n
    return out


def _batch_norm(b: GraphBuilder, call: KerasCall) -> list[str]:
    layer = call.layer
    x = call.inputs[0]
    axis = int(layer.axis) % x.rank
    n = int(x.shape[axis])  # type: ignore[arg-type]
    mean = layer.moving_mean.numpy().astype(F32)
    var = layer.moving_variance.numpy().astype(F32)
    gamma = layer.gamma.numpy().astype(F32) if layer.scale else np.ones(n, F32)
    beta = layer.beta.numpy().astype(F32) if layer.center else np.zeros(n, F32)
    inv = (F32(1.0) / np.sqrt(var + F32(layer.epsilon))).astype(F32) * gamma
    shift = beta - mean * inv
    shape = _broadcast_shape(x.rank, [axis], (n,))
    y = b.op("Mul", [x.name, b.const(inv.reshape(shape), "scale")])
    return [b.op("Add", [y, b.const(shift.astype(F32).reshape(shape), "shift")])]


def _normalization(b: GraphBuilder, call: KerasCall) -> list[str]:
    layer = call.layer
    if layer.mean is None:
        raise Refusal("Normalization layer was never adapted (no mean/variance)")
    mean = np.asarray(layer.mean, F32)
    std = np.maximum(np.sqrt(np.asarray(layer.variance, F32)), F32(KERAS_EPSILON)).astype(F32)
    x = call.inputs[0].name
    if layer.invert:
        return [b.op("Add", [b.const(mean, "mean"), b.op("Mul", [x, b.const(std, "std")])])]
    return [b.op("Div", [b.op("Sub", [x, b.const(mean, "mean")]), b.const(std, "std")])]


def _embedding(b: GraphBuilder, call: KerasCall) -> list[str]:
    """Gather of rows; with ``mask_zero`` Keras records the mask (ids ≠ 0) as its own op node."""
    layer = call.layer
    if getattr(layer, "quantization_mode", None):
        raise Refusal(f"quantized Embedding ({layer.quantization_mode})")
    ids = call.inputs[0]
    idx = ids.name
    if ids.dtype not in ("int32", "int64"):
        idx = b.op("Cast", [idx], to=7)  # TensorProto.INT64
    return [b.op("Gather", [b.const(layer.embeddings.numpy().astype(F32), "embeddings"), idx], axis=0)]


_DROPOUT_LIKE = (
    "Dropout", "SpatialDropout1D", "SpatialDropout2D", "SpatialDropout3D", "GaussianDropout",
    "GaussianNoise", "AlphaDropout", "ActivityRegularization", "Identity",
)

_TIME_DISTRIBUTABLE: dict[str, Any] = {
    "Dense": _dense,
    "Activation": _activation_layer,
    **{k: _identity for k in _DROPOUT_LIKE},
}

LAYERS: dict[str, Any] = {
    **RECURRENT_LAYERS,
    **{k: _identity for k in _DROPOUT_LIKE},
    "Dense": _dense,
    "TimeDistributed": _time_distributed,
    "Activation": _activation_layer,
    "ReLU": _activation_layer,
    "LeakyReLU": _activation_layer,
    "ELU": _activation_layer,
    "Softmax": _activation_layer,
    "Flatten": _flatten,
    "Reshape": _reshape,
    "Permute": _permute,
    "RepeatVector": _repeat_vector,
    "Concatenate": _concatenate,
    "Add": _chain("Add"),
    "Subtract": _chain("Sub"),
    "Multiply": _chain("Mul"),
    "Maximum": _chain("Max"),
    "Minimum": _chain("Min"),
    "Average": _average,
    "Conv1D": _conv1d,
    "MaxPooling1D": _pool("MaxPool"),
    "AveragePooling1D": _pool("AveragePool"),
    "GlobalAveragePooling1D": _global_pool("ReduceMean"),
    "GlobalMaxPooling1D": _global_pool("ReduceMax"),
    "LayerNormalization": _layer_norm,
    "BatchNormalization": _batch_norm,
    "Normalization": _normalization,
    "Embedding": _embedding,
    "Masking": emit_masking,
}
