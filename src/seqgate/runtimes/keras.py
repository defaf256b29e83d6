"""Keras runner: the model's outputs and every probe's state, in one compiled pass.

How the states are obtained: the model's graph is re-executed node by node (as Keras's own
``Functional`` does: ``node.arguments.fill_in`` then ``layer(*args, **kwargs)``), nested
models walked in place with ``outer/inner`` names. Each recurrent layer named by the probe
map is replaced by a clone of its config with ``return_sequences=True, return_state=True``
and the same weights, called on the same input and ``initial_state``; the layer's own outputs
are then rebuilt from the clone's:

- plain layer: output = the sequence (as Keras returns it, reversed under ``go_backwards``)
  or the final ``h``; ``return_state`` appends ``h`` (and ``c``);
- ``Bidirectional``: forward and backward sublayer clones; the backward sequence is flipped to
  input order; merge ``concat``/``sum``/``mul``/``ave``/``None`` as Keras does; states follow as
  fwd ``h[, c]``, bwd ``h[, c]``; an ``initial_state`` list is split in halves.

A recurrent call with a ``mask=`` argument passes the mask to its clone; the layer's own
non-sequence output is then the clone's last sequence step (Keras's ``last_output``, which
differs from the state when the last steps are masked or a row has no valid step).

Probes (DESIGN.md axes): the sequence in input order (flipped back for ``go_backwards``)
as ``[N, T, 1, H]``; ``h`` and ``c`` as ``[N, 1, H]``. Because the outputs come from this
re-execution, :meth:`KerasRunner.self_check` compares them once with the original model's own
outputs; verify refuses to go on if they differ (the capture would not be the model).

Everything runs inside one ``tf.function`` with a signature whose batch (and dynamic time)
dims are unknown, so a smaller last batch or longer synthetic windows do not retrace.

Two calls: :meth:`KerasRunner.run` (outputs and probes, for verify) and
:meth:`KerasRunner.timed_call` (the original model alone through its compiled
``tf.function``, for profile). Outputs are flattened by ``seqgate.util.outputs``.

Layer names: Keras accepts any string (``encoder lstm (v2) "ü"``), TensorFlow refuses most of
them as name scopes, which every layer call opens. While a function is traced (the only time
Python code inside it runs) every layer carries a scope-safe name (:func:`scope_name`); the
original names come back right after, and the probe map is matched on the original names.
"""

from __future__ import annotations

import contextlib
import re
from collections.abc import Callable, Iterator
from typing import Any

import numpy as np

from seqgate.errors import Unsupported, UnsupportedModelError
from seqgate.onnxfile.probes import Probe
from seqgate.runtimes.batches import pad_rows, run_in_groups
from seqgate.sources.keras_graph import graph_nodes, is_nested
from seqgate.util.outputs import flatten_outputs

SELF_CHECK_ATOL = 1e-6  # the re-execution runs the same TensorFlow kernels; only op fusion may differ


def _fits(spec_tensor: Any, x: Any) -> bool:
    """``x`` fits the model input's fixed dims (batch aside)."""
    return all(d is None or int(d) == int(n) for d, n in zip(spec_tensor.shape[1:], x.shape[1:], strict=True))


def _free_shape(shape: tuple[Any, ...]) -> tuple[Any, ...]:
    """Every dim free but the features (last) of a rank ≥ 3 input; all free for ``[batch, time]``."""
    return (None,) * (len(shape) - 1) + shape[-1:] if len(shape) > 2 else (None,) * len(shape)


def _functional(model: Any) -> Any:
    if type(model).__name__ == "Sequential":
        return model._functional
    return model


def scope_name(name: str) -> str:
    """``name`` made acceptable to ``tf.name_scope`` (pattern ``[A-Za-z0-9.][A-Za-z0-9_.>-]*``,
    TensorFlow's rule for a root scope); other characters, ``/`` included, become ``_``."""
    safe = re.sub(r"[^A-Za-z0-9_.>-]", "_", name)
    return safe if re.match(r"[A-Za-z0-9.]", safe) else f"x{safe}"


