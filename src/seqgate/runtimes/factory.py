"""Open the runner of a model source: the one entry point verify and profile both use.

``open_source_runner`` loads the source safely (Keras ``safe_mode=True``; PyTorch factory plus
``torch.load(weights_only=True)``) and wraps it in :class:`~seqgate.runtimes.keras.KerasRunner`
or :class:`~seqgate.runtimes.torch.TorchRunner`. ``threads``: TensorFlow fixes its thread pools
when its runtime starts, so for Keras the count (inter-op 1) is requested *before* loading;
PyTorch takes it per timed call.
"""

from __future__ import annotations

import contextlib
from typing import Any

from seqgate.onnxfile.probes import Probe
from seqgate.sources.spec import Source

SourceRunner = Any  # KerasRunner | TorchRunner (imported lazily: they import the frameworks)


def load_source_model(src: Source, threads: int | None = None) -> Any:
    """The loaded Keras model or PyTorch module of ``src`` (imports its framework here, lazily)."""
    if src.framework == "keras":
        from seqgate.sources.keras import load_keras
        from seqgate.util.frameworks import import_keras

        import_keras()
        if threads is not None:
            import tensorflow as tf

            with contextlib.suppress(RuntimeError):  # raised once TensorFlow's runtime has started
                tf.config.threading.set_intra_op_parallelism_threads(threads)
                tf.config.threading.set_inter_op_parallelism_threads(1)
        assert src.path is not None
        return load_keras(src.path, src.custom_code)
    from seqgate.sources.torch import load_torch

    return load_torch(src)


def open_source_runner(src: Source, probes: list[Probe], output_names: list[str], states: bool = True,
                       threads: int | None = None, loaded: Any = None,
                       structure: dict[str, Any] | None = None) -> SourceRunner:
    """The runner for ``src``; ``loaded`` is the model when the caller loaded it already;
    ``structure`` is the ONNX file's ``seqgate.input_structure`` (PyTorch dict/dataclass inputs)."""
    loaded = load_source_model(src, threads) if loaded is None else loaded
    if src.framework == "keras":
        from seqgate.runtimes.keras import KerasRunner

        return KerasRunner(loaded, probes, output_names, states)
    from seqgate.runtimes.torch import TorchRunner

    return TorchRunner(loaded, probes, output_names, states, structure)
