"""An exact alternative form of GRU and RNN nodes whose weights ONNX Runtime can quantize.

``quantize_dynamic`` leaves GRU and RNN nodes in float (FACTS.md). This rewrite spells each such
node as the operator spec's own equations, so that every weight product becomes a ``MatMul``:

- the input projection of all steps is hoisted out of the loop as one MatMul
  ``XW = X·Wᵀ + Wb`` (``[T, N, G·H]``), exact algebra: ``W`` and ``Wb`` do not depend on the state;
- the recurrence is an ONNX ``Scan`` over time whose body computes, with ``x = XW[t]``
  (gate order z, r, h; ``f`` = Sigmoid, ``g`` = Tanh)::

      GRU, linear_before_reset = 1:  a = h·Rᵀ + Rb;  z = f(x_z + a_z);  r = f(x_r + a_r)
                                     n = g(x_h + r ⊙ a_h);  h' = (1 − z) ⊙ n + z ⊙ h
      GRU, linear_before_reset = 0:  a = h·R_zrᵀ + Rb_zr;  z, r as above
                                     n = g(x_h + (r ⊙ h)·R_hᵀ + Rb_h);  h' = (1 − z) ⊙ n + z ⊙ h
      RNN:                           h' = f(x + h·Rᵀ + Rb)   (f = the node's activation)

- a reverse direction scans backwards (``scan_input_directions``/``scan_output_directions`` = 1),
  so Y stays in original time order as the spec requires; directions are concatenated back
  into ``Y [T, D, N, H]`` and ``Y_h [D, N, H]`` under the node's own output names (or the probe
  map's value names), and the probe map is pointed at those nodes.

Supported: default activations for GRU (Sigmoid, Tanh) and Tanh/Relu/Sigmoid for RNN, with or
without B and ``initial_h``. A node with ``sequence_lens``, ``clip``, ``layout = 1`` or other
activations is left as it is (named in the result's notes): the rewrite never approximates.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from seqgate.onnxfile.probes import PROBE_MAP_KEY, Probe, read_probe_map

RNN_ACTS = ("Tanh", "Relu", "Sigmoid")


def _attrs(node: Any) -> dict[str, Any]:
    out = {a.name: helper.get_attribute_value(a) for a in node.attribute}
    return {k: v.decode() if isinstance(v, bytes) else v for k, v in out.items()}


def _why_not(node: Any, a: dict[str, Any], inits: set[str]) -> str | None:
    """Why ``node`` cannot be rewritten exactly (None: it can)."""
    if any(name and name not in inits for name in node.input[1:4]):
        return "weights that are not initializers"
    if len(node.input) > 4 and node.input[4]:
        return "sequence_lens"
    if "clip" in a or a.get("layout", 0) != 0 or "activation_alpha" in a or "activation_beta" in a:
        return "clip, layout or activation parameters"
    acts = [s.decode() if isinstance(s, bytes) else s for s in a.get("activations", [])]
    if node.op_type == "GRU" and any(x != y for x, y in zip(acts, ["Sigmoid", "Tanh"] * 2, strict=False)):
        return f"activations {acts}"
    if node.op_type == "RNN" and any(x not in RNN_ACTS or x != acts[0] for x in acts):
        return f"activations {acts}"
    return None


def _const(g: Any, name: str, value: np.ndarray[Any, Any]) -> str:
    g.initializer.append(numpy_helper.from_array(value, name))
    return name


def _gru_body(h: int, lbr: int, r: np.ndarray[Any, Any], rb: np.ndarray[Any, Any]) -> Any:
    """The Scan body of one GRU direction: state ``h [N, H]``, scan input ``x [N, 3H]`` (docstring)."""
    mk = helper.make_node
    inits = [numpy_helper.from_array(np.array([h, h, h], np.int64), "split3"),
             numpy_helper.from_array(np.array(1.0, np.float32), "one")]
    nodes = [mk("Split", ["x", "split3"], ["xz", "xr", "xh"], axis=-1)]
    if lbr:
        inits += [numpy_helper.from_array(np.ascontiguousarray(r.T), "Rt"), numpy_helper.from_array(rb, "Rb")]
        nodes += [mk("MatMul", ["h", "Rt"], ["a0"], name="recurrent"), mk("Add", ["a0", "Rb"], ["a"]),
                  mk("Split", ["a", "split3"], ["az", "ar", "ah"], axis=-1),
                  mk("Add", ["xz", "az"], ["sz"]), mk("Sigmoid", ["sz"], ["z"]),
                  mk("Add", ["xr", "ar"], ["sr"]), mk("Sigmoid", ["sr"], ["r"]),
                  mk("Mul", ["r", "ah"], ["rah"]), mk("Add", ["xh", "rah"], ["sn"])]
    else:
        inits += [numpy_helper.from_array(np.array([h, h], np.int64), "split2"),
                  numpy_helper.from_array(np.ascontiguousarray(r[: 2 * h].T), "Rzrt"),
                  numpy_helper.from_array(rb[: 2 * h].copy(), "Rbzr"),
                  numpy_helper.from_array(np.ascontiguousarray(r[2 * h:].T), "Rht"),
                  numpy_helper.from_array(rb[2 * h:].copy(), "Rbh")]
        nodes += [mk("MatMul", ["h", "Rzrt"], ["a0"], name="recurrent_zr"), mk("Add", ["a0", "Rbzr"], ["a"]),
                  mk("Split", ["a", "split2"], ["az", "ar"], axis=-1),
                  mk("Add", ["xz", "az"], ["sz"]), mk("Sigmoid", ["sz"], ["z"]),
                  mk("Add", ["xr", "ar"], ["sr"]), mk("Sigmoid", ["sr"], ["r"]),
                  mk("Mul", ["r", "h"], ["rh"]), mk("MatMul", ["rh", "Rht"], ["b0"], name="recurrent_h"),
                  mk("Add", ["b0", "Rbh"], ["b"]), mk("Add", ["xh", "b"], ["sn"])]
    nodes += [mk("Tanh", ["sn"], ["n"]), mk("Sub", ["one", "z"], ["omz"]), mk("Mul", ["omz", "n"], ["p"]),
              mk("Mul", ["z", "h"], ["q"]), mk("Add", ["p", "q"], ["h_out"]), mk("Identity", ["h_out"], ["y"])]
    return _graph(nodes, inits, h, 3 * h)


def _rnn_body(h: int, act: str, r: np.ndarray[Any, Any], rb: np.ndarray[Any, Any]) -> Any:
    mk = helper.make_node
    inits = [numpy_helper.from_array(np.ascontiguousarray(r.T), "Rt"), numpy_helper.from_array(rb, "Rb")]
    nodes = [mk("MatMul", ["h", "Rt"], ["a0"], name="recurrent"), mk("Add", ["a0", "Rb"], ["a"]),
             mk("Add", ["x", "a"], ["s"]), mk(act, ["s"], ["h_out"]), mk("Identity", ["h_out"], ["y"])]
    return _graph(nodes, inits, h, h)


def _graph(nodes: list[Any], inits: list[Any], h: int, width: int) -> Any:
    def v(name: str, w: int) -> Any:
        return helper.make_tensor_value_info(name, TensorProto.FLOAT, ["N", w])

    return helper.make_graph(nodes, "step", [v("h", h), v("x", width)], [v("h_out", h), v("y", h)], inits)


def _direction(g: Any, node: Any, a: dict[str, Any], d: int, p: str) -> tuple[list[Any], str, str]:
    """Nodes computing one direction: (nodes, Y_d [T, N, H], final h_d [N, H])."""
    mk = helper.make_node
    inits = {i.name: i for i in g.initializer}
    h, gates = int(a["hidden_size"]), 3 if node.op_type == "GRU" else 1
    w = numpy_helper.to_array(inits[node.input[1]])[d]
    r = numpy_helper.to_array(inits[node.input[2]])[d]
    has_b = len(node.input) > 3 and node.input[3]
    b = numpy_helper.to_array(inits[node.input[3]])[d] if has_b else np.zeros(2 * gates * h, np.float32)
    x = node.input[0]
    wt = _const(g, f"{p}Wt", np.ascontiguousarray(w.T))
    wb = _const(g, f"{p}Wb", b[: gates * h].copy())
    nodes = [mk("MatMul", [x, wt], [f"{p}xw0"], name=f"{p}input_projection"),
             mk("Add", [f"{p}xw0", wb], [f"{p}xw"], name=f"{p}input_bias")]
    if len(node.input) > 5 and node.input[5]:
        index = _const(g, f"{p}d", np.array(d, np.int64))
        nodes.append(mk("Gather", [node.input[5], index], [f"{p}h0"], axis=0))
    else:
        zero = numpy_helper.from_array(np.zeros(1, np.float32))
        nodes += [mk("Shape", [x], [f"{p}n"], start=1, end=2),
                  mk("Concat", [f"{p}n", _const(g, f"{p}hsz", np.array([h], np.int64))], [f"{p}hs"], axis=0),
                  mk("ConstantOfShape", [f"{p}hs"], [f"{p}h0"], value=zero)]
    rb = b[gates * h:].copy()
    if node.op_type == "GRU":
        body = _gru_body(h, int(a.get("linear_before_reset", 0)), r, rb)
    else:
        acts = [s.decode() if isinstance(s, bytes) else s for s in a.get("activations", ["Tanh"])]
        body = _rnn_body(h, acts[0] if acts else "Tanh", r, rb)
    rev = int(a.get("direction", "forward") == "reverse" or d == 1)
    nodes.append(mk("Scan", [f"{p}h0", f"{p}xw"], [f"{p}hT", f"{p}Y"], name=f"{p}scan", num_scan_inputs=1,
                    body=body, scan_input_directions=[rev], scan_output_directions=[rev]))
    return nodes, f"{p}Y", f"{p}hT"


def _rewrite_node(g: Any, node: Any, a: dict[str, Any], names: tuple[str, str]) -> list[Any]:
    """Nodes replacing ``node``; ``names`` = the values Y and Y_h must carry ("" = not needed)."""
    mk = helper.make_node
    dirs = 2 if a.get("direction", "forward") == "bidirectional" else 1
    p = f"{node.name}/scan_form/"
    out, ys, hs = [], [], []
    ax0 = _const(g, f"{p}axis0", np.array([0], np.int64))
    ax1 = _const(g, f"{p}axis1", np.array([1], np.int64))
    for d in range(dirs):
        nodes, y, hT = _direction(g, node, a, d, f"{p}d{d}/")
        out += nodes
        out += [mk("Unsqueeze", [y, ax1], [f"{y}4"]), mk("Unsqueeze", [hT, ax0], [f"{hT}3"])]
        ys.append(f"{y}4")
        hs.append(f"{hT}3")
    for parts, name, tag in ((ys, names[0], "Y"), (hs, names[1], "Y_h")):
        if name:
            out.append(mk("Concat", parts, [name], name=f"{p}{tag}", axis=1 if tag == "Y" else 0))
    return out


def scan_form(model: Any) -> tuple[Any, list[str], list[str]]:
    """A copy of ``model`` with every rewritable GRU/RNN node in scan form (module docstring).

    Returns (model, rewritten node names, notes on nodes left as they were).
    """
    m = copy.deepcopy(model)
    g = m.graph
    probes = read_probe_map(m)
    done, notes, nodes = [], [], []
    moved: dict[tuple[str, int], str] = {}
    for node in list(g.node):
        if node.op_type not in ("GRU", "RNN"):
            nodes.append(node)
            continue
        a = _attrs(node)
        why = _why_not(node, a, {i.name for i in g.initializer})
        if why is not None:
            notes.append(f"{node.op_type} node {node.name!r} kept as it is: {why} has no exact scan form here")
            nodes.append(node)
            continue
        names = tuple(_output_name(node, i, probes) for i in (0, 1))
        nodes += _rewrite_node(g, node, a, names)  # type: ignore[arg-type]
        for i, name in enumerate(names):
            if name:
                moved[(node.name, i)] = f"{node.name}/scan_form/{'Y' if i == 0 else 'Y_h'}"
        done.append(node.name)
    del g.node[:]
    g.node.extend(nodes)
    _drop_unused_initializers(g)
    _repoint_probes(m, probes, moved)
    return m, done, notes


def _output_name(node: Any, i: int, probes: list[Probe]) -> str:
    if len(node.output) > i and node.output[i]:
        return str(node.output[i])
    return next((p.value for p in probes if p.node == node.name and p.output_index == i), "")


def _repoint_probes(m: Any, probes: list[Probe], moved: dict[tuple[str, int], str]) -> None:
    import dataclasses
    import json

    if not probes or not moved:
        return
    new = [dataclasses.replace(p, node=moved[(p.node, p.output_index)], output_index=0)
           if (p.node, p.output_index) in moved else p for p in probes]
    entry = next(e for e in m.metadata_props if e.key == PROBE_MAP_KEY)
    entry.value = json.dumps([p.to_json() for p in new])


def _drop_unused_initializers(g: Any) -> None:
    used = {i for n in g.node for i in n.input} | {o.name for o in g.output}
    keep = [i for i in g.initializer if i.name in used]
    del g.initializer[:]
    g.initializer.extend(keep)


def check(model: Any) -> None:
    """The ONNX checker on the rewritten model (a rewrite bug is an internal error)."""
    onnx.checker.check_model(model)
