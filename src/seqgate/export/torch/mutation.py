"""A forward that changes the module's own tensors is refused, and the tensors are put back.

Contract: :func:`state_kept` snapshots every parameter and buffer of the module before seqgate
traces and runs it on sample inputs, and afterwards compares each one with its snapshot (bit for
bit; NaN equal to NaN). A tensor that changed means ``forward`` keeps state inside the module
across calls (``self.count[0] += 1``, a running statistic updated in place, a cache): one ONNX
graph computes one call from its inputs, so the export would freeze whatever value tracing left
behind while the source keeps changing. Such a module is refused (exit 3) naming the tensors;
the snapshots are copied back either way, so the caller's module is as it was.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from seqgate.errors import Unsupported, UnsupportedModelError


@contextmanager
def state_kept(module: Any, label: str) -> Iterator[None]:
    """Run the block; refuse (after restoring them) when it changed the module's tensors."""
    import torch

    tensors = dict(module.state_dict(keep_vars=True))
    before = {name: t.detach().clone() for name, t in tensors.items() if isinstance(t, torch.Tensor)}
    failed = True
    try:
        yield
        failed = False
    finally:
        changed = [name for name, old in before.items() if not _same(tensors[name].detach(), old)]
        with torch.no_grad():
            for name in changed:
                tensors[name].copy_(before[name])
    if changed and not failed:
        shown = ", ".join(changed[:5]) + (f" and {len(changed) - 5} more" if len(changed) > 5 else "")
        raise UnsupportedModelError(label, [Unsupported(
            f"{type(module).__name__}.forward",
            f"changes the module's own tensors ({shown}) when it runs, i.e. keeps state inside the module "
            "across calls; one ONNX graph computes one call from its inputs, so it would freeze the value "
            "left by tracing",
            "pass that state in as a forward() input and return its new value (a streaming model carries "
            "it between calls), or compute it without writing into the module")])


def _same(a: Any, b: Any) -> bool:
    import torch

    if a.shape != b.shape or a.dtype != b.dtype:
        return False
    if a.is_floating_point() or a.is_complex():
        return bool(torch.equal(a, b) or torch.all((a == b) | (torch.isnan(a) & torch.isnan(b))))
    return bool(torch.equal(a, b))
