"""Lazy, quiet imports of the heavy frameworks. Nothing here runs at ``import seqgate``."""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator
from types import ModuleType

from seqgate.errors import BadInputError


@contextlib.contextmanager
def quiet_stderr() -> Iterator[None]:
    """Send fd 2 to /dev/null for the duration: TensorFlow prints C++ banners at import."""
    try:
        saved = os.dup(2)
    except OSError:  # no fd 2 (embedded interpreters)
        yield
        return
    devnull = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(devnull, 2)
        yield
    finally:
        os.dup2(saved, 2)
        os.close(saved)
        os.close(devnull)


def import_keras() -> ModuleType:
    """Import Keras 3 on the TensorFlow backend, quietly; clear error if it is missing."""
    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "3")
    os.environ.setdefault("KERAS_BACKEND", "tensorflow")
    try:
        with quiet_stderr():
            import tensorflow as tf

            tf.get_logger().setLevel("ERROR")
            import keras
    except ImportError as e:
        raise BadInputError(
            "this command needs Keras 3 with TensorFlow, which is not installed here; "
            "install the extra with `pip install 'seqgate[keras]'` (or run scripts/setup)."
        ) from e
    return keras


def import_torch() -> ModuleType:
    """Import PyTorch; clear error if it is missing."""
    try:
        import torch
    except ImportError as e:
        raise BadInputError(
            "this command needs PyTorch, which is not installed here; install the extra with "
            "`pip install 'seqgate[torch]'` (or run scripts/setup)."
        ) from e
    return torch


def version_of(module: str) -> str:
    """Installed version of a distribution, or "" when absent (no import of the package)."""
    from importlib import metadata

    try:
        return metadata.version(module)
    except metadata.PackageNotFoundError:
        return ""
