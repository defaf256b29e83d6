"""Walking a Keras 3 Functional graph: shared by the exporter and the Keras runner.

Contract: :func:`graph_nodes` yields every non-input node of ``graph`` with its operation, in
dependency order (deepest first, and within one depth in Keras's own order), which is the
order Keras itself evaluates a Functional model in.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any


def is_nested(layer: Any) -> bool:
    """A model used as a layer (a Sequential or Functional inside the graph)."""
    return hasattr(layer, "_nodes_by_depth") or type(layer).__name__ == "Sequential"


def graph_nodes(graph: Any) -> Iterator[tuple[Any, Any]]:
    """``(node, operation)`` for every node that is not a graph input, in dependency order."""
    for depth in sorted(graph._nodes_by_depth, reverse=True):
        for node in graph._nodes_by_depth[depth]:
            layer = node.operation
            if layer is None or getattr(node, "is_input", False) or type(layer).__name__ == "InputLayer":
                continue
            yield node, layer