def _all_operations(model: Any) -> list[Any]:
    """Every operation of ``model`` that may open a name scope: the model, its graph's nodes
    (layers and ``keras.ops``), nested models and the sublayers of each (``Bidirectional``)."""
    found: dict[int, Any] = {id(model): model}
    stack = [model]
    while stack:
        m = stack.pop()
        ops = [op for _, op in graph_nodes(_functional(m))] if is_nested(m) else []
        for op in ops + list(getattr(m, "_flatten_layers", lambda: [])()):
            if id(op) not in found:
                found[id(op)] = op
                stack.append(op)
    return list(found.values())


@contextlib.contextmanager
def _scope_safe_names(operations: list[Any]) -> Iterator[None]:
    renamed = []
    for op in operations:
        safe = scope_name(op.name)
        if safe != op.name:
            renamed.append((op, op.name))
            op.name = safe
    try:
        yield
    finally:
        for op, name in renamed:
            op.name = name


def _clone(layer: Any, input_shape: tuple[Any, ...], name: str) -> Any:
    cfg = {**layer.get_config(), "return_sequences": True, "return_state": True, "name": name}
    clone = type(layer).from_config(cfg)
    clone.build(input_shape)
    clone.set_weights(layer.get_weights())
    return clone


def _cell_clone(layer: Any, k: int, shape: tuple[Any, ...], name: str) -> Any:
    """Cell k of an ``RNN([cells])`` as its own RNN returning sequences and states, same weights
    (stateful, with the layer's fixed batch, when the layer is)."""
    from seqgate.util.frameworks import import_keras

    keras = import_keras()
    cell = layer.cell.cells[k]
    copy = type(cell).from_config(cell.get_config())
    stateful = bool(getattr(layer, "stateful", False))
    rnn = keras.layers.RNN(copy, return_sequences=True, return_state=True, stateful=stateful,
                           go_backwards=bool(layer.go_backwards) and k == 0,
                           zero_output_for_mask=bool(layer.zero_output_for_mask), name=name)
    features = int(shape[-1]) if k == 0 else _output_size(layer.cell.cells[k - 1])
    rnn.build((shape[0] if stateful else None, None, features))
    rnn.set_weights(cell.get_weights())
    return rnn


def _output_size(below: Any) -> int:
    size = below.output_size if getattr(below, "output_size", None) else below.state_size
    return int(size[0] if isinstance(size, list | tuple) else size)


