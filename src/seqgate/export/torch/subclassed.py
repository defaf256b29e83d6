"""``nn.LSTM``/``nn.GRU``/``nn.RNN`` subclasses whose own ``forward`` calls ``super().forward(...)``.

A subclass that packs, pads or reorders axes around the base layer (``x = x.transpose(0, 1);
out, h = super().forward(x, hx)``) is not a leaf of the trace: its own ``forward`` is traced
like any other code. The call of the base layer's ``forward`` becomes one fx node
``recurrent_base_forward(module, *args, **kwargs)`` (``module`` a ``get_attr`` of the
subclass instance), which computes exactly ``Base.forward(module, *args, **kwargs)`` and is
mapped like the base layer (``modules.base_forward_call``): one native node per stacked layer,
probes named ``<qualname>/l<k>/…`` with ``source.base_forward = true`` so the PyTorch runner
reads the states at the base call, not at the subclass's own return.

While tracing (:func:`base_calls_traced`), each such instance gets a ``forward`` placed just
before the base class's in its method order (``util.mro``); it records the node when its
arguments hold traced values and runs the base ``forward`` otherwise (an eager sample run).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from seqgate.util.mro import insert_before_base


def recurrent_base(m: Any) -> type | None:
    """The built-in recurrent class ``m`` derives from (``nn.LSTM``/``GRU``/``RNN``), if any."""
    from torch import nn

    return next((c for c in type(m).__mro__ if c in (nn.LSTM, nn.GRU, nn.RNN)), None)


def overrides_forward(m: Any) -> bool:
    """Is ``m`` an instance of a recurrent subclass with a ``forward`` of its own?"""
    base = recurrent_base(m)
    return base is not None and type(m).forward is not base.forward


def recurrent_base_forward(module: Any, *args: Any, **kwargs: Any) -> Any:
    """``Base.forward(module, ...)`` for the built-in recurrent class ``module`` derives from."""
    base = recurrent_base(module)
    assert base is not None, f"{type(module).__name__} is not a recurrent module"
    return base.forward(module, *args, **kwargs)


def is_base_forward(node: Any) -> bool:
    return node.op == "call_function" and node.target is recurrent_base_forward


def _has_proxy(v: Any) -> Any:
    import torch.fx

    if isinstance(v, torch.fx.Proxy):
        return v
    if isinstance(v, list | tuple):
        return next((p for p in map(_has_proxy, v) if p is not None), None)
    if isinstance(v, dict):
        return _has_proxy(list(v.values()))
    return None


@contextmanager
def base_calls_traced(root: Any) -> Iterator[None]:
    """During a trace of ``root``: base-forward calls of overriding subclasses become nodes."""
    names = {id(m): name for name, m in root.named_modules()}
    swapped: list[tuple[Any, type]] = []

    def forward(self: Any, *args: Any, **kwargs: Any) -> Any:
        p = _has_proxy((args, kwargs))
        if p is None:  # an eager run on sample values
            return recurrent_base_forward(self, *args, **kwargs)
        tracer = p.tracer
        mod = tracer.create_proxy("get_attr", names[id(self)], (), {})
        out = tracer.create_proxy("call_function", recurrent_base_forward, (mod, *args), kwargs)
        as_items = getattr(tracer, "as_items", None)  # the value-carrying trace: (out, (h, c)) as a tuple
        return out if as_items is None else as_items(out)

    try:
        for m in root.modules():
            base = recurrent_base(m)
            if base is not None and overrides_forward(m) and id(m) in names:
                swapped.append((m, insert_before_base(m, base, {"forward": forward})))
        yield
    finally:
        for m, cls in swapped:
            m.__class__ = cls


def module_call(gm: Any, node: Any) -> tuple[Any, tuple[Any, ...], dict[str, Any]]:
    """(module, args, kwargs) of a ``recurrent_base_forward`` node."""
    return gm.get_submodule(str(node.args[0].target)), tuple(node.args[1:]), dict(node.kwargs)
