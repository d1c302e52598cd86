"""Shared fixtures of the oracle's tests: lazily imported reference libraries.

TensorFlow costs seconds to import, so it is imported only by the tests that
ask for it. Setting REFNORM_ERROR_LOG=<file> makes a run write the worst
relative error seen per comparison (tests/strategies.py: assert_close) to that
file as JSON; use it without xdist (-p no:xdist), since each worker keeps its own.
"""

from __future__ import annotations

import json
import os
from types import SimpleNamespace

import pytest


@pytest.fixture(scope="session")
def torch():
    """The torch module (the test is skipped where torch is not installed)."""
    return pytest.importorskip("torch")


@pytest.fixture(scope="session")
def tfk():
    """SimpleNamespace(tf=tensorflow, keras=keras) with the TensorFlow backend of Keras 3."""
    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
    os.environ.setdefault("KERAS_BACKEND", "tensorflow")
    tf = pytest.importorskip("tensorflow")
    keras = pytest.importorskip("keras")
    if keras.backend.backend() != "tensorflow":
        pytest.skip(f"keras backend is {keras.backend.backend()!r}; these checks need 'tensorflow'")
    return SimpleNamespace(tf=tf, keras=keras)


def pytest_sessionfinish(session, exitstatus):
    path = os.environ.get("REFNORM_ERROR_LOG")
    if not path:
        return
    try:
        from strategies import WORST
    except ImportError:  # pragma: no cover - strategies.py sits beside this file
        return
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(dict(sorted(WORST.items())), fh, indent=1)