class KerasRunner:
    """Runs a loaded Keras model; see the module docstring."""

    self_check_atol = SELF_CHECK_ATOL
    runtime = "keras"

    def __init__(self, model: Any, probes: list[Probe], output_names: list[str], states: bool = True) -> None:
        from seqgate.util.frameworks import import_keras

        self.keras = import_keras()
        import tensorflow as tf

        self.tf = tf
        self.model = model
        self.graph = _functional(model)
        self.output_names = list(output_names)
        if len(self.graph.outputs) != len(self.output_names):
            raise UnsupportedModelError(model.name, [Unsupported(
                model.name, f"the Keras model has {len(self.graph.outputs)} outputs, the ONNX file "
                f"{len(self.output_names)}", "verify the ONNX file exported from this model")])
        self.input_names = [t.name for t in self.graph.inputs]
        self._operations = _all_operations(model)
        self._names = {id(op): op.name for op in self._operations}  # the names the probe map uses
        self.probes = [p for p in probes if states] if probes else []
        self._layers = {p.source.get("layer", p.layer) for p in self.probes}
        self._clones: dict[str, Any] = {}
        self._mask: Any = None  # the mask of the recurrent call being re-executed
        self._prepare_clones(self.graph, "")
        missing = sorted(self._layers - {k.split("#")[0] for k in self._clones})
        if missing:
            raise UnsupportedModelError(model.name, [Unsupported(
                m, "layer named by the probe map is not in the Keras model",
                "verify the ONNX file against the model it was exported from") for m in missing])
        sig = [tf.TensorSpec((None, *t.shape[1:]), dtype=str(t.dtype)) for t in self.graph.inputs]
        self._fn = tf.function(self._forward, input_signature=sig)
        self._plain = tf.function(self._model_call, input_signature=sig)
        self._free_fn: Any = None  # _forward with every time dim free (built when a call needs it)
        self.fixed_batch = next((int(t.shape[0]) for t in self.graph.inputs if t.shape[0] is not None), None)
        self._stateful = [op for op in [*self._operations, *self._clones.values()]
                          if getattr(op, "stateful", False) and getattr(op, "states", None) is not None]

    def _name(self, layer: Any) -> str:
        return self._names.get(id(layer), layer.name)

    # ----- setup --------------------------------------------------------------------------------
    def _prepare_clones(self, graph: Any, prefix: str) -> None:
        for node, layer in graph_nodes(graph):
            full = f"{prefix}{self._name(layer)}"
            if is_nested(layer):
                self._prepare_clones(_functional(layer), f"{full}/")
                continue
            if full not in self._layers:
                continue
            n = len(self._clones)
            shape = tuple(node.input_tensors[0].shape)
            if type(getattr(layer, "cell", None)).__name__ == "StackedRNNCells":
                for k in range(len(layer.cell.cells)):  # one RNN per cell: see _stacked
                    self._clones[f"{full}#cell{k}"] = _cell_clone(layer, k, shape,
                                                                  f"seqgate_probe_{n}_{k}")
            elif type(layer).__name__ == "Bidirectional":
                self._clones[full + "#fw"] = _clone(layer.forward_layer, shape, f"seqgate_probe_{n}_fw")
                self._clones[full + "#bw"] = _clone(layer.backward_layer, shape, f"seqgate_probe_{n}_bw")
            else:
                self._clones[full] = _clone(layer, shape, f"seqgate_probe_{n}")

    # ----- traced forward -----------------------------------------------------------------------
    def _model_call(self, *xs: Any) -> Any:
        with _scope_safe_names(self._operations):  # runs while tracing only
            return self.model(xs[0] if len(xs) == 1 else list(xs), training=False)

    def _forward(self, *inputs: Any) -> list[Any]:
        probes: dict[str, Any] = {}
        with _scope_safe_names(self._operations):  # runs while tracing only
            outs = self._walk(self.graph, list(inputs), "", probes)
        return [*outs, *(probes[p.name] for p in self.probes)]

    def _walk(self, graph: Any, inputs: list[Any], prefix: str, probes: dict[str, Any]) -> list[Any]:
        tree = self.keras.tree
        values = {id(x): y for x, y in zip(graph.inputs, inputs, strict=True)}
        for node, layer in graph_nodes(graph):
            full = f"{prefix}{self._name(layer)}"
            args, kwargs = node.arguments.fill_in(values)
            if is_nested(layer):
                outs: Any = self._walk(_functional(layer), tree.flatten(args), f"{full}/", probes)
            elif full in self._layers:
                outs = self._recurrent(full, layer, args, kwargs, probes)
            else:
                outs = layer(*args, **kwargs)
            for x, y in zip(node.outputs, tree.flatten(outs), strict=True):
                values[id(x)] = y
        return [values[id(x)] for x in graph.outputs]

    def _recurrent(self, full: str, layer: Any, args: Any, kwargs: dict[str, Any],
                   probes: dict[str, Any]) -> list[Any]:
        x = args[0]
        init = kwargs.get("initial_state")
        if init is None and len(args) > 1:
            init = args[1]
        init_list = None if init is None else (list(init) if isinstance(init, list | tuple) else [init])
        self._mask = kwargs.get("mask")
        if type(layer).__name__ == "Bidirectional":
            return self._bidirectional(full, layer, x, init_list, probes)
        if f"{full}#cell0" in self._clones:
            return self._stacked(full, layer, x, init_list, probes)
        seq, states = self._run_clone(self._clones[full], x, init_list)
        self._record(full, "forward" if not layer.go_backwards else "reverse", seq, states,
                     layer.go_backwards, probes)
        outs = [seq if layer.return_sequences else self._last(seq, states)]
        return outs + (states if layer.return_state else [])

    def _last(self, seq: Any, states: list[Any]) -> Any:
        """Keras's ``last_output``: with a mask, the last processed step's output (not the state)."""
        return states[0] if self._mask is None else seq[:, -1]

    def _run_clone(self, clone: Any, x: Any, init: list[Any] | None) -> tuple[Any, list[Any]]:
        kw = {} if self._mask is None else {"mask": self._mask}
        res = clone(x, initial_state=init, **kw) if init is not None else clone(x, **kw)
        return res[0], list(res[1:])

    def _record(self, full: str, direction: str, seq: Any, states: list[Any], backwards: bool,
                probes: dict[str, Any]) -> None:
        ops = self.keras.ops
        in_order = ops.flip(seq, axis=1) if backwards else seq
        found = {"hidden_sequence": ops.expand_dims(in_order, 2),
                 "hidden_final": ops.expand_dims(states[0], 1)}
        if len(states) > 1:
            found["cell_final"] = ops.expand_dims(states[1], 1)
        layer, _, cell = full.partition("#cell")
        for p in self.probes:
            if cell and str(p.source.get("cell_index")) != cell:
                continue
            if p.source.get("layer", p.layer) == layer and p.direction == direction and p.kind in found:
                probes[p.name] = found[p.kind]

    def _stacked(self, full: str, layer: Any, x: Any, init: list[Any] | None,
                 probes: dict[str, Any]) -> list[Any]:
        """RNN([cells]): cell k over cell k−1's output sequence equals the stack step by step
        (each cell's state reads only the cell below at steps ≤ t). Only cell 0 reverses time
        under ``go_backwards``; the cells above read its output in that processing order, so
        they get the mask in that order too. With a mask, the per-cell form still holds: every
        cell keeps its state at a masked step, and reads the cell below only at valid steps."""
        seq, states = x, []
        direction = "reverse" if layer.go_backwards else "forward"
        mask, at = self._mask, 0
        for k, cell in enumerate(layer.cell.cells):
            size = cell.state_size
            count = len(size) if isinstance(size, list | tuple) else 1
            part = None if init is None else init[at:at + count]
            at += count
            if k == 1 and mask is not None and layer.go_backwards:
                self._mask = self.keras.ops.flip(mask, axis=1)
            seq, st = self._run_clone(self._clones[f"{full}#cell{k}"], seq, part)
            states.extend(st)
            self._record(f"{full}#cell{k}", direction, seq, st, layer.go_backwards, probes)
        outs = [seq if layer.return_sequences else self._last(seq, states[-count:])]
        self._mask = mask
        return outs + (states if layer.return_state else [])

    def _bidirectional(self, full: str, layer: Any, x: Any, init: list[Any] | None,
                       probes: dict[str, Any]) -> list[Any]:
        ops = self.keras.ops
        half = None if init is None else len(init) // 2
        fseq, fstates = self._run_clone(self._clones[full + "#fw"], x, None if init is None else init[:half])
        bseq, bstates = self._run_clone(self._clones[full + "#bw"], x, None if init is None else init[half:])
        self._record(full, "forward", fseq, fstates, False, probes)
        self._record(full, "reverse", bseq, bstates, True, probes)
        if layer.return_sequences:
            yf, yb = fseq, ops.flip(bseq, axis=1)
        else:
            yf, yb = self._last(fseq, fstates), self._last(bseq, bstates)
        mode = layer.merge_mode
        merged: list[Any]
        if mode == "concat":
            merged = [ops.concatenate([yf, yb], axis=-1)]
        elif mode == "sum":
            merged = [yf + yb]
        elif mode == "mul":
            merged = [yf * yb]
        elif mode == "ave":
            merged = [(yf + yb) / 2]
        else:
            merged = [yf, yb]
        return merged + (fstates + bstates if layer.return_state else [])

    # ----- public -------------------------------------------------------------------------------
    def _feeds(self, feeds: dict[str, np.ndarray[Any, Any]]) -> list[Any]:
        """Tensors in the model's input order: by name, else (renamed inputs) by position."""
        if all(n in feeds for n in self.input_names):
            arrays = [feeds[n] for n in self.input_names]
        else:
            arrays = list(feeds.values())
        return [self.tf.constant(a) for a in arrays]

    @property
    def stateful(self) -> bool:
        """The model has ``stateful=True`` layers: Keras carries their state from call to call."""
        return bool(self._stateful)

    def reset_states(self) -> None:
        """Zero the carried state of every stateful layer, the model's own and the probe clones'.
        (Assigned here: ``RNN.reset_state`` fails on stacks of multi-state cells, FACTS.md.)"""
        for layer in self._stateful:
            for v in self.keras.tree.flatten(layer.states):
                v.assign(np.zeros(tuple(v.shape), dtype=str(v.dtype)))

    def run(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        """Outputs by ONNX output name, then every probe (the model alone when there are none).

        Every window is independent: a stateful model's states are zeroed before each call, and a
        model with a fixed batch size takes any number of windows (``seqgate.runtimes.batches``)."""
        if self.fixed_batch is not None:
            return run_in_groups(self._run_fresh, feeds, self.fixed_batch)
        return self._run_fresh(feeds)

    def run_carrying(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        """The next chunk of a stream through a stateful model: the states Keras carries from the
        previous call are kept (call :meth:`reset_states` before a stream's first chunk). At most
        ``fixed_batch`` rows, padded to it (rows are independent)."""
        n = next(iter(feeds.values())).shape[0]
        if self.fixed_batch is not None:
            feeds = {k: pad_rows(v, self.fixed_batch) for k, v in feeds.items()}
        return {k: v[:n] for k, v in self._call(feeds).items()}

    def _run_fresh(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        if self._stateful:
            self.reset_states()
        return self._call(feeds)

    def _call(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        tensors = self._feeds(feeds)
        if not self.probes:
            res = self._plain(*tensors)
        elif all(_fits(t, x) for t, x in zip(self.graph.inputs, tensors, strict=True)):
            res = self._fn(*tensors)
        else:  # a stream longer than the model's fixed window: only the recurrent steps see time
            res = self._free_function()(*tensors)
        names = [*self.output_names, *(p.name for p in self.probes)]
        return dict(zip(names, self.outputs(res), strict=True))

    def _free_function(self) -> Any:
        if self._free_fn is None:
            spec = self.tf.TensorSpec
            sig = [spec(_free_shape(tuple(t.shape)), dtype=str(t.dtype)) for t in self.graph.inputs]
            self._free_fn = self.tf.function(self._forward, input_signature=sig)
        return self._free_fn

    def run_plain(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        """The original model alone (the bare inference the benchmark compares against); windows
        independent as in :meth:`run`."""
        def plain(f: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
            if self._stateful:
                self.reset_states()
            return dict(zip(self.output_names, self.outputs(self._plain(*self._feeds(f))), strict=True))

        return run_in_groups(plain, feeds, self.fixed_batch) if self.fixed_batch is not None else plain(feeds)

    @contextlib.contextmanager
    def timed_call(self, feeds: dict[str, np.ndarray[Any, Any]], threads: int) -> Iterator[Callable[[], Any]]:
        """Yield a zero-argument call of the compiled original model on ``feeds`` (tensors made once).

        ``threads`` is not applied: TensorFlow fixes its thread pools when its runtime starts
        (:func:`seqgate.runtimes.open_source_runner` asks for a count before loading);
        :meth:`framework_threads` says what TensorFlow uses.
        """
        tensors = self._feeds(feeds)
        fn = self._plain
        yield lambda: fn(*tensors)

    def framework_threads(self) -> int:
        """TensorFlow's intra-op thread count (0 = its default, one per core)."""
        return int(self.tf.config.threading.get_intra_op_parallelism_threads())

    @staticmethod
    def outputs(result: Any) -> list[np.ndarray[Any, Any]]:
        """A call's result as arrays in the ONNX output order (``seqgate.util.outputs``)."""
        return [np.asarray(r) for r in flatten_outputs(result)]

    def self_check(self, feeds: dict[str, np.ndarray[Any, Any]], got: dict[str, np.ndarray[Any, Any]]) -> float:
        """Max |Δ| between the re-executed outputs and the original model's (0 when no probes)."""
        if not self.probes:
            return 0.0
        ref = self.run_plain(feeds)
        worst = 0.0
        for n in self.output_names:
            d = np.abs(ref[n].astype(np.float64) - got[n].astype(np.float64))
            worst = max(worst, float(d.max()) if d.size else 0.0)
        return worst
