"""What a Keras layer mapping receives (``KerasCall``) and the value type it reads and returns."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from seqgate.export.core.builder import Value

KV = Value  # a Keras tensor's counterpart in the graph being built


@dataclass
class KerasCall:
    """What a layer mapping receives: the layer, its tensor inputs, call kwargs, outputs."""

    layer: Any
    name: str  # full name incl. nested-model prefix
    inputs: list[KV]
    kwargs: dict[str, Any]
    outputs: list[Any]  # KerasTensors this call produced (shapes, dtypes)
    args: tuple[Any, ...] = ()
    values: dict[int, KV] = field(default_factory=dict)  # id(KerasTensor) → KV
    # The layer table, for mappings that walk a sub-graph (a custom cell's step): handed in by
    # the walker, so those modules need not import the table that imports them.
    table: dict[str, Any] = field(default_factory=dict)

    def value_of(self, tensor: Any) -> KV:
        return self.values[id(tensor)]

    def out_shape(self, i: int = 0) -> tuple[int | None, ...]:
        return tuple(self.outputs[i].shape)
