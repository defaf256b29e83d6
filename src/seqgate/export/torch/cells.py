"""Recurrent cells → native ONNX ops: ``nn.LSTMCell``/``GRUCell``/``RNNCell``, one step or a folded loop.

- A :class:`~seqgate.export.torch.loopfold.CellLoop` (a loop over time, proven by ``loopfold``)
  is ONE native node over the dynamic time axis: X ``[N, T, I]`` (axis 1) is transposed to
  ``[T, N, I]``; initial states ``[N, H]`` are unsqueezed to ``[1, N, H]``; Y ``[T, 1, N, H]`` is
  squeezed and stacked on the collector's dim; the last output is ``(Y_h, Y_c)`` squeezed
  (LSTMCell) or ``Y_h`` (GRUCell/RNNCell).
- A single call ``cell(x_t, state)`` outside such a loop (a decoder step) is a one-step native
  node: X = ``x_t`` unsqueezed to ``[1, N, I]``.

Weights: the cells use the layers' gate orders (PyTorch docs: LSTMCell i,f,g,o; GRUCell r,z,n),
so ``recurrent.torch_weights`` packs them (LSTM → i,o,f,c; GRU → z,r,h, ``linear_before_reset=1``).

Probes (the runner reads them from the cell's calls, ``runtimes.torch_cells``): a loop gives
``<cell>/forward/{hidden_sequence,hidden_final[,cell_final]}`` with ``source.cell_calls =
[calls before, calls after]``; an unrolled call i gives ``<cell>/call<i>/forward/…`` finals
with ``source.cell_call = i``.
"""

from __future__ import annotations

from typing import Any

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder
from seqgate.export.core.recurrent import CellActivation, Packed, torch_weights
from seqgate.export.core.rnn_nodes import RecurrentCall, emit_recurrent
from seqgate.export.torch.values import TV, TorchCall, want_tensor

_TYPE = {"lstm": "LSTMCell", "gru": "GRUCell", "rnn": "RNNCell"}


def builtin_kind(cell: Any) -> str | None:
    from torch import nn

    for cls, kind in ((nn.LSTMCell, "lstm"), (nn.GRUCell, "gru"), (nn.RNNCell, "rnn")):
        if isinstance(cell, cls):
            return kind
    return None


def _np(t: Any) -> Any:
    import numpy as np

    return t.detach().cpu().numpy().astype(np.float32)


def pack_cell(cell: Any, kind: str) -> Packed:
    b_ih = _np(cell.bias_ih) if cell.bias_ih is not None else None
    b_hh = _np(cell.bias_hh) if cell.bias_hh is not None else None
    return torch_weights(kind, _np(cell.weight_ih), _np(cell.weight_hh), b_ih, b_hh)


def _slots(cell: Any, kind: str) -> list[CellActivation]:
    if kind == "lstm":
        return [CellActivation("Sigmoid"), CellActivation("Tanh"), CellActivation("Tanh")]
    if kind == "gru":
        return [CellActivation("Sigmoid"), CellActivation("Tanh")]
    return [CellActivation("Relu" if cell.nonlinearity == "relu" else "Tanh")]


def _state(kind: str, hx: Any) -> tuple[TV | None, TV | None]:
    """(h, c) from a built-in cell's ``hx`` argument (None = zeros)."""
    if hx is None:
        return None, None
    if kind == "lstm":
        if not isinstance(hx, tuple | list) or len(hx) != 2:
            raise Refusal("LSTMCell state is not an (h, c) pair")
        return want_tensor(hx[0], "h"), want_tensor(hx[1], "c")
    return want_tensor(hx, "h"), None


def _unsq(b: GraphBuilder, v: TV | None) -> str:
    if v is None:
        return ""
    if v.rank != 2:
        raise Refusal(f"a cell state of rank {v.rank}", "pass batched states [batch, hidden]")
    return b.unsqueeze(v.name, [0])


def _call(cell: Any, kind: str, name: str, prefix: str, source: dict[str, Any],
          direction: str = "forward") -> RecurrentCall:
    return RecurrentCall(kind=kind, hidden=int(cell.hidden_size), direction=direction,
                         packed=pack_cell(cell, kind), activations=_slots(cell, kind), layer=name,
                         probe_prefix=prefix,
                         source={"framework": "torch", "module": name, "module_type": _TYPE[kind], **source})


