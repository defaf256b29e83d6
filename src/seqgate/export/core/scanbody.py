"""Helpers for ONNX ``Scan`` bodies built by a separate :class:`GraphBuilder` (shared by the
PyTorch user-cell and Keras custom-cell exports).

A Scan body is its own graph, but ONNX resolves names across nested scopes: a body name equal to
an outer one would shadow it. :func:`prefix_names` gives every name inside the body a prefix
(``<cell>/step/``) so that cannot happen. :func:`order_inputs` puts the body's inputs in the
order the Scan spec requires: the N carried states first, then the scanned inputs.
"""

from __future__ import annotations

from typing import Any


def prefix_names(graph: Any, prefix: str, local: set[str] | None = None) -> None:
    """Prefix every value, initializer and node name of ``graph`` (a ``GraphProto``) in place;
    with ``local``, only those value names (a sub-graph's own), so outer values it reads keep theirs."""
    def p(n: str) -> str:
        return prefix + n if n and (local is None or n in local) else n

    for vi in [*graph.input, *graph.output, *graph.value_info]:
        vi.name = p(vi.name)
    for init in graph.initializer:
        init.name = p(init.name)
    for node in graph.node:
        node.name = p(node.name)
        node.input[:] = [p(i) for i in node.input]
        node.output[:] = [p(o) for o in node.output]


def order_inputs(graph: Any, order: list[str]) -> None:
    """Reorder ``graph.input`` to ``order`` (names of its inputs: states first, then scanned)."""
    by_name = {vi.name: vi for vi in graph.input}
    del graph.input[:]
    graph.input.extend(by_name[n] for n in order)
