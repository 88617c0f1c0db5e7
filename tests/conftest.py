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


# -- two test processes at once (pytest-xdist, `-n 2` in pyproject.toml) -------------------------
# Both processes share the loop cache above (HILRIG_CACHE_DIR, set before the workers start, so
# a combination compiled by one is loaded by the other; numba and the loop writer replace cache
# files atomically). Tests that judge wall-clock timing or wait on a peer process with a short
# timeout run alone (tests/locks.py): the modules in ALONE, and elsewhere the tests whose names
# say they are paced, lockstep, free-running or about a watchdog.
from tests import locks  # noqa: E402

#: test modules whose every test runs alone (file names); a new module of this kind belongs here
ALONE = {
    "test_bridge_bad_frames.py", "test_bridge_free_running.py", "test_bridge_lockstep.py",
    "test_bridge_second_client.py", "test_bridge_datagram.py", "test_fmu_live.py",
    "test_interlock_suite.py", "test_kill.py",
    "test_live_view.py", "test_paced.py", "test_pacedwrite.py", "test_protocol_example.py",
    "test_telemetry_keys.py", "test_transport_pair.py", "test_protocol.py",
}
#: words in a test's name that make it run alone in any module
ALONE_WORDS = ("paced", "lockstep", "free_running", "watchdog")


def pytest_collection_modifyitems(config, items):
    for item in items:
        if item.path.name in ALONE or any(w in item.name for w in ALONE_WORDS):
            item.add_marker(pytest.mark.alone)


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_protocol(item, nextitem):
    with locks.held(item.get_closest_marker("alone") is not None):
        yield
