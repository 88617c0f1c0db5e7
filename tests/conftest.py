"""Shared test set-up: a private numba/loop cache per test session, so tests never depend on
what an earlier run left in the user's cache."""
import os
import tempfile

import pytest

_CACHE = tempfile.mkdtemp(prefix="hilrig-test-cache-")
os.environ.setdefault("HILRIG_CACHE_DIR", _CACHE)


@pytest.fixture(scope="session")
def demo_path():
    from importlib.resources import files
    return str(files("hilrig.runtime") / "data" / "demo.toml")
