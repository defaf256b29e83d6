"""The traced forward returns what PyTorch's own forward returns — checked once on a sample input.

A trace can take another Python path than an eager call where the forward inspects a value's
*type*: ``isinstance(h, tuple)`` on a traced value, ``type(x) is torch.Tensor``, a ``try`` that
only fails on a proxy. The graph then computes something else (typically: returns ``(h, c)``
where eager code returns ``h``), and only ``verify`` would notice.

Contract: :func:`check_same_outputs` runs the module (eval mode, no grad) and the traced
``GraphModule`` on the same sample arguments (``samples.sample_args`` at the first sample sizes)
and compares the flattened outputs (``util.outputs``: count, then each tensor's shape and dtype).
A difference is exit 3 naming both structures. An eager call that raises on the sample is not
judged here (the trace's own sample runs stand).
"""

from __future__ import annotations

from typing import Any

from seqgate.errors import Unsupported, UnsupportedModelError


def _summary(value: Any) -> list[str]:
    import torch

    from seqgate.util.outputs import flatten_outputs

    out = []
    for leaf in flatten_outputs(value):
        if isinstance(leaf, torch.Tensor):
            out.append(f"{str(leaf.dtype).removeprefix('torch.')}{list(leaf.shape)}")
        elif leaf is not None:
            out.append(type(leaf).__name__)
    return out


def check_same_outputs(module: Any, gm: Any, args: list[Any], label: str) -> None:
    """Refuse (exit 3) when the traced ``gm`` and ``module`` return different output structures."""
    import torch

    with torch.no_grad():
        try:
            eager = _summary(module(*args))
        except Exception:
            return
        traced = _summary(gm(*args))
    if eager == traced:
        return
    raise UnsupportedModelError(label, [Unsupported(
        label,
        f"the traced forward returns {len(traced)} value(s) ({', '.join(traced) or 'none'}) where "
        f"PyTorch's own forward returns {len(eager)} ({', '.join(eager) or 'none'}) on the same sample "
        "input: a Python check on a value's type (isinstance, type(...) is) took another path "
        "while tracing",
        "decide such choices on a constructor argument, or return the same structure either way")])
