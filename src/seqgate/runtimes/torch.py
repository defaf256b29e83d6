"""PyTorch runner: the module's outputs and every probe's state (forward hooks + per-layer runs).

Outputs: ``forward``'s result flattened by ``seqgate.util.outputs.flatten_outputs`` (depth
first, dicts in insertion order: the exporter's rule), matched in order to the ONNX graph
outputs. Inputs are passed by name when ``forward`` has parameters of those names (the ONNX
inputs of a PyTorch export are ``forward``'s parameters, ``(h0, c0)`` pairs, or the named
tensors of a dict/dataclass parameter listed by ``seqgate.input_structure``: ``torch_args``),
else by position in the ONNX input order (an ONNX file exported from another source, profiled
beside this module).

Two calls: :meth:`TorchRunner.run` (outputs and probes, for verify) and
:meth:`TorchRunner.timed_call` (the bare module under ``inference_mode`` with the point's
``torch.set_num_threads``, restored afterwards; the hooks below stay idle, for profile).

States, for each recurrent module (``nn.LSTM``/``GRU``/``RNN``) named by the probe map:

- a forward hook records every call's input, ``hx`` and result; the probe's
  ``source.call_index`` picks the call;
- finals come from the module's own ``h_n``/``c_n`` ``[L·D, N, H]``, row ``k·D + d`` for layer k,
  direction d (l0-fwd, l0-bwd, l1-fwd, …; ``batch_first`` never changes ``h_n``);
- a one-layer module's hidden sequence is its output, ``[..., d·H:(d+1)·H]``, both directions
  in input order (PyTorch's reverse output at t is the state after consuming x[t]);
- a stacked module (L > 1) runs, for the duration of the runner, as its per-layer
  decomposition: layer k is a single-layer module of the same type with layer k's weights
  (``weight_ih_l{k}[_reverse]`` …) fed layer k−1's output and ``h0[k·D:(k+1)·D]``; the module
  returns the last layer's output and ``h_n = cat_k(h_k)`` (likewise ``c_n``), exactly PyTorch's
  definition of stacking (inter-layer dropout is inert in eval mode). This gives every layer's
  sequence without computing the stack twice; :meth:`TorchRunner.self_check` runs the
  module's own ``forward`` on the first batch and refuses to go on if the decomposition's
  outputs and states differ from it.

Sequences are returned as ``[N, T, 1, H]``, finals as ``[N, 1, H]`` (DESIGN.md).
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from typing import Any

import numpy as np

from seqgate.errors import Unsupported, UnsupportedModelError
from seqgate.onnxfile.probes import Probe
from seqgate.runtimes.torch_cells import cell_probe_value, is_cell_probe
from seqgate.util.outputs import flatten_outputs

SELF_CHECK_ATOL = 1e-5


class TorchRunner:
    """Runs a loaded module in eval mode; see the module docstring."""

    self_check_atol = SELF_CHECK_ATOL
    runtime = "torch"

    def __init__(self, module: Any, probes: list[Probe], output_names: list[str], states: bool = True,
                 structure: dict[str, Any] | None = None) -> None:
        from seqgate.util.frameworks import import_torch

        self.torch = import_torch()
        self.structure = structure or {}  # seqgate.input_structure: inputs gathered into dicts/dataclasses
        self.module = module.eval()
        self.output_names = list(output_names)
        self.probes = list(probes) if states else []
        self._mods = dict(module.named_modules())
        self._calls: dict[str, list[tuple[Any, Any, Any]]] = {}
        self._layer_cache: dict[tuple[str, int], Any] = {}
        wanted = {p.source.get("module", p.layer) for p in self.probes}
        missing = sorted(w for w in wanted if w not in self._mods)
        if missing:
            raise UnsupportedModelError(type(module).__name__, [Unsupported(
                m, "module named by the probe map is not in the PyTorch model",
                "verify the ONNX file against the model it was exported from") for m in missing])
        self._seqs: dict[str, list[list[Any]]] = {}
        self._recording = False  # hooks and the stacked decomposition act inside run() only
        self._threads = 0
        self.run_threads: int | None = None  # intra-op threads of run() (None: PyTorch's own)
        self._stacked = sorted(w for w in wanted if int(getattr(self._mods[w], "num_layers", 1)) > 1)
        inner = {p.source.get("module", p.layer) for p in self.probes if p.source.get("base_forward")}
        for name in sorted(inner):
            self._record_base_forward(name)
        for name in sorted(wanted - inner):
            self._mods[name].register_forward_hook(self._hook(name), with_kwargs=True)
        for name in self._stacked:
            if name not in inner:
                self._mods[name].forward = self._stacked_forward(name)

    def _hook(self, name: str) -> Any:
        def hook(mod: Any, args: tuple[Any, ...], kwargs: dict[str, Any], out: Any) -> None:
            if not self._recording:
                return
            x = args[0] if args else kwargs.get("input")
            hx = args[1] if len(args) > 1 else kwargs.get("hx")
            self._calls.setdefault(name, []).append((x, hx, out))

        return hook

    def _record_base_forward(self, name: str) -> None:
        """A subclass whose own ``forward`` calls ``super().forward``: its states are those of the
        base call (the export's ``source.base_forward``), recorded by a ``forward`` placed just
        before the base class's in this instance's method order (``util.mro``)."""
        from seqgate.util.mro import insert_before_base

        m = self._mods[name]
        nn = self.torch.nn
        base = next(c for c in type(m).__mro__ if c in (nn.LSTM, nn.GRU, nn.RNN))
        stacked = self._stacked_forward(name) if int(m.num_layers) > 1 else None
        runner = self

        def forward(mod: Any, input: Any, hx: Any = None) -> Any:
            out = stacked(input, hx) if stacked is not None else base.forward(mod, input, hx)
            if runner._recording:
                runner._calls.setdefault(name, []).append((input, hx, out))
            return out

        insert_before_base(m, base, {"forward": forward})

    # ----- per-layer runs ---------------------------------------------------------------------------
    def _single_layer(self, name: str, k: int) -> Any:
        key = (name, k)
        if key not in self._layer_cache:
            m = self._mods[name]
            nn = self.torch.nn
            kind = next(c for c in type(m).__mro__ if c in (nn.LSTM, nn.GRU, nn.RNN))
            opts: dict[str, Any] = {"nonlinearity": m.nonlinearity} if kind is nn.RNN else {}
            if kind is nn.LSTM and m.proj_size:
                opts["proj_size"] = m.proj_size
            d = 2 if m.bidirectional else 1
            in_size = m.input_size if k == 0 else d * (getattr(m, "proj_size", 0) or m.hidden_size)
            one = kind(in_size, m.hidden_size, num_layers=1, bias=m.bias, batch_first=m.batch_first,
                       bidirectional=m.bidirectional, **opts)
            state = {}
            for pname, _ in one.named_parameters():
                state[pname] = getattr(m, pname.replace("_l0", f"_l{k}")).detach()
            one.load_state_dict(state)
            self._layer_cache[key] = one.eval()
        return self._layer_cache[key]

    def _stacked_forward(self, name: str) -> Any:
        m = self._mods[name]
        d = 2 if m.bidirectional else 1
        torch = self.torch

        base = next(c for c in type(m).__mro__ if c in (torch.nn.LSTM, torch.nn.GRU, torch.nn.RNN))

        def forward(input: Any, hx: Any = None) -> Any:
            if not self._recording:
                return base.forward(m, input, hx)
            is_lstm = isinstance(m, torch.nn.LSTM)
            inp, seqs, hs, cs = input, [], [], []
            for k in range(m.num_layers):
                sl = slice(k * d, (k + 1) * d)
                h0 = None if hx is None else ((hx[0][sl], hx[1][sl]) if is_lstm else hx[sl])
                y, hk = self._single_layer(name, k)(inp, h0)
                seqs.append(y)
                hs.append(hk[0] if is_lstm else hk)
                if is_lstm:
                    cs.append(hk[1])
                inp = y
            self._seqs.setdefault(name, []).append(seqs)
            h_n = torch.cat(hs, 0)
            return (inp, (h_n, torch.cat(cs, 0))) if is_lstm else (inp, h_n)

        return forward

    def _probe_values(self) -> dict[str, np.ndarray[Any, Any]]:
        found: dict[str, np.ndarray[Any, Any]] = {}
        for p in self.probes:
            src = p.source
            name, call = src.get("module", p.layer), int(src.get("call_index", 0))
            calls = self._calls.get(name, [])
            if call >= len(calls) and not is_cell_probe(p):
                raise UnsupportedModelError(name, [Unsupported(
                    name, f"call {call} of the module did not happen in forward", "export the model again")])
            if is_cell_probe(p):
                found[p.name] = cell_probe_value(p, calls)
                continue
            out = calls[call][2]
            m = self._mods[name]
            d_all, h = (2 if m.bidirectional else 1), getattr(m, "proj_size", 0) or m.hidden_size
            k, d = int(src.get("layer_index", p.stack_index)), p.direction_index
            if p.kind == "hidden_sequence":
                seq = self._seqs[name][call][k] if name in self._stacked else out[0]
                y = seq if m.batch_first else seq.transpose(0, 1)
                found[p.name] = y[..., d * h:(d + 1) * h].unsqueeze(2).numpy()
            else:
                states = out[1]
                if p.kind == "cell_final":
                    states = states[1]
                elif isinstance(states, tuple):
                    states = states[0]
                found[p.name] = states[k * d_all + d].unsqueeze(1).numpy()
        return found

    # ----- public --------------------------------------------------------------------------------------
    def run(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        """Outputs and probes; with :attr:`run_threads` set, that many intra-op threads in this
        call's thread (PyTorch's count is per calling thread; restored afterwards)."""
        torch = self.torch
        self._calls, self._seqs = {}, {}
        self._recording = True
        previous = torch.get_num_threads()
        if self.run_threads:
            torch.set_num_threads(self.run_threads)
        try:
            with torch.inference_mode():
                args, kwargs = self._arguments(feeds)
                return self._collect(self.module(*args, **kwargs))
        finally:
            self._recording = False
            if self.run_threads:
                torch.set_num_threads(previous)

    def _arguments(self, feeds: dict[str, np.ndarray[Any, Any]]) -> tuple[list[Any], dict[str, Any]]:
        """``forward``'s arguments: by name (``runtimes.torch_args``: plain names, ``(h0, c0)``
        pairs, dicts/dataclasses of ``seqgate.input_structure``) when every input fits a
        parameter, else by position."""
        from seqgate.runtimes.torch_args import forward_kwargs

        kwargs = forward_kwargs(self.module, feeds, self.structure)
        if kwargs is not None:
            return [], kwargs
        return [self.torch.from_numpy(np.ascontiguousarray(v)) for v in feeds.values()], {}

    def _collect(self, res: Any) -> dict[str, np.ndarray[Any, Any]]:
        leaves = self.outputs(res)
        if len(leaves) != len(self.output_names):
            raise UnsupportedModelError(type(self.module).__name__, [Unsupported(
                "forward", f"returns {len(leaves)} tensors, the ONNX file has {len(self.output_names)} "
                f"outputs", "verify the ONNX file exported from this model")])
        out = dict(zip(self.output_names, leaves, strict=True))
        out.update(self._probe_values())
        return out

    @contextlib.contextmanager
    def timed_call(self, feeds: dict[str, np.ndarray[Any, Any]], threads: int) -> Iterator[Callable[[], Any]]:
        """Yield a zero-argument eager call on ``feeds`` (tensors made once); no probes are read.

        ``threads`` intra-op threads and ``inference_mode`` hold while the call is used.
        """
        torch = self.torch
        args, kwargs = self._arguments(feeds)
        previous = torch.get_num_threads()
        torch.set_num_threads(threads)
        self._threads = torch.get_num_threads()
        module = self.module
        try:
            with torch.inference_mode():
                yield lambda: module(*args, **kwargs)
        finally:
            torch.set_num_threads(previous)

    def framework_threads(self) -> int:
        """The intra-op threads PyTorch used in the last :meth:`timed_call`."""
        return self._threads

    @staticmethod
    def outputs(result: Any) -> list[np.ndarray[Any, Any]]:
        """A call's result as arrays in the ONNX output order (``seqgate.util.outputs``)."""
        return [r.detach().cpu().numpy() if hasattr(r, "detach") else np.asarray(r)
                for r in flatten_outputs(result)]

    def self_check(self, feeds: dict[str, np.ndarray[Any, Any]], got: dict[str, np.ndarray[Any, Any]]) -> float:
        """Max |Δ| between each stacked module's decomposition and its own ``forward`` (last batch)."""
        worst = 0.0
        with self.torch.inference_mode():
            for name in self._stacked:
                m = self._mods[name]
                nn = self.torch.nn
                base = next(c for c in type(m).__mro__ if c in (nn.LSTM, nn.GRU, nn.RNN))
                for x, hx, out in self._calls.get(name, []):
                    ref = base.forward(m, x, hx)  # the recorded call's own inputs, without the stacking
                    for r, o in zip(flatten_outputs(ref), flatten_outputs(out), strict=True):
                        if r is None or o is None:  # a PackedSequence's absent sorted_indices
                            continue
                        worst = max(worst, float((r - o).abs().max()) if r.numel() else 0.0)
        return worst
