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
# files atomically). Tests that judge wall-clock timing or wait on a peer process with a
# timeout (paced runs, the bridge, the live view, watchdog suites, killed processes) run alone:
# each takes an exclusive lock, every other test a shared one, and a waiting exclusive test
# stops new shared ones from starting (a turnstile), so it is never starved.
import fcntl  # noqa: E402

_LOCKS = os.environ.setdefault("HILRIG_TEST_LOCKS", tempfile.mkdtemp(prefix="hilrig-test-locks-"))

#: test modules that run alone (file names); a new module of this kind belongs here
ALONE = {
    "test_bridge_bad_frames.py", "test_bridge_free_running.py", "test_bridge_lockstep.py",
    "test_bridge_second_client.py", "test_cli.py", "test_interlock_suite.py", "test_kill.py",
    "test_live_view.py", "test_paced.py", "test_pacedwrite.py", "test_protocol_example.py",
    "test_report.py", "test_sensor_chain.py", "test_smoke_matrix.py", "test_telemetry_keys.py",
    "test_transport_pair.py", "test_protocol.py",
}


def pytest_collection_modifyitems(config, items):
    for item in items:
        if item.path.name in ALONE:
            item.add_marker(pytest.mark.alone)


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_protocol(item, nextitem):
    if not os.environ.get("PYTEST_XDIST_WORKER"):
        yield
        return
    alone = item.get_closest_marker("alone") is not None
    with open(os.path.join(_LOCKS, "turnstile"), "a+") as turn, \
            open(os.path.join(_LOCKS, "tests"), "a+") as lock:
        fcntl.flock(turn, fcntl.LOCK_EX)
        fcntl.flock(lock, fcntl.LOCK_EX if alone else fcntl.LOCK_SH)
        fcntl.flock(turn, fcntl.LOCK_UN)
        try:
            yield
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)
