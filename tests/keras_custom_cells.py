"""Custom Keras cells (test fixtures), registered with ``keras.saving.register_keras_serializable``.

This file is what a user passes with ``--custom-code``: importing it defines and registers the
classes. The recognised forms follow the published equations; the near misses differ in one
place each. Weights are plain attributes (``self.kernel = self.add_weight(...)``).
"""

from __future__ import annotations

from typing import Any

import keras
from keras import ops

PACKAGE = "seqgate_test_cells"


class _Cell(keras.layers.Layer):
    def __init__(self, units: int, **kw: Any) -> None:
        super().__init__(**kw)
        self.units = units

    def get_config(self) -> dict[str, Any]:
        return {**super().get_config(), "units": self.units}


@keras.saving.register_keras_serializable(package=PACKAGE)
class PeepholeLSTMCell(_Cell):
    """Gers & Schmidhuber (2000): i, f see c_{t−1}, o sees c_t; gates packed i, f, g, o."""

    peep_o_on_new = True

    def __init__(self, units: int, **kw: Any) -> None:
        super().__init__(units, **kw)
        self.state_size = [units, units]
        self.output_size = units

    def build(self, input_shape: Any) -> None:
        u = self.units
        self.kernel = self.add_weight(shape=(input_shape[-1], 4 * u), name="kernel")
        self.recurrent_kernel = self.add_weight(shape=(u, 4 * u), name="recurrent_kernel")
        self.bias = self.add_weight(shape=(4 * u,), name="bias")
        self.p_i = self.add_weight(shape=(u,), name="p_i")
        self.p_f = self.add_weight(shape=(u,), name="p_f")
        self.p_o = self.add_weight(shape=(u,), name="p_o")

    def call(self, inputs: Any, states: Any) -> Any:
        h, c = states
        z = ops.matmul(inputs, self.kernel) + ops.matmul(h, self.recurrent_kernel) + self.bias
        i, f, g, o = ops.split(z, 4, axis=-1)
        i = ops.sigmoid(i + self.p_i * c)
        f = ops.sigmoid(f + self.p_f * c)
        c_new = f * c + i * ops.tanh(g)
        o = ops.sigmoid(o + self.p_o * (c_new if self.peep_o_on_new else c))
        h_new = o * ops.tanh(c_new)
        return h_new, [h_new, c_new]


@keras.saving.register_keras_serializable(package=PACKAGE)
class OldCellPeepholeLSTMCell(PeepholeLSTMCell):
    """Near miss: the output gate's peephole reads c_{t−1}."""

    peep_o_on_new = False


@keras.saving.register_keras_serializable(package=PACKAGE)
class MinimalRNNCell(_Cell):
    """The minimal RNN cell of the Keras RNN guide: output = x·K + h·R (no activation)."""

    def __init__(self, units: int, **kw: Any) -> None:
        super().__init__(units, **kw)
        self.state_size = units

    def build(self, input_shape: Any) -> None:
        self.kernel = self.add_weight(shape=(input_shape[-1], self.units), name="kernel")
        self.recurrent_kernel = self.add_weight(shape=(self.units, self.units), name="recurrent_kernel")

    def call(self, inputs: Any, states: Any) -> Any:
        out = ops.matmul(inputs, self.kernel) + ops.matmul(states[0], self.recurrent_kernel)
        return out, [out]


@keras.saving.register_keras_serializable(package=PACKAGE)
class DenseGRUCell(_Cell):
    """GRU (Cho et al. 2014) written with Dense sublayers; reset applied after the recurrent matmul."""

    def __init__(self, units: int, **kw: Any) -> None:
        super().__init__(units, **kw)
        self.state_size = units
        self.wx = keras.layers.Dense(3 * units, name="wx")
        self.uh = keras.layers.Dense(3 * units, name="uh")

    def build(self, input_shape: Any) -> None:
        self.wx.build(input_shape)
        self.uh.build((None, self.units))

    def call(self, inputs: Any, states: Any) -> Any:
        h = states[0]
        xz, xr, xn = ops.split(self.wx(inputs), 3, axis=-1)
        hz, hr, hn = ops.split(self.uh(h), 3, axis=-1)
        z = ops.sigmoid(xz + hz)
        r = ops.sigmoid(xr + hr)
        n = ops.tanh(xn + r * hn)
        h_new = (1.0 - z) * n + z * h
        return h_new, [h_new]


@keras.saving.register_keras_serializable(package=PACKAGE)
class LayerNormTanhCell(_Cell):
    """Not a native form: h' = tanh(LN(x·K + h·R)) with a LayerNormalization sublayer."""

    def __init__(self, units: int, **kw: Any) -> None:
        super().__init__(units, **kw)
        self.state_size = units
        self.norm = keras.layers.LayerNormalization(name="norm")

    def build(self, input_shape: Any) -> None:
        self.kernel = self.add_weight(shape=(input_shape[-1], self.units), name="kernel")
        self.recurrent_kernel = self.add_weight(shape=(self.units, self.units), name="recurrent_kernel")
        self.norm.build((None, self.units))

    def call(self, inputs: Any, states: Any) -> Any:
        pre = ops.matmul(inputs, self.kernel) + ops.matmul(states[0], self.recurrent_kernel)
        out = ops.tanh(self.norm(pre))
        return out, [out]


@keras.saving.register_keras_serializable(package=PACKAGE)
class SortingCell(_Cell):
    """Cannot be traced into ONNX: uses keras.ops.sort."""

    def __init__(self, units: int, **kw: Any) -> None:
        super().__init__(units, **kw)
        self.state_size = units

    def build(self, input_shape: Any) -> None:
        self.kernel = self.add_weight(shape=(input_shape[-1], self.units), name="kernel")

    def call(self, inputs: Any, states: Any) -> Any:
        out = ops.sort(ops.matmul(inputs, self.kernel) + states[0], axis=-1)
        return out, [out]
