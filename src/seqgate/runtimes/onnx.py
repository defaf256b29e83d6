"""ONNX Runtime runner: the model plus every probe value as an extra output (in-memory copy).

Two uses, two session setups (:func:`session_options`), one class:

- verify (``timing=False``): onnxruntime's default threads (or ``threads``) and no spin-waiting
  (verify alternates onnxruntime with the source framework batch by batch: threads spinning
  after a run would steal the cores the framework runs on next);
- profile (``timing=True``): ``intra_op_num_threads = threads``, ``inter_op_num_threads = 1``,
  ``ORT_SEQUENTIAL``, ``ORT_ENABLE_ALL``; :attr:`OnnxRunner.recorded` holds these for the report.

:meth:`OnnxRunner.run` gives outputs by name and probes in canonical axes;
:meth:`OnnxRunner.timed_call` yields the bare ``session.run`` of the graph outputs, the exact
call profile times.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from typing import Any

import numpy as np

from seqgate.errors import BadInputError
from seqgate.onnxfile.probes import Probe, to_canonical, with_probe_outputs
from seqgate.runtimes.batches import fixed_batch, run_in_groups
from seqgate.util.text import first_line


def session_options(threads: int, timing: bool) -> tuple[Any, dict[str, Any]]:
    """The onnxruntime ``SessionOptions`` for one use (module docstring) and their record."""
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.log_severity_level = 3
    if timing:
        so.intra_op_num_threads = threads
        so.inter_op_num_threads = 1
        so.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        return so, {"intra_op_num_threads": threads, "inter_op_num_threads": 1,
                    "execution_mode": so.execution_mode.name,
                    "graph_optimization_level": so.graph_optimization_level.name}
    if threads:
        so.intra_op_num_threads = threads
    so.add_session_config_entry("session.intra_op.allow_spinning", "0")
    return so, {"intra_op_num_threads": threads, "allow_spinning": False}


class OnnxRunner:
    """Runs ``model`` (an ``onnx.ModelProto``) on CPU; see the module docstring."""

    runtime = "onnxruntime"

    def __init__(self, model: Any, probes: list[Probe], threads: int = 0, timing: bool = False) -> None:
        import onnxruntime as ort

        self.probes = list(probes)
        self.output_names = [o.name for o in model.graph.output]
        try:
            m = with_probe_outputs(model, self.probes) if self.probes else model
        except ValueError as e:
            raise BadInputError(f"the probe map does not fit the graph: {e}. Export the model again.") from e
        opts, self.recorded = session_options(threads, timing)
        try:
            self.session = ort.InferenceSession(m.SerializeToString(), opts, providers=["CPUExecutionProvider"])
        except Exception as e:  # onnxruntime raises its own exception types
            raise BadInputError(f"onnxruntime cannot load the model: {first_line(e)}. Check it with "
                                f"`seqgate inspect`, or export it again.") from e
        self.recorded["providers"] = self.session.get_providers()
        self._fetch = list(dict.fromkeys([*self.output_names, *(p.value for p in self.probes)]))
        self.fixed_batch = fixed_batch(model)

    def run(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        """Every graph output by name, then every probe in DESIGN.md's axes. A model with a fixed
        batch size takes any number of windows (``seqgate.runtimes.batches``)."""
        if self.fixed_batch is not None:
            return run_in_groups(self._run, feeds, self.fixed_batch)
        return self._run(feeds)

    def _run(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        res = self.session.run(self._fetch, feeds)
        by_value = dict(zip(self._fetch, res, strict=True))
        out = {n: np.asarray(by_value[n]) for n in self.output_names}
        for p in self.probes:
            out[p.name] = to_canonical(p, np.asarray(by_value[p.value]))
        return out

    @contextlib.contextmanager
    def timed_call(self, feeds: dict[str, np.ndarray[Any, Any]],
                   threads: int = 0) -> Iterator[Callable[[], Any]]:
        """Yield the zero-argument call profile times: ``session.run`` of the graph outputs only.

        ``threads`` is fixed when the session is made (``OnnxRunner(..., threads, timing=True)``).
        """
        run, names = self.session.run, self.output_names
        yield lambda: run(names, feeds)

    def framework_threads(self) -> int:
        return int(self.recorded.get("intra_op_num_threads", 0))

    @staticmethod
    def outputs(result: Any) -> list[np.ndarray[Any, Any]]:
        """``session.run``'s list, as arrays in the graph output order."""
        return [np.asarray(r) for r in result]
