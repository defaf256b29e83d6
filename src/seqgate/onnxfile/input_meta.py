"""What an export records about its inputs beyond name, type and dims (``metadata_props``).

- ``seqgate.input_structure``: forward() parameters built from several ONNX inputs
  (``--input batch.encoder_cont:...``): ``{PARAM: {"kind": "dict" | "dataclass", "class":
  "module.Qualname" (dataclass only), "keys": {KEY: ONNX input name}}}``. The PyTorch runner
  rebuilds each structure from these inputs, so verify and profile feed the source what the
  export traced, without the user repeating the options.
- ``seqgate.input_ranges``: ``{ONNX input: {"low": L, "high": H}}``, the inclusive value range
  of an integer input (``--input lengths:batch:int64=1..time``); a bound is an int or a dim
  name (``time``, ``time-1``) taken at the size the window set gives it.
"""

from __future__ import annotations

import json
from typing import Any

STRUCTURE_KEY = "seqgate.input_structure"
RANGES_KEY = "seqgate.input_ranges"


def _read(model: Any, key: str) -> dict[str, Any]:
    for p in model.metadata_props:
        if p.key == key:
            value = json.loads(p.value)
            return value if isinstance(value, dict) else {}
    return {}


def read_structure(model: Any) -> dict[str, Any]:
    """``seqgate.input_structure`` of an ONNX ModelProto ({} when its inputs are plain tensors)."""
    return _read(model, STRUCTURE_KEY)


def read_ranges(model: Any) -> dict[str, dict[str, int | str]]:
    """``seqgate.input_ranges`` of an ONNX ModelProto ({} when no input declares one)."""
    return _read(model, RANGES_KEY)
