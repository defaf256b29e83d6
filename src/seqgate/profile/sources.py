"""The source framework side of ``seqgate profile``: the same inputs through Keras or PyTorch.

- Keras: the model loaded with ``safe_mode=True`` and called through one ``tf.function`` whose
  input signature has the batch and time dims unknown, so it is traced once (during warm-up)
  and every timed call runs the compiled graph. TensorFlow fixes its thread pools when its
  runtime starts; seqgate asks for the sweep's first thread count (inter-op 1) before loading,
  and each point records the intra-op count TensorFlow really uses (``framework_threads``,
  0 = TensorFlow's default, one per core).
- PyTorch: the module from ``seqgate.sources_torch.load_torch`` in ``eval()`` mode, called eagerly
  under ``torch.inference_mode()`` with ``torch.set_num_threads`` set to the point's threads
  (restored afterwards).

Inputs are passed in the ONNX graph's input order, which the exporters keep from the source.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator, Sequence
from typing import Any

import numpy as np

from seqgate.profile.inputs import InputPlan
from seqgate.sources.keras import load_keras
from seqgate.sources.spec import Source


class KerasRunner:
    """A Keras model behind one compiled ``tf.function``."""

    runtime = "keras"

    def __init__(self, src: Source, plans: Sequence[InputPlan], first_threads: int) -> None:
        from seqgate.util.frameworks import import_keras, quiet_stderr

        import_keras()
        import tensorflow as tf

        self._tf = tf
        with contextlib.suppress(RuntimeError):  # raised once TensorFlow's runtime has started
            tf.config.threading.set_intra_op_parallelism_threads(first_threads)
            tf.config.threading.set_inter_op_parallelism_threads(1)
        assert src.path is not None
        self.model = load_keras(src.path)
        self._names = [p.name for p in plans]
        sig = [tf.TensorSpec([d if isinstance(d, int) else None for d in p.dims], tf.as_dtype(p.dtype))
               for p in plans]
        model = self.model
        single = len(plans) == 1

        def call(*xs: Any) -> Any:
            return model(xs[0] if single else list(xs), training=False)

        with quiet_stderr():
            self._fn = tf.function(call, input_signature=sig)

    def framework_threads(self) -> int:
        return int(self._tf.config.threading.get_intra_op_parallelism_threads())

    @contextlib.contextmanager
    def bind(self, feeds: dict[str, np.ndarray[Any, Any]], threads: int) -> Iterator[Callable[[], Any]]:
        """Yield a zero-argument call running the compiled model on ``feeds`` (tensors made once)."""
        tensors = [self._tf.constant(feeds[n]) for n in self._names]
        fn = self._fn
        yield lambda: fn(*tensors)

    @staticmethod
    def outputs(result: Any) -> list[np.ndarray[Any, Any]]:
        return [np.asarray(r) for r in _flatten(result)]


class TorchRunner:
    """A PyTorch module called eagerly under ``inference_mode``."""

    runtime = "torch"

    def __init__(self, src: Source, plans: Sequence[InputPlan]) -> None:
        from seqgate.util.frameworks import import_torch

        self._torch = import_torch()
        load_torch = _torch_loader()
        self.model = load_torch(src)
        self.model.eval()
        self._names = [p.name for p in plans]
        self._threads = 0

    def framework_threads(self) -> int:
        return self._threads

    @contextlib.contextmanager
    def bind(self, feeds: dict[str, np.ndarray[Any, Any]], threads: int) -> Iterator[Callable[[], Any]]:
        """Yield a zero-argument eager call; threads and inference mode hold while it is used."""
        torch = self._torch
        tensors = [torch.from_numpy(np.ascontiguousarray(feeds[n])) for n in self._names]
        previous = torch.get_num_threads()
        torch.set_num_threads(threads)
        self._threads = torch.get_num_threads()
        module = self.model
        try:
            with torch.inference_mode():
                yield lambda: module(*tensors)
        finally:
            torch.set_num_threads(previous)

    @staticmethod
    def outputs(result: Any) -> list[np.ndarray[Any, Any]]:
        return [r.detach().cpu().numpy() if hasattr(r, "detach") else np.asarray(r) for r in _flatten(result)]


SourceRunner = KerasRunner | TorchRunner


def open_source(src: Source, plans: Sequence[InputPlan], threads: Sequence[int]) -> SourceRunner:
    """Load the source for timing (framework imported here, lazily)."""
    if src.framework == "keras":
        return KerasRunner(src, plans, threads[0])
    return TorchRunner(src, plans)


def _torch_loader() -> Callable[[Source], Any]:
    from seqgate.errors import BadInputError

    try:
        from seqgate.sources.torch import load_torch
    except ImportError as e:
        raise BadInputError(
            "PyTorch sources cannot be loaded by this seqgate build (seqgate.sources_torch is "
            "missing); profile without --source, or with a Keras source."
        ) from e
    return load_torch


def _flatten(result: Any) -> list[Any]:
    if isinstance(result, dict):
        return [v for k in sorted(result) for v in _flatten(result[k])]
    if isinstance(result, list | tuple):
        return [v for r in result for v in _flatten(r)]
    return [result]
