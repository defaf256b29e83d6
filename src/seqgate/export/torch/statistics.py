"""Spread statistics: ``torch.var`` / ``torch.std`` and their tensor methods → ONNX reductions.

Imported only once torch is loaded (through ``registry``), like ``functions``.

Equations (PyTorch's documentation of ``torch.var``): over the reduced dims, with N the product
of their sizes (static, or read with Shape at run time), ``var = Σ(x − mean)² / (N − c)``,
``c`` the correction (1 by default, 0 for ``unbiased=False``); ``std = √var``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder, np_to_onnx_type
from seqgate.export.torch.functions import axes_of
from seqgate.export.torch.values import Table, TorchCall, want_tensor

TABLE = Table()  # merged in registry.py


@TABLE.add(torch.var, "Tensor.var", torch.std, "Tensor.std",
           sig=lambda input, dim=None, unbiased=None, keepdim=False, *, correction=None, out=None: None)
def _var(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    """``var = Σ(x − mean)² / (N − correction)`` over ``dim`` (N = their sizes' product; PyTorch's
    definition, correction 1 unless ``unbiased=False`` or given); ``std = √var``."""
    x = want_tensor(a["input"], "input")
    if a["unbiased"] is not None and a["correction"] is not None:
        raise Refusal("both unbiased and correction given")
    corr = a["correction"] if a["correction"] is not None else (0 if a["unbiased"] is False else 1)
    if isinstance(corr, bool) or not isinstance(corr, int | float):
        raise Refusal(f"correction={corr!r}", "pass a number")
    axes, keep = axes_of(x, a["dim"]), bool(a["keepdim"])
    xf = x.name if x.dtype == "float32" else b.op("Cast", [x.name], to=np_to_onnx_type(np.float32))
    dev = b.op("Sub", [xf, b.reduce("ReduceMean", xf, axes, keepdims=True)])
    var = b.reduce("ReduceMean", b.op("Mul", [dev, dev]), axes, keepdims=keep)
    if corr:
        sizes = [x.shape[ax] for ax in axes]
        if all(isinstance(n, int) for n in sizes):
            n = b.scalar(float(np.prod(sizes)), "count")  # type: ignore[arg-type]
        else:
            picked = b.op("Gather", [b.op("Shape", [x.name]), b.ints(axes, "axes")], axis=0)
            count = b.reduce("ReduceProd", picked, [0], keepdims=False)
            n = b.op("Cast", [count], to=np_to_onnx_type(np.float32))
        var = b.op("Div", [b.op("Mul", [var, n]), b.op("Sub", [n, b.scalar(float(corr), "correction")])])
    return b.op("Sqrt", [var]) if call.label.endswith("std") else var
