"""A Scan body that applies a step mask, for recurrent steps that are not a native node.

Keras's masked RNN loop (``keras.src.backend.tensorflow.rnn``, the ``mask`` branch of ``rnn``)
runs the cell at every step, then keeps the old values where the step is masked::

    (y_t, S'_t) = step(x_t, S_{t−1})
    S_t   = where(m_t, S'_t, S_{t−1})                      # every state
    out_t = where(m_t, y_t, out_{t−1})    (out_{−1} = 0)    # zero_output_for_mask=False
    out_t = where(m_t, y_t, 0)                             # zero_output_for_mask=True

``last_output`` is ``out`` at the last processed step. :func:`mask_scan_body` rewrites a step
body (inputs ``[S_0 … S_{k−1}, x]``, outputs ``[S'_0 … S'_{k−1}, y]``) in place into the body
of exactly that loop: inputs ``[S_0 … S_{k−1}, out_prev, x, m]`` (``m`` a bool ``[N]`` scanned
alongside ``x``), outputs ``[S_0 … S_{k−1}, out, out]`` — the carried states, the carried
previous output, and the scanned output. The outer Scan feeds ``out_prev`` zeros.
"""

from __future__ import annotations

from typing import Any

from onnx import TensorProto, helper


def _dims(vi: Any) -> list[int | str | None]:
    return [d.dim_value if d.HasField("dim_value") else (d.dim_param or None)
            for d in vi.type.tensor_type.shape.dim]


def mask_scan_body(graph: Any, n_states: int, zero_output: bool, prefix: str) -> None:
    """Rewrite the step ``graph`` (a ``GraphProto``) into the masked loop body (module docstring).

    ``prefix`` starts every name added (the body's own prefix, so no name shadows an outer one).
    """
    states, scanned = list(graph.input[:n_states]), list(graph.input[n_states:])
    new_states, (y,) = list(graph.output[:n_states]), list(graph.output[n_states:])
    elem = y.type.tensor_type.elem_type
    prev = helper.make_tensor_value_info(f"{prefix}masked/prev_output", elem, _dims(y))
    mask = helper.make_tensor_value_info(f"{prefix}masked/step_mask", TensorProto.BOOL, [None])
    m2 = f"{prefix}masked/step_mask_2d"
    nodes = [helper.make_node("Constant", [], [f"{prefix}masked/axes"], name=f"{prefix}masked/Constant",
                              value=helper.make_tensor("axes", TensorProto.INT64, [1], [1])),
             helper.make_node("Unsqueeze", [mask.name, f"{prefix}masked/axes"], [m2],
                              name=f"{prefix}masked/Unsqueeze")]
    outs = []
    for k, (old, new) in enumerate(zip(states, new_states, strict=True)):
        kept = f"{prefix}masked/state_{k}"
        nodes.append(helper.make_node("Where", [m2, new.name, old.name], [kept], name=f"{kept}/Where"))
        outs.append(helper.make_tensor_value_info(kept, new.type.tensor_type.elem_type, _dims(new)))
    fill = prev.name
    if zero_output:
        fill = f"{prefix}masked/zero"
        nodes.append(helper.make_node("Constant", [], [fill], name=f"{fill}/Constant",
                                      value=helper.make_tensor("zero", elem, [], [0.0])))
    out, scan_out = f"{prefix}masked/output", f"{prefix}masked/scan_output"
    nodes.append(helper.make_node("Where", [m2, y.name, fill], [out], name=f"{out}/Where"))
    nodes.append(helper.make_node("Identity", [out], [scan_out], name=f"{scan_out}/Identity"))
    graph.node.extend(nodes)
    del graph.input[:]
    graph.input.extend([*states, prev, *scanned, mask])
    del graph.output[:]
    graph.output.extend([*outs, helper.make_tensor_value_info(out, elem, _dims(y)),
                         helper.make_tensor_value_info(scan_out, elem, _dims(y))])
