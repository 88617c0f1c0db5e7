"""Shared test set-up: a private numba/loop cache per test session, so tests never depend on
what an earlier run left in the user's cache."""
import os
import tempfile

import pytest

_CACHE = tempfile.mkdtemp(prefix="hilrig-test-cache-")
os.environ.setdefault("HILRIG_CACHE_DIR", _CACHE)

# the network guard (tests/netguard/sitecustomize.py): loopback, ipc and inproc only, in this
# process and in every process a test starts
_GUARD = os.path.join(os.path.dirname(os.path.abspath(__file__)), "netguard")
os.environ["PYTHONPATH"] = os.pathsep.join(
    [_GUARD] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p])
import importlib.util as _ilu  # noqa: E402

_spec = _ilu.spec_from_file_location("hilrig_test_netguard", os.path.join(_GUARD, "sitecustomize.py"))
_ilu.module_from_spec(_spec)
_spec.loader.exec_module(_ilu.module_from_spec(_spec))


@pytest.fixture(scope="session")
def demo_path():
    from importlib.resources import files
    return str(files("hilrig.runtime") / "data" / "demo.toml")
