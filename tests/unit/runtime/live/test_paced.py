"""Paced mode's timing verdict and its real-time requests to the operating system.

The verdict: a deadline miss is a tick whose work ends after the next tick's deadline, the
implicit-deadline model of periodic real-time tasks (deadline = period; Liu and Layland,
"Scheduling Algorithms for Multiprogramming in a Hard-Real-Time Environment", J. ACM 20(1),
1973, from memory). A limit is "at most": a value equal to it is met (common practice, no
source). The figures fed in are invented test values.

The requests: SCHED_FIFO through ``os.sched_setscheduler`` and ``mlockall`` (Linux man pages
sched_setscheduler(2), mlock(2), from memory: EPERM without CAP_SYS_NICE or RLIMIT_RTPRIO,
ENOMEM above RLIMIT_MEMLOCK without CAP_IPC_LOCK). A refusal is mocked where the machine would
grant it; the real request is checked against what the kernel then reports for this thread
(``os.sched_getscheduler``, VmLck of /proc/self/status), so the test holds whether it runs
as root or not.
"""
import errno
import math
import os
import sys

import pytest

from hilrig.runtime.live import paced
from hilrig.runtime.live.paced import (RealtimeRequests, locked_kib, realtime_text, timing_verdict,
                                  verdict_text)

LIMITS = {"miss_share_max": 0.01, "max_lateness": 1e-3}
linux = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="Linux scheduler calls")


# ---------------------------------------------------------------------------------------------
# verdict


def test_the_reported_run_is_not_met_on_both_counts():
    # the run of the issue: 22,463 deadline misses in 179,333 ticks (12.53 %), largest
    # lateness 17 ms, against 1 % and 1 ms
    v = timing_verdict(179_333, 22_463, 17e-3, LIMITS)
    assert v["timing_met"] is False
    assert v["miss_share"] == pytest.approx(22_463 / 179_333)
    assert v["miss_share_max"] == 0.01 and v["max_lateness_limit_s"] == 1e-3
    assert v["max_lateness_s"] == 17e-3 and v["deadline_misses"] == 22_463
    assert len(v["reasons"]) == 2
    assert "12.526% of ticks (22463 of 179333)" in v["reasons"][0]
    assert "paced.miss_share_max = 1.000%" in v["reasons"][0]
    assert "largest lateness 17 ms" in v["reasons"][1]
    assert "paced.max_lateness = 1 ms" in v["reasons"][1]
    assert verdict_text(v).startswith("timing not met: deadline misses in 12.526%")


def test_limits_are_at_most_and_each_breach_is_its_own_reason():
    # exactly at both limits: met (100 of 10000 = 1 %, lateness 1 ms)
    v = timing_verdict(10_000, 100, 1e-3, LIMITS)
    assert v["timing_met"] is True and v["reasons"] == [] and v["note"] is None
    assert verdict_text(v).startswith("met: misses 1.000% (limit 1.000%)")
    # one more miss, or one nanosecond more lateness: not met, with that reason alone
    v = timing_verdict(10_000, 101, 1e-3, LIMITS)
    assert not v["timing_met"] and len(v["reasons"]) == 1 and "miss_share_max" in v["reasons"][0]
    v = timing_verdict(10_000, 0, 1e-3 + 1e-9, LIMITS)
    assert not v["timing_met"] and len(v["reasons"]) == 1 and "max_lateness" in v["reasons"][0]


def test_a_lateness_limit_of_one_nanosecond_is_breached_by_any_real_lateness():
    v = timing_verdict(5000, 0, 3e-9, {"miss_share_max": 1.0, "max_lateness": 1e-9})
    assert not v["timing_met"]
    assert v["reasons"] == ["largest lateness 3 ns, above paced.max_lateness = 1 ns"]


def test_a_lateness_that_is_not_a_number_breaches_and_no_ticks_meet():
    assert not timing_verdict(100, 0, math.nan, LIMITS)["timing_met"]
    v = timing_verdict(0, 0, 0.0, LIMITS)
    assert v["timing_met"] and v["miss_share"] == 0.0


