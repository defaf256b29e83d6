"""The one rule for flattening what a framework model returns into an ordered list of tensors.

Rule (used by the PyTorch exporter to name graph outputs, by every runner, by profile): depth
first; tuples and lists in index order; dicts in **insertion order** (the order ``forward``
built them, which is the order Python keeps); anything else is a leaf. Never sort keys: the
exporter declares ONNX outputs in this order, so any other order would pair a source tensor
with the wrong ONNX output.

Each leaf also gets its *path*: the tuple of keys and indices that reaches it (``("z",)`` for
``result["z"]``, ``(1, 0)`` for ``result[1][0]``, ``()`` for a bare tensor).
"""

from __future__ import annotations

from typing import Any

Path = tuple[Any, ...]


def flatten_with_paths(value: Any, prefix: Path = ()) -> list[tuple[Path, Any]]:
    """``[(path, leaf), ...]`` in the module docstring's order."""
    if isinstance(value, dict):
        return [leaf for k, v in value.items() for leaf in flatten_with_paths(v, (*prefix, k))]
    if isinstance(value, list | tuple):
        return [leaf for i, v in enumerate(value) for leaf in flatten_with_paths(v, (*prefix, i))]
    return [(prefix, value)]


def flatten_outputs(value: Any) -> list[Any]:
    """The leaves of ``value`` in the module docstring's order."""
    return [leaf for _, leaf in flatten_with_paths(value)]
