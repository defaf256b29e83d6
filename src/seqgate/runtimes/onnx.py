"""ONNX Runtime runner: the model plus every probe value as an extra output (in-memory copy)."""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.errors import BadInputError
from seqgate.onnxfile.probes import Probe, to_canonical, with_probe_outputs
from seqgate.util.text import first_line


class OnnxRunner:
    """Runs ``model`` on CPU; returns outputs by name and probes in canonical axes."""

    def __init__(self, model: Any, probes: list[Probe], threads: int = 0) -> None:
        import onnxruntime as ort

        self.probes = list(probes)
        self.output_names = [o.name for o in model.graph.output]
        try:
            m = with_probe_outputs(model, self.probes) if self.probes else model
        except ValueError as e:
            raise BadInputError(f"the probe map does not fit the graph: {e}. Export the model again.") from e
        opts = ort.SessionOptions()
        opts.log_severity_level = 3
        if threads:
            opts.intra_op_num_threads = threads
        # verify alternates onnxruntime with the source framework batch by batch: threads that
        # spin-wait after a run would steal the cores the framework runs on next
        opts.add_session_config_entry("session.intra_op.allow_spinning", "0")
        try:
            self.session = ort.InferenceSession(m.SerializeToString(), opts, providers=["CPUExecutionProvider"])
        except Exception as e:  # onnxruntime raises its own exception types
            raise BadInputError(f"onnxruntime cannot load the model: {first_line(e)}") from e
        values = list(dict.fromkeys([*self.output_names, *(p.value for p in self.probes)]))
        self._fetch = values

    def run(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]:
        res = self.session.run(self._fetch, feeds)
        by_value = dict(zip(self._fetch, res, strict=True))
        out = {n: np.asarray(by_value[n]) for n in self.output_names}
        for p in self.probes:
            out[p.name] = to_canonical(p, np.asarray(by_value[p.value]))
        return out