def test_a_stall_of_the_throttling_gap_gets_a_note():
    # RT throttling at 950000 of 1000000 us leaves other tasks 50 ms per period
    v = timing_verdict(60_000, 3258, 52.1e-3, LIMITS, throttle_gap_s=50e-3)
    assert not v["timing_met"] and "RT throttling's 50 ms" in v["note"]
    assert "isolcpus" in verdict_text(v)
    # a lateness far below the gap: no note
    assert timing_verdict(60_000, 0, 5e-3, LIMITS, throttle_gap_s=50e-3)["note"] is None


# ---------------------------------------------------------------------------------------------
# real-time requests


@pytest.fixture
def policy_before():
    before = (os.sched_getscheduler(0), os.sched_getparam(0).sched_priority)
    yield before
    # whatever a test did, this thread leaves it as it found it
    assert (os.sched_getscheduler(0), os.sched_getparam(0).sched_priority) == before


def _on(monkeypatch):
    """RT throttling read as on (the default 950000 of 1000000 us), whatever this host has."""
    monkeypatch.setattr(paced, "rt_throttling",
                        lambda: {"runtime_us": 950000, "period_us": 1000000, "on": True})


@linux
def test_refused_requests_are_reported_with_errno_and_limit(monkeypatch, policy_before):
    _on(monkeypatch)

    def refuse(*args):
        raise PermissionError(errno.EPERM, "Operation not permitted")

    monkeypatch.setattr(os, "sched_setscheduler", refuse)
    monkeypatch.setattr(paced, "_mlockall", lambda: errno.ENOMEM)
    monkeypatch.setattr(paced, "locked_kib", lambda: 0)
    r = RealtimeRequests(49)
    r.ask()
    d = r.as_dict()
    sc, ml = d["scheduling"], d["memory_lock"]
    assert d["asked"] and sc["asked"] and ml["asked"]
    assert sc["granted"] is False and ml["granted"] is False
    assert sc["refused"].startswith("EPERM: ") and "CAP_SYS_NICE" in sc["refused"]
    assert "RLIMIT_RTPRIO >= 49" in sc["refused"]
    assert ml["refused"].startswith("ENOMEM: ") and "RLIMIT_MEMLOCK" in ml["refused"]
    r.release()
    assert r.as_dict()["restored"] is None  # nothing was granted, nothing to restore
    text = realtime_text(r.as_dict(), pinned_core=1)
    assert "SCHED_FIFO refused: EPERM" in text and "memory lock refused: ENOMEM" in text
    assert "pinned to core 1" in text and "RT throttling 950000 of 1000000 us" in text


def _isolated(monkeypatch, tmp_path, text):
    f = tmp_path / "isolated"
    f.write_text(text + "\n")  # the kernel's format: a CPU list and a newline
    monkeypatch.setattr(paced, "ISOLATED", f)


def test_isolated_cores_are_read_from_the_kernels_cpu_list(monkeypatch, tmp_path):
    _isolated(monkeypatch, tmp_path, "2-3,5")
    assert paced.isolated_cores() == {2, 3, 5}
    _isolated(monkeypatch, tmp_path, "")
    assert paced.isolated_cores() == set()
    monkeypatch.setattr(paced, "ISOLATED", tmp_path / "missing")
    assert paced.isolated_cores() == set()


def _must_not_be_called(*args):
    raise AssertionError("SCHED_FIFO asked for")


@linux
def test_without_rt_throttling_the_real_time_policy_is_not_asked(monkeypatch, tmp_path,
                                                                 policy_before):
    monkeypatch.setattr(paced, "rt_throttling",
                        lambda: {"runtime_us": -1, "period_us": 1000000, "on": False})
    _isolated(monkeypatch, tmp_path, "3")  # another core is isolated, not the loop's
    monkeypatch.setattr(os, "sched_setscheduler", _must_not_be_called)
    monkeypatch.setattr(paced, "_mlockall", lambda: errno.ENOMEM)
    r = RealtimeRequests(49)
    r.ask(1)
    sc = r.as_dict()["scheduling"]
    assert sc["asked"] is False and sc["granted"] is False
    assert sc["refused"].startswith("not asked: RT throttling is off (sched_rt_runtime_us = -1)")
    assert "not isolated" in sc["refused"] and "isolcpus" in sc["refused"]
    assert "SCHED_FIFO not asked: RT throttling is off" in realtime_text(r.as_dict())
    assert "RT throttling off (-1)" in realtime_text(r.as_dict())


