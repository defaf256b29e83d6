"""forward()'s arguments from ONNX-named arrays: plain parameters, ``(h0, c0)`` pairs, structures.

Contract (the export's input rules, ``seqgate.export.torch.capture``):

- an ONNX input named like a forward() parameter feeds it;
- ``NAME_0``, ``NAME_1`` feed parameter ``NAME`` as a tuple (an LSTM's ``(h0, c0)`` passed whole);
- the inputs a ``seqgate.input_structure`` entry lists (``batch.encoder_cont``, ...) are gathered
  into that parameter: a dict ``{key: tensor}``, or the parameter's annotated dataclass built
  from keyword tensors ``Cls(key=tensor, ...)``.

Every tensor is ``torch.from_numpy`` of the array, so integer and bool arrays keep their dtype.
"""

from __future__ import annotations

import dataclasses
import inspect
from typing import Any

import numpy as np

from seqgate.errors import BadInputError


def forward_parameters(module: Any) -> list[str]:
    """The names of ``module.forward``'s parameters (empty when they cannot be read)."""
    try:
        return list(inspect.signature(module.forward).parameters)
    except (TypeError, ValueError):
        return []


def forward_kwargs(module: Any, feeds: dict[str, np.ndarray[Any, Any]],
                   structure: dict[str, Any] | None) -> dict[str, Any] | None:
    """Keyword arguments for ``module.forward`` (module docstring); None when some input fits
    no parameter (an ONNX file from elsewhere: the caller then passes arrays by position)."""
    import torch

    tensors = {k: torch.from_numpy(np.ascontiguousarray(v)) for k, v in feeds.items()}
    params = forward_parameters(module)
    kwargs: dict[str, Any] = {}
    for param, entry in (structure or {}).items():
        keys = {k: tensors.pop(onnx) for k, onnx in entry.get("keys", {}).items() if onnx in tensors}
        kwargs[param] = _build(module, param, entry, keys)
    for name in list(tensors):
        if name in params:
            kwargs[name] = tensors.pop(name)
    pairs: dict[str, list[tuple[int, Any]]] = {}
    for name in list(tensors):
        base, _, k = name.rpartition("_")
        if k.isdigit() and base in params:
            pairs.setdefault(base, []).append((int(k), tensors.pop(name)))
    for base, parts in pairs.items():
        kwargs[base] = tuple(t for _, t in sorted(parts, key=lambda p: p[0]))
    return None if tensors else kwargs


def _build(module: Any, param: str, entry: dict[str, Any], values: dict[str, Any]) -> Any:
    if entry.get("kind") != "dataclass":
        return values
    cls = _annotation(module, param)
    if not (isinstance(cls, type) and dataclasses.is_dataclass(cls)):
        raise BadInputError(
            f"the ONNX file feeds forward() parameter {param!r} as the dataclass {entry.get('class')}, "
            f"but the source's forward does not annotate {param!r} with a dataclass; verify the file "
            f"against the model it was exported from.")
    return cls(**values)


def _annotation(module: Any, param: str) -> Any:
    try:  # annotations written under `from __future__ import annotations` are strings
        sig = inspect.signature(module.forward, eval_str=True)
    except Exception:
        sig = inspect.signature(module.forward)
    p = sig.parameters.get(param)
    return None if p is None else p.annotation
