"""Paced mode: the in-process loop on the wall clock, one tick per tick period.

SIL runs as fast as it can; paced mode rehearses timing on a PC: tick k starts at
``t0 + k Ts`` on the monotonic clock. On x86-64 the compiled chunk itself waits for each
deadline, spinning on the cycle counter (:mod:`hilrig.runtime.clock`), so a whole chunk runs
without returning to Python; elsewhere Python sleeps until shortly before each deadline, spins
the rest (the timer slack is lowered to 1 ns where Linux allows) and calls the compiled tick.
Either way the tick is the same compiled code as SIL, and each tick's lateness (start after
its deadline) and compute time are recorded. The overrun watchdog sees the last tick's work
(lateness + compute, from its deadline to its end) against ``watchdogs.overrun_budget``.

The loop's process does nothing else between ticks: the recording is written by a child
process through shared memory (:mod:`hilrig.runtime.live.pacedwrite`), and the live view runs in
its own process.

Where the operating system permits it, the loop's thread runs at a real-time priority
(``SCHED_FIFO``) with its memory locked (``mlockall``), pinned to a core the recording process
keeps off (:class:`RealtimeRequests`); what was granted and what was refused, with the reason,
goes into the summary. The old scheduling policy and the unlocked memory come back right after
the last tick, also when the run fails.

After the run its timing is judged against ``[paced]`` limits (share of deadline misses,
largest lateness; :func:`timing_verdict`): ``summary["paced"]["verdict"]["timing_met"]``.

A paced run spins one core for its whole duration.
"""
from __future__ import annotations

import dataclasses
import errno
import os
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

from hilrig.safety.interlocks import W_FORCED, W_HOST_TIME

from .. import clock
from .. import loop as loopgen
from .pacedwrite import LatencyStats, ProcessWriter
from ..recording import SignalSpec
from ..run import (RunResult, _call, check_folder, chunk_args, compile_loop, default_folder,
                  execute, first_call, prepare)

#: sleep until this long before a deadline, then spin
SPIN_S = 300e-6

PR_SET_TIMERSLACK = 29


