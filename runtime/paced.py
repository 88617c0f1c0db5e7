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
process through shared memory (:mod:`hilrig.runtime.pacedwrite`), and the live view runs in
its own process.

A paced run spins one core for its whole duration.
"""
from __future__ import annotations

import dataclasses
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

from hilrig.safety.interlocks import W_FORCED, W_HOST_TIME

from . import clock
from . import loop as loopgen
from .pacedwrite import LatencyStats, ProcessWriter
from .recording import SignalSpec
from .run import (RunResult, _call, check_folder, chunk_args, compile_loop, default_folder,
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
        import os
        old = os.sched_getaffinity(0)
        if len(old) > 1:
            os.sched_setaffinity(0, {max(old)})
            return old
    except (AttributeError, OSError):
        pass
    return None


def _jit_disabled() -> bool:
    import os
    return os.environ.get("NUMBA_DISABLE_JIT", "0") not in ("", "0")


def _paced_kernel(sc):
    return loopgen.module_for(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin).paced_chunk


def run_paced(sc, folder: Path | None = None, *, overwrite: bool = False,
              notice: Callable[[str], None] | None = None,
              progress: Callable[[int, int], None] | None = None,
              on_chunk: Callable[[int, np.ndarray, dict], None] | None = None,
              telemetry: str | None = None, allow_remote: bool = False) -> RunResult:
    """Run a scenario in paced mode and write its run folder; return the summary.

    ``on_chunk(done, rows, prep_args)`` is called between recorded chunks (the live view's
    publisher uses it); keep it short, it runs between ticks."""
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

    compiled_wait = clock.supported() and not _jit_disabled()
    if compiled_wait:
        paced_fn = _paced_kernel(sc)
        paced_fn(0, 0, *args, np.zeros((1, len(prep.signals))), ev, 0.0, 0, 1.0, 1.0, c_late, c_comp,
                 np.zeros(8, dtype=np.int64), 0)
        rate = clock.cycle_rate()

    def start() -> None:
        # pinned only now, after the recording process has started (it keeps off this core)
        state["pinned"] = pin_to_last_core()
        state["t0"] = time.perf_counter() + 0.002

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
        return {"paced": {
            "tick_period_s": ts, "timer_slack_lowered": slack,
            "wait": "compiled, cycle counter" if compiled_wait else "Python, sleep then spin",
            "lateness_us": lat.as_dict(), "compute_us": comp.as_dict(),
            "late_ticks": lat.count_above(ts),
            "deadline_misses": work.count_above(ts),
            "overrun_budget_s": budget or None,
            "overruns": work.count_above(budget) if budget else None,
            "recorder_stalls": writer_stalls(),
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
    # no garbage collection pauses between ticks (the loop allocates little; collected after)
    gc.collect()
    gc.disable()
    try:
        return execute(sc, prep, folder, produce_compiled if compiled_wait else produce,
                       timing={"compile_or_load_s": t_compile, "compiled_now": compiled},
                       progress=progress, extra=extra, writer_class=writer_class,
                       after_chunk=after_chunk)
    finally:
        gc.enable()
        if state.get("pinned"):
            import os
            os.sched_setaffinity(0, state["pinned"])
        if shared is not None:
            for key in shared.arrays:
                a[key] = a[key].copy()  # the run's arrays outlive the shared block
            shared.close()
