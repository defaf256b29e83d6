"""Shared test fixtures. Heavy frameworks are imported only by the tests that use them."""

from __future__ import annotations

import os

import numpy as np
import pytest

os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "3")
os.environ.setdefault("KERAS_BACKEND", "tensorflow")


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator; each test gets the same stream."""
    return np.random.default_rng(1234)


@pytest.fixture(scope="session")
def keras():  # type: ignore[no-untyped-def]
    """Keras 3 on TensorFlow, imported quietly once per session."""
    from seqgate.util.frameworks import import_keras

    return import_keras()
