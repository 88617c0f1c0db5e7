"""Two test processes at once (pytest-xdist), and tests that must run alone.

Every test holds a lock on a file shared by the test processes while it runs (set up,
call, tear down): a shared lock normally, an exclusive one for a test marked ``alone`` (wall-clock
timing, a peer's short timeout). A test waiting for the exclusive lock holds a turnstile that
keeps new shared locks from starting, so it is never starved. ``exclusive()`` lets a part of a
test (a module fixture's timing-sensitive step) run alone. Without xdist nothing is locked.
"""
from __future__ import annotations

import contextlib
import fcntl
import os
import tempfile

DIR = os.environ.setdefault("HILRIG_TEST_LOCKS", tempfile.mkdtemp(prefix="hilrig-test-locks-"))
#: the lock file this process holds while its current test runs (None between tests)
_held = None


def _active() -> bool:
    return bool(os.environ.get("PYTEST_XDIST_WORKER"))


def _take(fh, mode: int) -> None:
    with open(os.path.join(DIR, "turnstile"), "a+") as turn:
        fcntl.flock(turn, fcntl.LOCK_EX)
        fcntl.flock(fh, mode)
        fcntl.flock(turn, fcntl.LOCK_UN)


@contextlib.contextmanager
def held(alone: bool):
    """The lock of one test: exclusive when it runs alone, shared otherwise."""
    global _held
    if not _active():
        yield
        return
    with open(os.path.join(DIR, "tests"), "a+") as fh:
        _take(fh, fcntl.LOCK_EX if alone else fcntl.LOCK_SH)
        _held = fh
        try:
            yield
        finally:
            _held = None
            fcntl.flock(fh, fcntl.LOCK_UN)


@contextlib.contextmanager
def exclusive():
    """Run this block alone (the current test's shared lock becomes exclusive, then shared
    again)."""
    fh = _held
    if fh is None:
        yield
        return
    # not through the turnstile: a test waiting there for its exclusive lock holds it, and
    # waits for this test's shared lock, which the conversion gives up first (flock converts a
    # lock by removing it, then waiting for the new one); that test runs, then this block
    fcntl.flock(fh, fcntl.LOCK_EX)
    try:
        yield
    finally:
        fcntl.flock(fh, fcntl.LOCK_SH)
