"""Keras activation objects → seqgate activation kinds (see ``activations``)."""

from __future__ import annotations

from typing import Any

from seqgate.errors import Refusal
from seqgate.export.core.activations import Params

# Keras 3 selu constants (keras.src.activations.activations.selu).
_SELU_ALPHA = 1.6732632423543772848170429916717
_SELU_SCALE = 1.0507009873554804934193349852946

_BY_FUNCTION_NAME: dict[str, tuple[str, Params]] = {
    "linear": ("linear", {}),
    "relu": ("relu", {}),
    "sigmoid": ("sigmoid", {}),
    "tanh": ("tanh", {}),
    "softmax": ("softmax", {"axis": -1}),
    "log_softmax": ("log_softmax", {"axis": -1}),
    "softplus": ("softplus", {}),
    "softsign": ("softsign", {}),
    "elu": ("elu", {"alpha": 1.0}),
    "selu": ("selu", {"alpha": _SELU_ALPHA, "gamma": _SELU_SCALE}),
    # keras.activations.leaky_relu(x, negative_slope=0.2)
    "leaky_relu": ("leaky_relu", {"alpha": 0.2}),
    "exponential": ("exponential", {}),
    "gelu": ("gelu", {"approximate": False}),
    "silu": ("silu", {}),
    "swish": ("silu", {}),
    # Keras 3 hard_sigmoid is relu6(x + 3) / 6 = clip(x/6 + 1/2, 0, 1) (FACTS.md)
    "hard_sigmoid": ("hard_sigmoid", {"alpha": 1.0 / 6.0, "beta": 0.5}),
    "hard_silu": ("hard_silu", {"alpha": 1.0 / 6.0, "beta": 0.5}),
    "hard_swish": ("hard_silu", {"alpha": 1.0 / 6.0, "beta": 0.5}),
    "relu6": ("relu6", {}),
    "mish": ("mish", {}),
    "log_sigmoid": ("log_sigmoid", {}),
    "hard_tanh": ("hard_tanh", {"min": -1.0, "max": 1.0}),
}


def keras_activation(obj: Any) -> tuple[str, Params]:
    """Resolve a Keras activation (function, name or activation layer) to (kind, params)."""
    if obj is None:
        return "linear", {}
    if isinstance(obj, str):
        name = obj
    else:
        cls = type(obj).__name__
        if hasattr(obj, "get_config") and type(obj).__module__.startswith("keras."):
            return _activation_layer(cls, obj)
        if not getattr(obj, "__module__", "").startswith("keras."):
            raise Refusal(f"activation {getattr(obj, '__name__', cls)!r} is not a Keras built-in",
                          "use a built-in Keras activation")
        name = obj.__name__
    if name not in _BY_FUNCTION_NAME:
        raise Refusal(f"activation {name!r} has no exact ONNX form in seqgate")
    kind, params = _BY_FUNCTION_NAME[name]
    return kind, dict(params)


def _activation_layer(cls: str, layer: Any) -> tuple[str, Params]:
    if cls == "LeakyReLU":
        return "leaky_relu", {"alpha": float(layer.negative_slope)}
    if cls == "ELU":
        return "elu", {"alpha": float(layer.alpha)}
    if cls == "ReLU":
        thr = float(getattr(layer, "threshold", 0.0) or 0.0)
        if thr != 0.0:
            raise Refusal(f"ReLU threshold={thr}", "a thresholded ReLU with a slope has no exact op")
        mv = layer.max_value
        return "relu", {"alpha": float(layer.negative_slope or 0.0),
                        "max_value": None if mv is None else float(mv)}
    if cls == "Softmax":
        axis = layer.axis
        if isinstance(axis, list | tuple):
            if len(axis) != 1:
                raise Refusal(f"Softmax over several axes {axis}")
            axis = axis[0]
        return "softmax", {"axis": int(axis)}
    if cls == "Activation":
        return keras_activation(layer.activation)
    raise Refusal(f"activation layer {cls} is not supported as an activation")
