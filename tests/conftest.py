from __future__ import annotations

import threading
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.model_fixtures import make_tiny_model


@pytest.fixture
def tiny_model_manifest(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Manifest of a tiny fixed-function ONNX model (64 x 64 grid at 1 mm)."""
    return make_tiny_model(tmp_path_factory.mktemp("tiny_model"))


@pytest.fixture(autouse=True)
def no_leaked_threads() -> Iterator[None]:
    """Fail any test that leaves a thread running (watchdog's conftest does the same)."""
    before = set(threading.enumerate())
    yield
    leaked = [t for t in threading.enumerate() if t not in before and t.is_alive() and not t.daemon]
    for t in leaked:
        t.join(timeout=5)
    still = [t.name for t in leaked if t.is_alive()]
    assert not still, f"test leaked threads: {still}"
