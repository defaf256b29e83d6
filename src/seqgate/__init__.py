"""seqgate: export recurrent Keras/PyTorch models to ONNX, verify every hidden state, profile
CPU latency, and gate releases.

The Python API mirrors the commands; each name is loaded on first use, so ``import seqgate``
imports no framework::

    import seqgate

    seqgate.export("forecaster.keras", "forecaster.onnx")             # -> ExportResult
    seqgate.verify("forecaster.onnx", source="forecaster.keras",
                   recordings=["field_week.npz"])                     # -> VerifyReport
    seqgate.profile("forecaster.onnx", seq_lens=[16, 64])             # -> ProfileReport
    seqgate.gate("gate.toml")                                         # -> GateReport
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"
__all__ = ["__version__", "export", "gate", "profile", "verify"]

_API = ("export", "verify", "profile", "gate")


def __getattr__(name: str) -> Any:
    if name in _API:
        return importlib.import_module(f"seqgate.{name}")
    raise AttributeError(f"module 'seqgate' has no attribute {name!r}")