def lower_timer_slack() -> bool:
    """Ask Linux for 1 ns timer slack (default 50 us) for this thread; False where not possible."""
    try:
        import ctypes
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(PR_SET_TIMERSLACK, 1, 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def wait_until(deadline: float) -> float:
    """Sleep, then spin, until ``deadline`` (perf_counter seconds); return the time reached."""
    now = time.perf_counter()
    if deadline - now > SPIN_S:
        time.sleep(deadline - now - SPIN_S)
    while (now := time.perf_counter()) < deadline:
        pass
    return now


def pin_to_last_core() -> set[int] | None:
    """Run this process on its last allowed core (the recorder and the live view keep off
    it); return the previous affinity to restore, or None where not possible."""
    try:
        old = os.sched_getaffinity(0)
        if len(old) > 1:
            os.sched_setaffinity(0, {max(old)})
            return old
    except (AttributeError, OSError):
        pass
    return None


MCL_CURRENT, MCL_FUTURE = 1, 2  # <sys/mman.h> on Linux
RT_RUNTIME = Path("/proc/sys/kernel/sched_rt_runtime_us")
RT_PERIOD = Path("/proc/sys/kernel/sched_rt_period_us")
ISOLATED = Path("/sys/devices/system/cpu/isolated")


def _mlockall() -> int:
    """mlockall(MCL_CURRENT | MCL_FUTURE); 0 or the errno."""
    import ctypes
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return 0 if libc.mlockall(MCL_CURRENT | MCL_FUTURE) == 0 else ctypes.get_errno()
    except (OSError, AttributeError):
        return errno.ENOSYS


def _munlockall() -> int:
    import ctypes
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return 0 if libc.munlockall() == 0 else ctypes.get_errno()
    except (OSError, AttributeError):
        return errno.ENOSYS


def locked_kib() -> int | None:
    """This process's locked memory (VmLck of /proc/self/status) [KiB]; None where unknown."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmLck:"):
                return int(line.split()[1])
    except (OSError, ValueError, IndexError):
        pass
    return None


def _read_int(path: Path) -> int | None:
    try:
        return int(path.read_text().strip())
    except (OSError, ValueError):
        return None


def _limit_text(which: str) -> str:
    """A resource limit's soft value for a message: "0", "8 MiB", "unlimited"."""
    try:
        import resource
        soft = resource.getrlimit(getattr(resource, which))[0]
    except (ImportError, AttributeError, OSError, ValueError):
        return "unknown"
    if soft == resource.RLIM_INFINITY:
        return "unlimited"
    return f"{soft / 2**20:g} MiB" if which == "RLIMIT_MEMLOCK" else str(soft)


def _errno_text(code: int) -> str:
    return f"{errno.errorcode.get(code, str(code))}: {os.strerror(code)}"


def rt_throttling() -> dict[str, Any]:
    """Linux RT throttling: real-time tasks may use ``runtime_us`` of every ``period_us`` per
    core; -1 is off. It is what lets other tasks onto a core a spinning real-time loop holds."""
    run, per = _read_int(RT_RUNTIME), _read_int(RT_PERIOD)
    return {"runtime_us": run, "period_us": per,
            "on": None if run is None else run >= 0 and (per is None or run < per)}


def isolated_cores() -> set[int]:
    """The cores isolated from the scheduler's balancing (isolcpus=, as Linux lists them in
    /sys/devices/system/cpu/isolated, e.g. "2-3,5"); empty where none or unknown."""
    try:
        text = ISOLATED.read_text().strip()
    except OSError:
        return set()
    out: set[int] = set()
    for part in filter(None, text.split(",")):
        try:
            lo, _, hi = part.partition("-")
            out.update(range(int(lo), int(hi or lo) + 1))
        except ValueError:
            return set()
    return out


def kernel_info() -> dict[str, Any]:
    """The kernel's release and whether it is a PREEMPT_RT kernel."""
    try:
        u = os.uname()
        release, version = u.release, u.version
    except AttributeError:  # not a POSIX system
        return {"release": None, "preempt_rt": False}
    rt = _read_int(Path("/sys/kernel/realtime")) == 1 or "PREEMPT_RT" in version
    return {"release": release, "preempt_rt": rt}


class RealtimeRequests:
    """What a paced run asks the operating system for on the loop's thread, what it got, and
    the way back.

    :meth:`ask` (on the loop's own thread, after the recording process has started, so that
    it inherits none of it) asks for ``SCHED_FIFO`` at ``priority`` (with
    ``SCHED_RESET_ON_FORK``: a process started meanwhile does not inherit it) and for all of
    the process's memory to be locked (``mlockall(MCL_CURRENT | MCL_FUTURE)``: no page fault
    in the loop). Each request that the system refuses is reported with its errno and the
    limit that decided it; nothing is retried or worked around. :meth:`release` restores the
    old policy and unlocks the memory; it is idempotent and never raises.

    A spinning ``SCHED_FIFO`` thread holds its core against every ordinary task: only Linux
    RT throttling (``/proc/sys/kernel/sched_rt_runtime_us``) lets others onto it. With
    throttling off (-1) the real-time priority is asked for only on an isolated core (isolcpus:
    the scheduler queues nothing else there); elsewhere it is not (memory is still locked).
    Nor is it for a process allowed one core only, which the recording process shares.
    """

    def __init__(self, priority: int = 49, asked: bool = True, why_not: str = ""):
        self.priority = int(priority)
        self.asked = asked
        self.why_not = why_not or ("" if asked else "not asked")
        self.sched: dict[str, Any] = {"policy": "SCHED_FIFO", "priority": self.priority,
                                      "asked": False, "granted": False, "refused": None,
                                      "previous": None}
        self.memlock: dict[str, Any] = {"asked": False, "granted": False, "refused": None,
                                        "locked_MiB": None}
        self.throttling = rt_throttling()
        self.core: int | None = None
        self.core_isolated = False
        self._shares_core = False
        self.kernel = kernel_info()
        self._old: tuple[int, int] | None = None
        self._locked = False
        self.restored: bool | None = None

    def ask(self, core: int | None = -1) -> None:
        """Ask, on the loop's thread; ``core`` is the one it is pinned to, away from the
        recording process (None: not pinned, the process shares its one core with the
        recorder: no real-time policy then; -1: not known, e.g. outside a run)."""
        self.core = None if core == -1 else core
        self._shares_core = core is None
        self.core_isolated = self.core is not None and self.core in isolated_cores()
        if not self.asked:
            return
        self._ask_scheduling()
        self._ask_memory_lock()

    def _ask_scheduling(self) -> None:
        sc = self.sched
        if not hasattr(os, "sched_setscheduler") or not hasattr(os, "SCHED_FIFO"):
            sc["refused"] = "not available on this system"
            return
        if self._shares_core:
            sc["refused"] = ("not asked: the process may run on one core only, which the "
                             "recording process shares (a spinning real-time loop would starve "
                             "it); allow it a second core")
            return
        if self.throttling["on"] is False and not self.core_isolated:
            sc["refused"] = (f"not asked: RT throttling is off (sched_rt_runtime_us = "
                             f"{self.throttling['runtime_us']}) and the loop's core is not "
                             f"isolated, so nothing would let another task onto it while the "
                             f"loop spins; turn throttling on (e.g. sysctl "
                             f"kernel.sched_rt_runtime_us=950000) or isolate the core (isolcpus)")
            return
        try:
            old = os.sched_getscheduler(0)
            old_prio = os.sched_getparam(0).sched_priority
        except OSError as exc:
            sc["refused"] = f"cannot read the current policy: {_errno_text(exc.errno or 0)}"
            return
        names = {getattr(os, n): n for n in ("SCHED_OTHER", "SCHED_BATCH", "SCHED_IDLE",
                                             "SCHED_FIFO", "SCHED_RR") if hasattr(os, n)}
        flag = getattr(os, "SCHED_RESET_ON_FORK", 0)
        sc["previous"] = names.get(old & ~flag, str(old)) + (f" {old_prio}" if old_prio else "")
        sc["asked"] = True
        try:
            os.sched_setscheduler(0, os.SCHED_FIFO | flag, os.sched_param(self.priority))
        except OSError as exc:
            code = exc.errno or errno.EPERM
            why = _errno_text(code)
            if code == errno.EPERM:
                why += (f" (needs CAP_SYS_NICE or RLIMIT_RTPRIO >= {self.priority}, which is "
                        f"{_limit_text('RLIMIT_RTPRIO')} here; in a container also a "
                        f"real-time runtime for its cgroup)")
            sc["refused"] = why
            return
        self._old = (old, old_prio)
        now = os.sched_getscheduler(0) & ~flag
        sc["granted"] = now == os.SCHED_FIFO
        sc["priority"] = os.sched_getparam(0).sched_priority
        if not sc["granted"]:
            sc["refused"] = f"the policy read back is {names.get(now, now)}"

    def _ask_memory_lock(self) -> None:
        ml = self.memlock
        before = locked_kib()
        if before:
            ml["refused"] = (f"not asked: {before / 1024:.1f} MiB of the process are locked "
                             f"already (locked by its host program)")
            return
        ml["asked"] = True
        code = _mlockall()
        if code:
            why = _errno_text(code)
            if code in (errno.ENOMEM, errno.EPERM, errno.EAGAIN):
                why += (f" (the process is larger than RLIMIT_MEMLOCK, "
                        f"{_limit_text('RLIMIT_MEMLOCK')} here; raise the memlock limit or run "
                        f"with CAP_IPC_LOCK)")
            ml["refused"] = why
            return
        self._locked = True
        ml["granted"] = True
        kib = locked_kib()
        ml["locked_MiB"] = None if kib is None else round(kib / 1024, 1)

    def release(self) -> None:
        """Back to the old policy, memory unlocked; idempotent, never raises."""
        ok = True
        if self._old is not None:
            old, old_prio = self._old
            try:
                os.sched_setscheduler(0, old, os.sched_param(old_prio))
                self._old = None
            except OSError:
                ok = False
        if self._locked:
            ok = _munlockall() == 0 and ok
            self._locked = not ok
        if self.restored is not False and (self.sched["granted"] or self.memlock["granted"]):
            self.restored = ok

    def throttle_gap_s(self) -> float | None:
        """With the real-time policy granted and RT throttling on: the time per throttling
        period left to other tasks on the loop's core [s]; else None."""
        th = self.throttling
        if not (self.sched["granted"] and th["on"] and th["period_us"]):
            return None
        return (th["period_us"] - th["runtime_us"]) * 1e-6

    def as_dict(self) -> dict[str, Any]:
        return {"asked": self.asked, "not_asked_because": None if self.asked else self.why_not,
                "scheduling": dict(self.sched), "memory_lock": dict(self.memlock),
                "rt_throttling": dict(self.throttling), "kernel": dict(self.kernel),
                "core_isolated": self.core_isolated,
                "restored": self.restored}


def realtime_text(rt: dict[str, Any], pinned_core: int | None = None) -> str:
    """One line on what a paced run asked for and got (summary table, report)."""
    parts = []
    if not rt.get("asked"):
        parts.append(f"not asked ({rt.get('not_asked_because') or 'switched off'})")
    else:
        sc, ml = rt["scheduling"], rt["memory_lock"]
        # a request not made says why in its own words ("not asked: ...")
        parts.append(f"SCHED_FIFO {sc['priority']} granted" if sc["granted"] else
                     f"SCHED_FIFO {'refused: ' if sc['asked'] else ''}{sc['refused']}")
        parts.append(f"memory locked ({ml['locked_MiB']} MiB)" if ml["granted"] else
                     f"memory lock {'refused: ' if ml['asked'] else ''}{ml['refused']}")
    parts.append((f"pinned to core {pinned_core}"
                  + (" (isolated)" if rt.get("core_isolated") else ""))
                 if pinned_core is not None else "not pinned (one core allowed)")
    th = rt.get("rt_throttling") or {}
    if th.get("on") is None:
        parts.append("RT throttling unknown")
    elif th["on"]:
        parts.append(f"RT throttling {th['runtime_us']} of {th['period_us']} us")
    else:
        parts.append(f"RT throttling off ({th['runtime_us']})")
    if (rt.get("kernel") or {}).get("preempt_rt"):
        parts.append("PREEMPT_RT kernel")
    if rt.get("restored") is False:
        parts.append("NOT restored after the run")
    return "; ".join(parts)


def _seconds_text(x: float) -> str:
    if not x == x:  # NaN
        return "nan"
    for scale, unit in ((1.0, "s"), (1e-3, "ms"), (1e-6, "us")):
        if abs(x) >= scale:
            return f"{x / scale:.3g} {unit}"
    return f"{x * 1e9:.3g} ns"


def timing_verdict(ticks: int, misses: int, max_lateness_s: float, limits: dict[str, Any],
                   throttle_gap_s: float | None = None) -> dict:
    """Judge a paced run's timing against its ``[paced]`` limits.

    A deadline miss is a tick whose work ended more than one period after its deadline
    (lateness + compute > Ts: its output was not ready for the next tick). The run's timing is
    met when the share of such ticks is at most ``miss_share_max`` and the largest lateness
    (a tick's start after its deadline) at most ``max_lateness``; a value that is not a
    number breaches its limit.

    ``throttle_gap_s``: for a loop that ran at a real-time priority, the time RT throttling
    gives other tasks on its core in every throttling period; a largest lateness of about
    that much or more gets a note saying so (measured: other tasks queued on the loop's core
    stopped it for 48-52 ms once a second with the default 950000 of 1000000 us).
    """
    share = misses / ticks if ticks else 0.0
    smax, lmax = float(limits["miss_share_max"]), float(limits["max_lateness"])
    reasons = []
    if not share <= smax:
        reasons.append(f"deadline misses in {share:.3%} of ticks ({misses} of {ticks}), above "
                       f"paced.miss_share_max = {smax:.3%}")
    if not max_lateness_s <= lmax:
        reasons.append(f"largest lateness {_seconds_text(max_lateness_s)}, above "
                       f"paced.max_lateness = {_seconds_text(lmax)}")
    note = None
    if reasons and throttle_gap_s and max_lateness_s >= 0.8 * throttle_gap_s:
        note = (f"the largest lateness is about RT throttling's {_seconds_text(throttle_gap_s)} "
                f"for other tasks in each period: other tasks were queued on the loop's core; "
                f"keep them off it (isolcpus, cpusets) or compare with --no-realtime")
    return {"timing_met": not reasons, "miss_share": share, "miss_share_max": smax,
            "deadline_misses": misses, "ticks": ticks, "max_lateness_s": max_lateness_s,
            "max_lateness_limit_s": lmax, "reasons": reasons, "note": note}


def verdict_text(v: dict[str, Any]) -> str:
    """One line on a paced run's timing verdict (summary table, report)."""
    fig = (f"misses {v['miss_share']:.3%} (limit {v['miss_share_max']:.3%}), largest lateness "
           f"{_seconds_text(v['max_lateness_s'])} (limit {_seconds_text(v['max_lateness_limit_s'])})")
    if v["timing_met"]:
        return "met: " + fig
    return "timing not met: " + "; ".join(v["reasons"]) + (f" ({v['note']})" if v.get("note") else "")


def _jit_disabled() -> bool:
    return os.environ.get("NUMBA_DISABLE_JIT", "0") not in ("", "0")


def _paced_kernel(sc):
    return loopgen.module_for(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin).paced_chunk


def run_paced(sc, folder: Path | None = None, *, overwrite: bool = False,
              notice: Callable[[str], None] | None = None,
              progress: Callable[[int, int], None] | None = None,
              on_chunk: Callable[[int, np.ndarray, dict], None] | None = None,
              telemetry: str | None = None, allow_remote: bool = False,
              realtime: bool | None = None) -> RunResult:
    """Run a scenario in paced mode and write its run folder; return the summary.

    ``on_chunk(done, rows, prep_args)`` is called between recorded chunks (the live view's
    publisher uses it); keep it short, it runs between ticks. ``realtime`` False does not ask
    for a real-time priority and locked memory whatever the scenario's ``paced.realtime``
    says (the CLI's ``--no-realtime``); None follows the scenario."""
    sc = dataclasses.replace(sc, mode="paced")
    folder = Path(folder) if folder is not None else default_folder(sc)
    check_folder(folder, overwrite)
    prep = prepare(sc)
    fn, t_compile, compiled = compile_loop(sc, notice)
    a = prep.args
    t = time.perf_counter()
    first_call(sc, lambda: _call(fn, 0, 0, np.zeros((1, len(prep.signals) + 2)), a))
    t_compile += time.perf_counter() - t
    prep.signals = list(prep.signals) + [
        SignalSpec("tick_lateness", "s", "start of the tick after its scheduled time (paced)"),
        SignalSpec("tick_compute", "s", "compute time of the tick (paced)")]
    c_late, c_comp = len(prep.signals) - 2, len(prep.signals) - 1
    slack = lower_timer_slack()
    shared = None
    tel_cfg = None
    if telemetry:
        # the live view's publisher runs in the recording process; it reads the latch and the
        # event log from shared memory and passes the operator's commands back through it
        from hilrig.safety.interlocks import EVENT_LOG_SIZE, LATCH_SIZE
        from .pacedwrite import SharedArrays
        from .telemetry import telemetry_config
        shared = SharedArrays([("latch", (LATCH_SIZE,), "f8"), ("evlog", (EVENT_LOG_SIZE, 4), "f8"),
                               ("evn", (1,), "i8"), ("ev", (loopgen.EV_SIZE,), "f8")])
        for key, arr in shared.arrays.items():
            arr[...] = a[key]
            a[key] = arr
        tel_cfg = telemetry_config(sc, prep, telemetry, allow_remote)
        tel_cfg["shared"] = shared.handle()
    args = chunk_args(a)
    ev, wd = a["ev"], a["wd"]
    ts = sc.Ts
    budget = sc.watchdogs["overrun_budget"]
    lat, comp, work = LatencyStats(), LatencyStats(), LatencyStats()
    state: dict[str, Any] = {"t0": None, "last_work": 0.0}
    ask_rt = sc.paced["realtime"] if realtime is None else bool(realtime)
    rt = RealtimeRequests(sc.paced["realtime_priority"], asked=ask_rt,
                          why_not="" if ask_rt else ("--no-realtime" if realtime is False
                                                     else "paced.realtime = false"))

    compiled_wait = clock.supported() and not _jit_disabled()
    if compiled_wait:
        paced_fn = _paced_kernel(sc)
        paced_fn(0, 0, *args, np.zeros((1, len(prep.signals))), ev, 0.0, 0, 1.0, 1.0, c_late, c_comp,
                 np.zeros(8, dtype=np.int64), 0)
        rate = clock.cycle_rate()

    def start() -> None:
        # pinned only now, after the recording process has started (it keeps off this core);
        # the real-time requests likewise: the child inherits neither
        state["pinned"] = pin_to_last_core()
        rt.ask(max(state["pinned"]) if state["pinned"] else None)
        state["t0"] = time.perf_counter() + 0.002

    def releasing(produce_fn):
        def wrapped(k0: int, n: int, rec: np.ndarray) -> int:
            ran = produce_fn(k0, n, rec)
            if ran < n or k0 + ran >= sc.n_ticks or ev[0] != 0.0:
                rt.release()  # the last tick is done: the old policy before any other work
            return ran
        return wrapped

    def produce_compiled(k0: int, n: int, rec: np.ndarray) -> int:
        if state["t0"] is None:
            start()
        # re-anchor the counter to the monotonic clock at every chunk (no drift accumulates)
        c_now, t_now = clock.anchor()
        c_ref = c_now + (state["t0"] + k0 * ts - t_now) * rate
        w = writers[0]
        return paced_fn(k0, n, *args, rec, ev, c_ref, k0, ts * rate, 1.0 / rate, c_late, c_comp,
                        w.ctl, w.head)

    def produce(k0: int, n: int, rec: np.ndarray) -> int:
        if state["t0"] is None:
            start()
        t0 = state["t0"]
        last_work = state["last_work"]
        for i in range(n):
            kk = k0 + i
            deadline = t0 + kk * ts
            t_in = wait_until(deadline)
            wd[W_HOST_TIME] = last_work if kk > 1 else 0.0  # tick 0 initialises: not judged
            fn(kk, 1, *args, rec[i:i + 1], ev)
            if wd[W_FORCED] > 0.0:
                end = t_in + wd[W_FORCED]
                while time.perf_counter() < end:
                    pass
            t_out = time.perf_counter()
            rec[i, c_late] = t_in - deadline
            rec[i, c_comp] = t_out - t_in
            last_work = t_out - deadline
            if ev[0] != 0.0:
                state["last_work"] = last_work
                return i + 1
        state["last_work"] = last_work
        return n

    def after_chunk(done: int, rows: np.ndarray) -> None:
        if on_chunk:
            on_chunk(done, rows, a)

    def extra() -> dict[str, Any]:
        # the recording process kept the timing statistics: nothing is done between ticks
        if writers:
            got = writers[0].timing_stats()
            lat.__dict__.update(got[0].__dict__)
            comp.__dict__.update(got[1].__dict__)
            work.__dict__.update(got[2].__dict__)
        old = state.get("pinned")
        return {"paced": {
            "tick_period_s": ts, "timer_slack_lowered": slack,
            "wait": "compiled, cycle counter" if compiled_wait else "Python, sleep then spin",
            "lateness_us": lat.as_dict(), "compute_us": comp.as_dict(),
            "late_ticks": lat.count_above(ts),
            "deadline_misses": work.count_above(ts),
            "overrun_budget_s": budget or None,
            "overruns": work.count_above(budget) if budget else None,
            "recorder_stalls": writer_stalls(),
            "pinned_core": max(old) if old else None,
            "realtime": rt.as_dict(),
            "verdict": timing_verdict(lat.n, work.count_above(ts), lat.max, sc.paced,
                                      throttle_gap_s=rt.throttle_gap_s()),
        }}

    writers: list[ProcessWriter] = []

    def writer_class(*w_args, **w_kw):
        limits = (ts,) + ((budget,) if budget else ())
        w = ProcessWriter(*w_args, timing_cols=(c_late, c_comp, limits), ring_chunks=4,
                          telemetry=dict(tel_cfg) if tel_cfg else None, **w_kw)
        writers.append(w)
        return w

    writer_class.computes_metrics = True

    def writer_stalls() -> int:
        return sum(w.stalls for w in writers)

    import gc
    if notice:
        notice(f"paced: {sc.n_ticks} ticks of {ts * 1e6:g} us on the wall clock "
               f"({sc.duration:g} s); one core spins for the whole run")
        notice(f"paced: asking for SCHED_FIFO priority {rt.priority} and locked memory "
               f"(--no-realtime or paced.realtime = false to not ask)" if ask_rt else
               f"paced: no real-time requests ({rt.why_not})")
    # no garbage collection pauses between ticks (the loop allocates little; collected after)
    gc.collect()
    gc.disable()
    try:
        return execute(sc, prep, folder, releasing(produce_compiled if compiled_wait else produce),
                       timing={"compile_or_load_s": t_compile, "compiled_now": compiled},
                       progress=progress, extra=extra, writer_class=writer_class,
                       after_chunk=after_chunk)
    finally:
        rt.release()  # also when the run failed (idempotent)
        gc.enable()
        if state.get("pinned"):
            os.sched_setaffinity(0, state["pinned"])
        if shared is not None:
            for key in shared.arrays:
                a[key] = a[key].copy()  # the run's arrays outlive the shared block
            shared.close()