def cell_step(b: GraphBuilder, call: TorchCall) -> Any:
    """One call of a built-in cell: a one-step native node (module docstring)."""
    cell = call.module
    kind = builtin_kind(cell)
    assert kind is not None
    x = want_tensor(call.args[0] if call.args else call.kwargs.get("input"), "input")
    if x.rank != 2:
        raise Refusal(f"input of rank {x.rank}", "pass a batched [batch, features] step input")
    hx = call.args[1] if len(call.args) > 1 else call.kwargs.get("hx")
    h0, c0 = _state(kind, hx)
    rc = _call(cell, kind, call.name, f"{call.name}/call{call.call_index}", {"cell_call": call.call_index})
    out = emit_recurrent(b, rc, b.unsqueeze(x.name, [0]), _unsq(b, h0), _unsq(b, c0), need_h=True,
                         need_c=kind == "lstm")
    h = b.squeeze(out.y_h, [0])
    return (h, b.squeeze(out.y_c, [0])) if kind == "lstm" else h


def _check_loop_form(m: Any, kind: str) -> None:
    """The carried state must be the cell's own (h, c) / h, and the collected output h."""
    h_path = (0,) if kind == "lstm" else ()
    later = ((("path", (0,)), ("path", (1,))),) if kind == "lstm" else (("path", ()),)
    if m.template["later"] != later:
        raise Refusal(f"the loop passes {_TYPE[kind]} a state other than its own previous output "
                      f"({'(h, c)' if kind == 'lstm' else 'h'})", "pass the previous step's state unchanged")
    if m.seq_path is not None and m.seq_path != h_path:
        raise Refusal("the loop collects the cell state c, not the hidden state h",
                      "collect h; export the cell state per step with a user-written cell")
    if m.seq_path is not None and m.seq_dim not in (0, 1):
        raise Refusal(f"step outputs stacked on dim {m.seq_dim}", "stack on dim 1 ([batch, time, H]) or 0")


def cell_loop(b: GraphBuilder, call: TorchCall) -> Any:
    """A folded loop of a built-in cell: one native node over the time axis (module docstring)."""
    m = call.module
    kind = builtin_kind(m.cell)
    if kind is None:
        from seqgate.export.torch.usercells import user_cell_loop

        return user_cell_loop(b, call)
    _check_loop_form(m, kind)
    x = want_tensor(call.args[0], "input")
    if x.rank != 3:
        raise Refusal(f"input of rank {x.rank}", "loop over a [batch, time, features] tensor")
    init = [want_tensor(a, "initial state") if a is not None else None for a in call.args[1:]]
    from seqgate.export.torch.loopfold import fill_dims

    hx = fill_dims(m.template["first"], init, None)
    h0, c0 = _state(kind, hx[0] if hx else None)
    # a loop from the last step to the first is ONNX's reverse direction (Y stays in time order);
    # the source's calls then run in reverse time order, which the probe's source records
    reverse = bool(getattr(m, "reverse", False))
    rc = _call(m.cell, kind, m.cell_name, m.cell_name,
               {"cell_calls": list(m.calls), **({"calls_reversed": True} if reverse else {})},
               "reverse" if reverse else "forward")
    xt = b.transpose(x.name, [1, 0, 2]) if m.axis == 1 else x.name
    need_y = call.uses(0)
    out = emit_recurrent(b, rc, xt, _unsq(b, h0), _unsq(b, c0), need_y=need_y, need_h=True,
                         need_c=kind == "lstm")
    seq = None
    if need_y:
        y = b.squeeze(out.y, [1])  # [T, N, H], time order
        if reverse != bool(getattr(m, "flipped", False)):  # collected in the loop's call order
            y = b.reverse_time(y, 0)
        seq = b.transpose(y, [1, 0, 2]) if m.seq_dim == 1 else y
    h = b.squeeze(out.y_h, [0])
    last = (h, b.squeeze(out.y_c, [0])) if kind == "lstm" else h
    return (seq, last)


def cell_mapping(m: Any) -> Any:
    """The mapping for a built-in cell (whose ``forward`` is the library's) or a folded loop."""
    from torch import nn

    from seqgate.export.torch.loopfold import cell_loop_class

    if isinstance(m, cell_loop_class()):
        return cell_loop
    for cls in (nn.LSTMCell, nn.GRUCell, nn.RNNCell):
        if isinstance(m, cls) and type(m).forward is cls.forward:
            return cell_step
    return None
