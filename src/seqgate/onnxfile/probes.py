"""The probe map: which ONNX values hold each recurrent layer's internal states.

A probe is one internal tensor the verifier compares across runtimes. For every recurrent
layer (every stacked layer and direction of a PyTorch module) the export records:

- ``hidden_sequence``: the hidden state after every step,
- ``hidden_final``: the final hidden state,
- ``cell_final``: the final cell state (LSTM only).

Each probe names the ONNX ``node`` and ``output_index`` that computes it, the ``value`` name
the verifier gives that output, the ``axes`` of that ONNX value (``"TDNH"`` for a recurrent
op's Y, ``"DNH"`` for Y_h/Y_c) and the ``direction_index`` to select. :func:`to_canonical`
turns an ONNX value into the convention of DESIGN.md: ``hidden_sequence`` is
``[batch, time, 1, hidden]`` (index t = state after the cell consumed input position t, for
either direction), finals are ``[batch, 1, hidden]``.

``source`` is a small dict the source-framework runner needs to compute the same tensor
(layer path, stack index, whether the source returns sequences in reversed order…).

The map is stored as JSON under metadata key ``seqgate.probes``. The deployable file may leave
a probe's output slot empty; :func:`with_probe_outputs` fills it on an in-memory copy.
"""

from __future__ import annotations

import copy
import json
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import onnx
from onnx import helper

PROBE_MAP_KEY = "seqgate.probes"
KINDS = ("hidden_sequence", "hidden_final", "cell_final")


@dataclass(frozen=True)
class Probe:
    """One probe of the map; see the module docstring for each field."""

    name: str
    kind: str
    layer: str
    direction: str
    direction_index: int
    node: str
    output_index: int
    value: str
    axes: str
    stack_index: int = 0
    source: dict[str, Any] = field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        return asdict(self)

    @staticmethod
    def from_json(d: dict[str, Any]) -> Probe:
        return Probe(**d)

    def renamed(self, rename: dict[str, str]) -> Probe:
        if self.value in rename:
            return Probe(**{**asdict(self), "value": rename[self.value]})
        return self


def read_probe_map(model: onnx.ModelProto) -> list[Probe]:
    """The probes recorded in a seqgate file, in graph order ([] for a foreign file)."""
    for p in model.metadata_props:
        if p.key == PROBE_MAP_KEY:
            return [Probe.from_json(d) for d in json.loads(p.value)]
    return []


def read_metadata(model: onnx.ModelProto) -> dict[str, str]:
    """``metadata_props`` as a dict."""
    return {p.key: p.value for p in model.metadata_props}


def with_probe_outputs(model: onnx.ModelProto, probes: list[Probe]) -> onnx.ModelProto:
    """A copy of ``model`` whose graph also outputs every probe's value.

    Empty output slots named by a probe are filled with the probe's value name. Raises
    ``ValueError`` naming the probe if its node is missing or the slot holds another name.
    """
    m = copy.deepcopy(model)
    nodes = {n.name: n for n in m.graph.node}
    existing = {o.name for o in m.graph.output}
    for p in probes:
        n = nodes.get(p.node)
        if n is None:
            raise ValueError(f"probe {p.name}: node {p.node!r} is not in the graph")
        while len(n.output) <= p.output_index:
            n.output.append("")
        cur = n.output[p.output_index]
        if cur == "":
            n.output[p.output_index] = p.value
        elif cur != p.value:
            raise ValueError(
                f"probe {p.name}: node {p.node!r} output {p.output_index} is {cur!r}, "
                f"the probe map says {p.value!r}"
            )
        if p.value not in existing:
            rank = len(p.axes)
            m.graph.output.append(
                helper.make_tensor_value_info(p.value, onnx.TensorProto.FLOAT, [None] * rank)
            )
            existing.add(p.value)
    return m


def to_canonical(probe: Probe, value: np.ndarray[Any, Any]) -> np.ndarray[Any, Any]:
    """Select the probe's direction and permute to ``[N, T, 1, H]`` or ``[N, 1, H]`` (a view of
    ``value``: no copy)."""
    axes = probe.axes
    d, i = axes.index("D"), probe.direction_index
    if not 0 <= i < value.shape[d]:  # a slice would silently give an empty array
        raise IndexError(f"probe {probe.name}: direction {i} of a value with {value.shape[d]} directions")
    sel = value[(slice(None),) * d + (slice(i, i + 1),)]
    target = "NTDH" if "T" in axes else "NDH"
    return np.transpose(sel, [axes.index(c) for c in target])
