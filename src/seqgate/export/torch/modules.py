"""``torch.nn`` modules → ONNX ops: the ``MODULES`` table. Imported only once torch is loaded.

Each mapping is ``fn(builder, call) -> raw result`` (ONNX value names in the structure the
module returns; ``None`` for parts nobody reads). Equations:

- RNN/GRU/LSTM: one native ONNX node per stacked layer k (layout 0, time-major; an LSTM with
  ``proj_size > 0`` is one Scan per layer and direction instead, ``projected``):
  ``X_0 = x`` (transposed to ``[T, N, I]`` when ``batch_first``), ``Y_k [T, D, N, H]``,
  ``X_{k+1} = reshape(transpose(Y_k, (0, 2, 1, 3)), [T, N, D·H])``; the output is ``X_L``
  (transposed back when ``batch_first``); ``h_n = concat_k(Y_h,k)`` along axis 0, i.e.
  ``[L·D, N, H]`` ordered l0-fwd, l0-bwd, l1-fwd, … (``c_n`` likewise); a given ``h0`` is
  sliced ``h0[k·D:(k+1)·D]`` for layer k. Weights: ``recurrent.torch_weights`` (gate order
  i,f,g,o → i,o,f,c; r,z,n → z,r,h; GRU ``linear_before_reset=1``). Inter-layer dropout is
  inert in eval mode.
- Linear: ``y = x·Wᵀ + b``.  Embedding: ``Gather(weight, ids)``.
- Conv1d ``[N, C, L]``: ONNX Conv with explicit pads; ``padding='same'`` pads
  ``d·(k−1)`` in total, ``⌊total/2⌋`` on the left and the rest on the right.
- LayerNorm: ONNX LayerNormalization over the last ``len(normalized_shape)`` axes
  (biased variance, as torch).  BatchNorm1d (eval): ONNX BatchNormalization with the running
  mean/variance: ``y = (x − μ)/√(σ² + ε)·γ + β``.
- MaxPool1d/AvgPool1d (``ceil_mode=False``): ONNX MaxPool/AveragePool with the same pads,
  ``count_include_pad`` as given; AdaptiveAvg/MaxPool1d(1): a mean/max over the length axis.
- Dropout modules and Identity: the input.  Flatten: reshape (``torch_shapes.flatten``).
- Activation modules: ``torch_functions.activation`` (Softplus with its beta and threshold).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import nn

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder
from seqgate.export.core.recurrent import CellActivation, Packed, stack_directions, torch_weights
from seqgate.export.core.rnn_nodes import ProbeSlot, RecurrentCall, emit_recurrent, register_probe_slots
from seqgate.export.torch.functions import activation
from seqgate.export.torch.projected import projected_lstm
from seqgate.export.torch.shapes import flatten
from seqgate.export.torch.subclassed import is_base_forward, recurrent_base, recurrent_base_forward
from seqgate.export.torch.values import TV, Table, TorchCall, bind, want_tensor

F32 = np.float32
_KIND = {nn.LSTM: "lstm", nn.GRU: "gru", nn.RNN: "rnn"}
_TYPE = {"lstm": "LSTM", "gru": "GRU", "rnn": "RNN"}


def _args(call: TorchCall) -> dict[str, Any]:
    m = call.module
    a = bind(type(m).forward, (m, *call.args), call.kwargs, f"{type(m).__name__}.forward")
    a.pop("self", None)
    return a


def _np(t: torch.Tensor) -> np.ndarray[Any, Any]:
    return t.detach().cpu().numpy().astype(F32)


# ----- recurrent ----------------------------------------------------------------------------
def _pack_layer(m: nn.RNNBase, kind: str, k: int) -> Packed:
    parts = []
    for sfx in ("", "_reverse")[: 2 if m.bidirectional else 1]:
        w_ih, w_hh = getattr(m, f"weight_ih_l{k}{sfx}"), getattr(m, f"weight_hh_l{k}{sfx}")
        b_ih = getattr(m, f"bias_ih_l{k}{sfx}") if m.bias else None
        b_hh = getattr(m, f"bias_hh_l{k}{sfx}") if m.bias else None
        parts.append(torch_weights(kind, _np(w_ih), _np(w_hh),
                                   None if b_ih is None else _np(b_ih), None if b_hh is None else _np(b_hh)))
    return stack_directions(parts)


def _slots(m: nn.RNNBase, kind: str) -> list[CellActivation]:
    if kind == "lstm":
        one = [CellActivation("Sigmoid"), CellActivation("Tanh"), CellActivation("Tanh")]
    elif kind == "gru":
        one = [CellActivation("Sigmoid"), CellActivation("Tanh")]
    else:
        one = [CellActivation("Relu" if m.nonlinearity == "relu" else "Tanh")]
    return one * (2 if m.bidirectional else 1)


def _states(m: nn.RNNBase, kind: str, hx: Any) -> tuple[TV | None, TV | None]:
    if hx is None:
        return None, None
    if kind == "lstm":
        if not isinstance(hx, tuple | list) or len(hx) != 2:
            raise Refusal("LSTM initial state is not a (h0, c0) pair")
        return want_tensor(hx[0], "h0"), want_tensor(hx[1], "c0")
    return want_tensor(hx, "h0"), None


def _check_rnn(m: nn.RNNBase, x: TV, states: tuple[TV | None, TV | None]) -> None:
    if x.rank != 3:
        raise Refusal(f"input of rank {x.rank}",
                      "pass a batched 3-D input ([batch, time, features] or [time, batch, features])")
    for s in states:
        if s is not None and s.rank != 3:
            raise Refusal(f"initial state of rank {s.rank}", "pass batched states [L·D, batch, H]")


def recurrent_module(b: GraphBuilder, call: TorchCall) -> Any:
    """An RNN/GRU/LSTM call (module docstring); for a subclass with its own ``forward``, the call
    of the base class's ``forward`` (``subclassed``), whose arguments bind to the base's."""
    m = call.module
    base = next(c for c in type(m).__mro__ if c in _KIND)
    kind = _KIND[base]
    a = bind(base.forward, (m, *call.args), call.kwargs, f"{type(m).__name__}.forward")
    a.pop("self", None)
    from seqgate.export.torch.packing import PackedV

    packed = a["input"] if isinstance(a["input"], PackedV) else None
    x = want_tensor(a["input"], "input") if packed is None else TV(packed.data_tnf, (None, None, m.input_size))
    h0, c0 = _states(m, kind, a.get("hx"))
    _check_rnn(m, x, (h0, c0))
    d, n_layers, hidden = (2 if m.bidirectional else 1), int(m.num_layers), int(m.hidden_size)
    need_y, need_h, need_c = call.uses(0), call.uses(1, 0) if kind == "lstm" else call.uses(1), call.uses(1, 1)
    if packed is not None:  # packing.py: time-major data, per-row lengths; finals always named for probes
        need_h = need_c = True
        inp = packed.data_tnf
    else:
        inp = b.transpose(x.name, [1, 0, 2]) if m.batch_first else x.name
    hs: list[str] = []
    cs: list[str] = []
    prefix = call.name if call.call_index == 0 else f"{call.name}/call{call.call_index}"
    if getattr(m, "proj_size", 0):
        if packed is not None:
            raise Refusal(f"proj_size={m.proj_size} on a packed sequence",
                          "pass the padded tensor (a projected LSTM is exported as a Scan, without lengths)")
        y, h, c = projected_lstm(b, m, inp, h0, c0, prefix, _source(call, base))
        return ((b.transpose(y, [1, 0, 2]) if m.batch_first else y) if need_y else None, (h, c))
    for k in range(n_layers):
        last = k == n_layers - 1
        rc = RecurrentCall(
            kind=kind, hidden=hidden, direction="bidirectional" if d == 2 else "forward",
            packed=_pack_layer(m, kind, k), activations=_slots(m, kind), layer=call.name,
            stack_index=k, probe_prefix=f"{prefix}/l{k}",
            source={**_source(call, base), "layer_index": k},
        )
        ih = _layer_slice(b, h0, k, d, n_layers)
        ic = _layer_slice(b, c0, k, d, n_layers)
        out = emit_recurrent(b, rc, inp, ih, ic, need_y=need_y or not last, need_h=need_h,
                             need_c=need_c and kind == "lstm",
                             sequence_lens=packed.lengths_i32 if packed else "", probes=packed is None)
        if packed is not None:
            _final_probes(b, rc, out, d)
        hs.append(out.y_h)
        cs.append(out.y_c)
        if need_y or not last:
            inp = b.squeeze(out.y, [1]) if d == 1 else b.reshape(b.transpose(out.y, [0, 2, 1, 3]), [0, 0, -1])
    y = (b.transpose(inp, [1, 0, 2]) if m.batch_first else inp) if need_y else None
    if packed is not None and need_y:
        y = PackedV(inp, packed.lengths_i32, packed.lengths_i64)  # type: ignore[assignment]
    h = _concat(b, hs) if need_h else None
    if kind != "lstm":
        return (y, h)
    return (y, (h, _concat(b, cs) if need_c else None))


def _source(call: TorchCall, base: type) -> dict[str, Any]:
    """What the probes of a recurrent call record about their module (the runner reads it)."""
    m = call.module
    return {"framework": "torch", "module": call.name, "module_type": _TYPE[_KIND[base]],
            "num_layers": int(m.num_layers), "bidirectional": bool(m.bidirectional),
            "batch_first": bool(m.batch_first), "call_index": call.call_index,
            **({"base_forward": True} if type(m).forward is not base.forward else {})}


def _final_probes(b: GraphBuilder, rc: RecurrentCall, out: Any, d: int) -> None:
    """Probes of a layer run on a packed input: the final states only (its Y is zero after each
    row's length, where PyTorch's packed output has no value to compare)."""
    slots = []
    for k in range(d):
        one = {"hidden_final": ProbeSlot(out.node, 1, out.y_h, "DNH", k)}
        if out.y_c:
            one["cell_final"] = ProbeSlot(out.node, 2, out.y_c, "DNH", k)
        slots.append(one)
    register_probe_slots(b, rc, slots)


def _layer_slice(b: GraphBuilder, s: TV | None, k: int, d: int, n_layers: int) -> str:
    if s is None:
        return ""
    if n_layers == 1:
        return s.name
    return b.slice(s.name, [k * d], [(k + 1) * d], [0])


def _concat(b: GraphBuilder, parts: list[str]) -> str:
    return parts[0] if len(parts) == 1 else b.op("Concat", parts, axis=0)


def base_forward_call(b: GraphBuilder, call: TorchCall) -> Any:
    """``recurrent_base_forward(module, ...)`` (``subclassed``): the base layer's call, counted per module."""
    m = call.args[0] if call.args else None
    if recurrent_base(m) is None:
        raise Refusal("recurrent_base_forward of something that is not a recurrent module")
    target = str(call.node.args[0].target)
    index = 0
    for n in call.node.graph.nodes:  # earlier base calls of the same module
        if n is call.node:
            break
        if is_base_forward(n) and str(n.args[0].target) == target:
            index += 1
    inner = TorchCall(call.node, target, tuple(call.args[1:]), call.kwargs, call.meta, m, call.used,
                      index, type(m).__name__, call.capture)
    with b.layer(target, type(m).__name__):  # named after the module, as a leaf call would be
        return recurrent_module(b, inner)