@linux
def test_without_rt_throttling_an_isolated_core_is_asked_for(monkeypatch, tmp_path,
                                                             policy_before):
    # isolated core and throttling off: the usual set-up for a real-time core; the request
    # goes out (refused here by a mock, so that this thread's policy stays as it is)
    monkeypatch.setattr(paced, "rt_throttling",
                        lambda: {"runtime_us": -1, "period_us": 1000000, "on": False})
    _isolated(monkeypatch, tmp_path, "1")
    asked = []

    def refuse(*args):
        asked.append(args)
        raise PermissionError(errno.EPERM, "Operation not permitted")

    monkeypatch.setattr(os, "sched_setscheduler", refuse)
    monkeypatch.setattr(paced, "_mlockall", lambda: errno.ENOMEM)
    r = RealtimeRequests(49)
    r.ask(1)
    assert len(asked) == 1 and asked[0][1] & ~getattr(os, "SCHED_RESET_ON_FORK", 0) == os.SCHED_FIFO
    d = r.as_dict()
    assert d["core_isolated"] is True and d["scheduling"]["asked"] is True
    assert "pinned to core 1 (isolated)" in realtime_text(d, 1)


@linux
def test_a_loop_that_shares_its_only_core_with_the_recorder_is_not_made_real_time(
        monkeypatch, policy_before):
    _on(monkeypatch)
    monkeypatch.setattr(os, "sched_setscheduler", _must_not_be_called)
    monkeypatch.setattr(paced, "_mlockall", lambda: errno.ENOMEM)
    r = RealtimeRequests(49)
    r.ask(None)  # not pinned: one core allowed
    sc = r.as_dict()["scheduling"]
    assert sc["asked"] is False and "one core only" in sc["refused"]


def test_switched_off_asks_for_nothing(monkeypatch):
    monkeypatch.setattr(os, "sched_setscheduler", lambda *a: pytest.fail("asked"))
    monkeypatch.setattr(paced, "_mlockall", lambda: pytest.fail("asked"))
    r = RealtimeRequests(49, asked=False, why_not="--no-realtime")
    r.ask()
    r.release()
    d = r.as_dict()
    assert d["asked"] is False and d["not_asked_because"] == "--no-realtime"
    assert not d["scheduling"]["asked"] and not d["memory_lock"]["asked"]
    assert realtime_text(d, None).startswith("not asked (--no-realtime); not pinned")


@linux
def test_what_is_reported_is_what_the_kernel_says_and_release_restores_it(monkeypatch,
                                                                          policy_before):
    # granted as root (CAP_SYS_NICE, CAP_IPC_LOCK), refused elsewhere: either way the report
    # must be what the kernel then shows for this thread, and release must undo it
    _on(monkeypatch)
    assert locked_kib() == 0, "test set-up: memory locked before the test"
    r = RealtimeRequests(30)
    try:
        r.ask()
        d = r.as_dict()
        flag = getattr(os, "SCHED_RESET_ON_FORK", 0)
        now = os.sched_getscheduler(0)
        if d["scheduling"]["granted"]:
            assert now & ~flag == os.SCHED_FIFO and now & flag
            assert os.sched_getparam(0).sched_priority == 30 == d["scheduling"]["priority"]
        else:
            assert d["scheduling"]["refused"] and (now, os.sched_getparam(0).sched_priority) == policy_before
        if d["memory_lock"]["granted"]:
            assert locked_kib() > 0 and d["memory_lock"]["locked_MiB"] > 0
        else:
            assert d["memory_lock"]["refused"] and locked_kib() == 0
        assert d["scheduling"]["previous"] == "SCHED_OTHER"
    finally:
        r.release()
        r.release()  # idempotent
    assert locked_kib() == 0
    granted = d["scheduling"]["granted"] or d["memory_lock"]["granted"]
    assert r.as_dict()["restored"] is (True if granted else None)