BASE_CALLS = Table()  # merged in registry.py
BASE_CALLS.functions[recurrent_base_forward] = base_forward_call


# ----- other modules --------------------------------------------------------------------------
def _linear(b: GraphBuilder, call: TorchCall) -> str:
    m = call.module
    x = want_tensor(_args(call)["input"], "input")
    y = b.op("MatMul", [x.name, b.const(np.ascontiguousarray(_np(m.weight).T), "weight")])
    if m.bias is not None:
        y = b.op("Add", [y, b.const(_np(m.bias), "bias")])
    return y


def _embedding(b: GraphBuilder, call: TorchCall) -> str:
    m = call.module
    if m.max_norm is not None:
        raise Refusal(f"max_norm={m.max_norm}", "max_norm rescales the table during forward; "
                      "renormalise the weights once and export with max_norm=None")
    ids = want_tensor(_args(call)["input"], "input")
    if ids.dtype not in ("int64", "int32"):
        raise Refusal(f"ids of dtype {ids.dtype}", "pass integer token ids")
    return b.op("Gather", [b.const(_np(m.weight), "weight"), ids.name], axis=0)


def _conv1d(b: GraphBuilder, call: TorchCall) -> str:
    m = call.module
    x = want_tensor(_args(call)["input"], "input")
    if x.rank != 3:
        raise Refusal(f"input of rank {x.rank}", "pass a batched [batch, channels, length] input")
    if m.padding_mode != "zeros":
        raise Refusal(f"padding_mode={m.padding_mode!r}", "only zero padding is supported")
    k, s, dil = int(m.kernel_size[0]), int(m.stride[0]), int(m.dilation[0])
    if m.padding == "same":
        total = dil * (k - 1)
        pads = [total // 2, total - total // 2]
    elif m.padding == "valid":
        pads = [0, 0]
    else:
        p = int(m.padding[0])
        pads = [p, p]
    ins = [x.name, b.const(_np(m.weight), "weight")]
    if m.bias is not None:
        ins.append(b.const(_np(m.bias), "bias"))
    return b.op("Conv", ins, kernel_shape=[k], strides=[s], dilations=[dil], group=int(m.groups), pads=pads)


def _layer_norm(b: GraphBuilder, call: TorchCall) -> str:
    m = call.module
    x = want_tensor(_args(call)["input"], "input")
    shape = [int(d) for d in m.normalized_shape]
    weight = _np(m.weight) if m.weight is not None else np.ones(shape, F32)
    ins = [x.name, b.const(weight, "weight")]
    if m.bias is not None:
        ins.append(b.const(_np(m.bias), "bias"))
    return b.op("LayerNormalization", ins, axis=-len(shape), epsilon=float(m.eps))


def _batch_norm(b: GraphBuilder, call: TorchCall) -> str:
    m = call.module
    x = want_tensor(_args(call)["input"], "input")
    if m.running_mean is None or m.running_var is None:
        raise Refusal("track_running_stats=False",
                      "without running statistics eval() normalises with the batch's own statistics")
    if x.rank not in (2, 3):
        raise Refusal(f"input of rank {x.rank}", "BatchNorm1d takes [N, C] or [N, C, L]")
    c = int(m.num_features)
    gamma = _np(m.weight) if m.weight is not None else np.ones(c, F32)
    beta = _np(m.bias) if m.bias is not None else np.zeros(c, F32)
    ins = [x.name, b.const(gamma, "weight"), b.const(beta, "bias"),
           b.const(_np(m.running_mean), "running_mean"), b.const(_np(m.running_var), "running_var")]
    return b.op("BatchNormalization", ins, epsilon=float(m.eps))


def _pool(op: str) -> Any:
    """MaxPool1d / AvgPool1d on ``[N, C, L]`` (floor mode; -inf padding for max, as torch)."""

    def fn(b: GraphBuilder, call: TorchCall) -> str:
        m = call.module
        x = want_tensor(_args(call)["input"], "input")
        if x.rank != 3:
            raise Refusal(f"input of rank {x.rank}", "pass a batched [batch, channels, length] input")
        if m.ceil_mode:
            raise Refusal("ceil_mode=True", "use ceil_mode=False (or pad the input explicitly)")
        one = lambda v: int(v[0] if isinstance(v, tuple | list) else v)  # noqa: E731
        k, s, p = one(m.kernel_size), one(m.stride if m.stride is not None else m.kernel_size), one(m.padding)
        attrs: dict[str, Any] = {"kernel_shape": [k], "strides": [s], "pads": [p, p]}
        if op == "MaxPool":
            if m.return_indices:
                raise Refusal("return_indices=True")
            attrs["dilations"] = [one(m.dilation)]
        else:
            attrs["count_include_pad"] = int(m.count_include_pad)
        return b.op(op, [x.name], **attrs)

    return fn


def _adaptive_pool(op: str) -> Any:
    """AdaptiveAvg/MaxPool1d with output size 1: a reduction over the length axis."""

    def fn(b: GraphBuilder, call: TorchCall) -> str:
        m = call.module
        x = want_tensor(_args(call)["input"], "input")
        size = m.output_size[0] if isinstance(m.output_size, tuple | list) else m.output_size
        if size != 1 or x.rank != 3:
            raise Refusal(f"output_size={m.output_size} on a rank-{x.rank} input",
                          "only output_size=1 on [batch, channels, length] is supported")
        return b.reduce(op, x.name, [2], keepdims=True)

    return fn


def _identity(b: GraphBuilder, call: TorchCall) -> Any:
    return call.args[0] if call.args else next(iter(call.kwargs.values()))


def _flatten_module(b: GraphBuilder, call: TorchCall) -> str:
    m = call.module
    return flatten(b, want_tensor(_args(call)["input"], "input"), int(m.start_dim), int(m.end_dim))


def _act(kind: str, params: Any = None) -> Any:
    """A mapping for an activation module; ``params(m)`` reads its options."""

    def fn(b: GraphBuilder, call: TorchCall) -> str:
        x = want_tensor(_args(call)["input"], "input")
        return activation(b, kind, x, params(call.module) if params else {})

    return fn


_SELU = {"alpha": 1.6732632423543772848170429916717, "gamma": 1.0507009873554804934193349852946}

MODULES: dict[type, Any] = {
    nn.LSTM: recurrent_module, nn.GRU: recurrent_module, nn.RNN: recurrent_module,
    nn.Linear: _linear, nn.Embedding: _embedding, nn.Conv1d: _conv1d,
    nn.LayerNorm: _layer_norm, nn.BatchNorm1d: _batch_norm,
    nn.Dropout: _identity, nn.Dropout1d: _identity, nn.Dropout2d: _identity, nn.Dropout3d: _identity,
    nn.AlphaDropout: _identity, nn.FeatureAlphaDropout: _identity, nn.Identity: _identity,
    nn.Flatten: _flatten_module,
    nn.MaxPool1d: _pool("MaxPool"), nn.AvgPool1d: _pool("AveragePool"),
    nn.AdaptiveAvgPool1d: _adaptive_pool("ReduceMean"), nn.AdaptiveMaxPool1d: _adaptive_pool("ReduceMax"),
    nn.ReLU: _act("relu"), nn.ReLU6: _act("relu6"), nn.Tanh: _act("tanh"), nn.Sigmoid: _act("sigmoid"),
    nn.GELU: _act("gelu", lambda m: {"approximate": m.approximate}),
    nn.SiLU: _act("silu"), nn.Mish: _act("mish"), nn.Softsign: _act("softsign"),
    nn.ELU: _act("elu", lambda m: {"alpha": m.alpha}),
    nn.SELU: _act("selu", lambda m: dict(_SELU)),
    nn.LeakyReLU: _act("leaky_relu", lambda m: {"alpha": m.negative_slope}),
    nn.Softplus: _act("softplus", lambda m: {"beta": m.beta, "threshold": m.threshold}),
    nn.Softmax: _act("softmax", lambda m: {"dim": m.dim}),
    nn.LogSoftmax: _act("log_softmax", lambda m: {"dim": m.dim}),
    nn.Hardtanh: _act("hard_tanh", lambda m: {"min": m.min_val, "max": m.max_val}),
    nn.Hardsigmoid: _act("hard_sigmoid"), nn.Hardswish: _act("hard_silu"),
    nn.LogSigmoid: _act("log_sigmoid"),
}


def module_mapping(m: Any) -> Any:
    """The mapping for ``m``: by its class, or by a supported base class whose ``forward`` it keeps."""
    cls = type(m)
    fn = MODULES.get(cls)
    if fn is not None:
        return fn
    for base in cls.__mro__[1:]:
        if base in MODULES and cls.forward is base.forward:
            return MODULES[base]
    from seqgate.export.torch.cells import cell_mapping

    return cell_mapping(m)
