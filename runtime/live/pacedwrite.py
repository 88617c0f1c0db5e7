"""A recording writer in a child process, fed through shared memory.

A paced run keeps the wall clock, and HDF5 writes in its own process (even in a thread: the
GIL) make ticks late: measured on a 2-core VM, a writer thread took a 20 kHz spin loop's p99
lateness from 21 us to 160-1300 us. So the paced loop copies each chunk into a ring in shared
memory and moves on; a child process drains the ring into the same :class:`RunWriter` and
flushes. The recording is the same file, chunk for chunk.
"""
from __future__ import annotations

import multiprocessing as mp
import time
from multiprocessing import shared_memory
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import RecordingError
from ..recording import RunWriter, SignalSpec

#: control words in shared memory: rows published by the loop, rows written, no more rows,
#: the child failed, the operator asked to stop (the paced kernel polls it every tick)
HEAD, TAIL, DONE, FAILED, STOP = range(5)
CTL_SIZE = 8


class LatencyStats:
    """Running histogram of durations (0.5 us bins up to 50 ms) with exact count and max."""

    BIN = 0.5e-6
    NBINS = 100_000

    def __init__(self, hist: np.ndarray | None = None, n: int = 0, max_: float = 0.0,
                 limits: tuple[float, ...] = (), above: list[int] | None = None):
        self.hist = np.zeros(self.NBINS + 1, dtype=np.int64) if hist is None else hist
        self.n = n
        self.max = max_
        #: exact counts of values strictly above each limit
        self.limits = tuple(limits)
        self.above = list(above) if above is not None else [0] * len(self.limits)

    def add(self, values: np.ndarray) -> None:
        if values.size == 0:
            return
        idx = np.minimum((np.maximum(values, 0.0) / self.BIN).astype(np.int64), self.NBINS)
        self.hist += np.bincount(idx, minlength=self.NBINS + 1)
        self.n += values.size
        for j, lim in enumerate(self.limits):
            self.above[j] += int((values > lim).sum())
        self.max = max(self.max, float(values.max()))

    def percentile(self, q: float) -> float | None:
        if self.n == 0:
            return None
        k = int(np.searchsorted(np.cumsum(self.hist), q / 100.0 * self.n))
        if k >= self.NBINS:
            return self.max  # beyond the histogram: the max is the only bound
        return min((k + 1) * self.BIN, self.max)

    def count_above(self, limit: float) -> int:
        """Values strictly above ``limit``: exact for a limit given at construction, else to
        the histogram's bin."""
        if limit in self.limits:
            return self.above[self.limits.index(limit)]
        return int(self.hist[int(limit / self.BIN) + 1:].sum())

    def as_dict(self, scale: float = 1e6) -> dict[str, float | None]:
        p = self.percentile
        return {"p50": None if self.n == 0 else p(50) * scale,
                "p99": None if self.n == 0 else p(99) * scale,
                "max": self.max * scale, "n": self.n}




def _child(names, folder, signals, attrs, chunk_rows, compression, cap, ncols, timing_cols,
           metric_cols, ts, telemetry, conn):
    shm_rows = shared_memory.SharedMemory(name=names[0])
    shm_time = shared_memory.SharedMemory(name=names[1])
    shm_ctl = shared_memory.SharedMemory(name=names[2])
    rows = np.ndarray((cap, ncols), dtype=np.float64, buffer=shm_rows.buf)
    tt = np.ndarray((cap,), dtype=np.float64, buffer=shm_time.buf)
    ctl = np.ndarray((CTL_SIZE,), dtype=np.int64, buffer=shm_ctl.buf)
    tel = shared = None
    import os
    import signal
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the runtime's to handle, in order
    parent = os.getppid()
    try:
        # stay out of the loop's way: lower priority, off the loop's (last) core
        try:
            os.nice(10)
            cores = sorted(os.sched_getaffinity(0))
            if len(cores) > 1:
                os.sched_setaffinity(0, set(cores[:-1]))
        except (AttributeError, OSError):
            pass
        if telemetry is not None:
            # the live view's publisher lives here, not in the loop's process (set up before the
            # recording file, so that a taken address leaves no file behind)
            from .telemetry import Telemetry
            shared = SharedArrays.attach(telemetry.pop("shared"))
            tel = Telemetry(**telemetry)
        w = RunWriter(Path(folder), signals, attrs, chunk_rows=chunk_rows, compression=compression)
        stats = ([LatencyStats(limits=timing_cols[2]) for _ in range(3)]
                 if timing_cols else [])
        metrics = None
        if metric_cols:
            from ..trials.metrics import TrackingMetrics
            metrics = TrackingMetrics(ts)

        def append(t, r):
            w.append(t, r)
            if stats:
                la, co = r[:, timing_cols[0]], r[:, timing_cols[1]]
                stats[0].add(la)
                stats[1].add(co)
                stats[2].add(la + co)
            if metrics is not None:
                iv, ir, iu, idc = metric_cols
                metrics.update(t, r[:, iv], r[:, ir], r[:, iu], r[:, idc] if idc >= 0 else None)

        def live(first, r, ended=False):
            if tel is None:
                return
            from ..loop import EVENT_TEXT
            from hilrig.safety.interlocks import L_RESET_NOW
            sa = shared.arrays
            for c in tel.commands():
                if c == "stop":
                    ctl[STOP] = 1
                elif c == "reset":
                    sa["latch"][L_RESET_NOW] = 1.0
            if r is not None:
                tel.add_rows(first, r, ts)
            end = EVENT_TEXT.get(int(sa["ev"][0]), "") or None
            tel.publish(sa["latch"], sa["evlog"], sa["evn"], force=ended, ended=ended,
                        end_event=end if ended else None)
        conn.send("ready")
        tail = 0
        closing = None  # the parent's closing message, when it came in with a request's poll
        while True:
            head = int(ctl[HEAD])
            if head > tail:
                a, m = tail % cap, head - tail
                if a + m <= cap:
                    r = rows[a:a + m].copy()
                    t = tt[a:a + m].copy()
                else:  # the rows wrap around the end of the ring
                    b = a + m - cap
                    r = np.concatenate([rows[a:], rows[:b]])
                    t = np.concatenate([tt[a:], tt[:b]])
                if ts > 0.0:
                    # one row per tick from tick 0: the same times the runtime computes
                    t = np.arange(tail, head, dtype=np.int64) * ts
                append(t, r)
                live(tail, r)
                tail = head
                ctl[TAIL] = tail
                continue
            if os.getppid() != parent:
                break  # the runtime was killed: stop (the file stays marked not complete)
            if ctl[DONE]:
                if int(ctl[HEAD]) > tail:
                    continue  # rows published between the two reads: write them first
                break
            live(0, None)
            if conn.poll(0):
                req = conn.recv()
                if req == "stats":
                    conn.send({"timing": [(st.hist, st.n, st.max, st.limits, st.above)
                                          for st in stats],
                               "metrics": metrics.result() if metrics is not None else None})
                    continue
                if isinstance(req, tuple):
                    # close() sets DONE and then sends its message; both can land between this
                    # loop's read of DONE and its poll: keep it, DONE is seen on the next pass
                    closing = req
                    continue
                raise RuntimeError(f"unexpected request {req!r}")
            time.sleep(0.05)
        if os.getppid() != parent:
            w.f.close()
            return
        attrs_final, complete = closing if closing is not None else conn.recv()
        w.close(attrs_final, complete=complete)
        live(0, None, ended=True)
        conn.send("closed")
    except BaseException as exc:  # the parent sees it and stops the run
        ctl[FAILED] = 1
        try:
            conn.send(f"error: {type(exc).__name__}: {exc}")
        except OSError:
            pass
    finally:
        if tel is not None:
            tel.close()
            shared.arrays.clear()
            shared.shm.close()
        del rows, tt, ctl
        for s in (shm_rows, shm_time, shm_ctl):
            s.close()


class SharedArrays:
    """Named numpy arrays in one shared-memory block, attachable by name from a child."""

    def __init__(self, specs: list[tuple[str, tuple[int, ...], str]], name: str | None = None):
        self.specs = specs
        sizes = [int(np.prod(shape)) * np.dtype(dt).itemsize for _, shape, dt in specs]
        total = max(8, sum((sz + 63) // 64 * 64 for sz in sizes))
        self.shm = shared_memory.SharedMemory(name=name, create=name is None, size=total)
        self.owner = name is None
        self.arrays: dict[str, np.ndarray] = {}
        off = 0
        for (key, shape, dt), sz in zip(specs, sizes):
            self.arrays[key] = np.ndarray(shape, dtype=dt, buffer=self.shm.buf, offset=off)
            off += (sz + 63) // 64 * 64

    def handle(self) -> tuple:
        return (self.shm.name, self.specs)

    @classmethod
    def attach(cls, handle: tuple) -> "SharedArrays":
        return cls(handle[1], name=handle[0])

    def close(self) -> None:
        self.arrays.clear()
        self.shm.close()
        if self.owner:
            try:
                self.shm.unlink()
            except FileNotFoundError:
                pass


class ProcessWriter:
    """Same interface as :class:`RunWriter` (append, close); the HDF5 work runs in a child.

    The loop can also fill the ring in place: :meth:`block` hands out the next rows of the ring
    and :meth:`commit` publishes them, so nothing is copied between ticks. The child keeps the
    running tracking metrics and timing statistics too."""

    computes_metrics = True

    def __init__(self, folder: Path, signals: list[SignalSpec], attrs: dict[str, Any],
                 chunk_rows: int, compression: str = "none", ring_chunks: int = 8,
                 timing_cols: tuple[int, int, tuple[float, ...]] | None = None,
                 metric_cols: tuple[int, int, int, int] | None = None, Ts: float = 0.0,
                 telemetry: dict | None = None):
        self.ncols = len(signals)
        self.chunk_rows = max(1, chunk_rows)
        self.cap = self.chunk_rows * ring_chunks
        self.shm = [shared_memory.SharedMemory(create=True, size=self.cap * self.ncols * 8),
                    shared_memory.SharedMemory(create=True, size=self.cap * 8),
                    shared_memory.SharedMemory(create=True, size=CTL_SIZE * 8)]
        self.rows = np.ndarray((self.cap, self.ncols), dtype=np.float64, buffer=self.shm[0].buf)
        self.tt = np.ndarray((self.cap,), dtype=np.float64, buffer=self.shm[1].buf)
        self.ctl = np.ndarray((CTL_SIZE,), dtype=np.int64, buffer=self.shm[2].buf)
        self.ctl[:] = 0
        self.head = 0
        self.stalls = 0
        methods = mp.get_all_start_methods()
        ctx = mp.get_context("fork" if "fork" in methods else "spawn")
        self.conn, child_conn = ctx.Pipe()
        self.proc = ctx.Process(target=_child, name="hilrig-recorder", daemon=True, args=(
            [s.name for s in self.shm], str(folder), signals, attrs, chunk_rows, compression,
            self.cap, self.ncols, timing_cols, metric_cols, Ts, telemetry, child_conn))
        self.proc.start()
        if not self.conn.poll(60):
            self._cleanup()
            raise RecordingError(f"{folder}: the recording process did not start")
        msg = self.conn.recv()
        if msg != "ready":
            self._cleanup()
            raise RecordingError(f"{folder}: cannot write the recording: {msg}")

    def append(self, time_: np.ndarray, rows: np.ndarray) -> None:
        n = time_.shape[0]
        if n == 0:
            return
        if n > self.cap:
            raise RecordingError(f"a chunk of {n} rows is larger than the ring ({self.cap})")
        # wait (rarely) while the child is a whole ring behind
        self._wait_room(n)
        a = self.head % self.cap
        first = min(n, self.cap - a)
        self.rows[a:a + first] = rows[:first]
        self.tt[a:a + first] = time_[:first]
        if first < n:
            self.rows[:n - first] = rows[first:n]
            self.tt[:n - first] = time_[first:n]
        self.head += n
        self.ctl[HEAD] = self.head

    def sync(self, limit_s: float = 600.0) -> None:
        """Wait until the child has written and flushed everything appended so far."""
        deadline = time.monotonic() + limit_s
        while int(self.ctl[TAIL]) < self.head:
            if self.ctl[FAILED] or not self.proc.is_alive():
                raise RecordingError(self._child_error())
            if time.monotonic() > deadline:
                raise RecordingError("the recording process fell behind by more than 600 s")
            time.sleep(0.002)

    def timing_stats(self) -> list[LatencyStats]:
        """Lateness, compute and their sum, over every row written so far."""
        return [LatencyStats(*row) for row in self._stats()["timing"]]

    def _wait_room(self, n: int) -> None:
        while self.head + n - int(self.ctl[TAIL]) > self.cap:
            if self.ctl[FAILED] or not self.proc.is_alive():
                raise RecordingError(self._child_error())
            self.stalls += 1
            time.sleep(0.0005)

    def block(self, n: int) -> np.ndarray:
        """The ring's next n rows, to be filled in place and then :meth:`commit`-ted. Blocks
        are whole chunks (the last one may be shorter), so one never wraps around the ring."""
        if n > self.chunk_rows or self.head % self.chunk_rows:
            raise RecordingError(f"block of {n} rows at ring row {self.head}: not a chunk")
        self._wait_room(n)
        a = self.head % self.cap
        return self.rows[a:a + n]

    def commit(self, time_: np.ndarray) -> None:
        """Publish the first len(time_) rows of the last block (a run that ended early commits
        fewer). A paced loop publishes its rows tick by tick already (``ctl[HEAD]``); this
        makes the count exact at the chunk's end."""
        n = time_.shape[0]
        a = self.head % self.cap
        self.tt[a:a + n] = time_
        self.head += n
        self.ctl[HEAD] = self.head

    def metrics_result(self) -> dict:
        return self._stats()["metrics"]

    def _stats(self) -> dict:
        self.sync()
        self.conn.send("stats")
        if not self.conn.poll(60):
            raise RecordingError("the recording process did not answer")
        return self.conn.recv()

    def _child_error(self) -> str:
        if self.conn.poll(0):
            try:
                return f"the recording process failed: {self.conn.recv()}"
            except (EOFError, OSError):
                pass
        return "the recording process ended unexpectedly"

    def close(self, attrs: dict[str, Any] | None = None, complete: bool = True) -> None:
        try:
            if self.proc.is_alive() and not self.ctl[FAILED]:
                self.sync()
            self.ctl[DONE] = 1
            if self.proc.is_alive():
                self.conn.send((attrs or {}, complete))
                if not self.conn.poll(600):
                    raise RecordingError("the recording process did not finish within 600 s")
                msg = self.conn.recv()
                if msg != "closed":
                    raise RecordingError(f"the recording process failed: {msg}")
            elif self.ctl[FAILED]:
                raise RecordingError(self._child_error())
            self.proc.join(60)
        finally:
            self._cleanup()

    def _cleanup(self) -> None:
        if self.rows is None:
            return
        if self.proc.is_alive():
            self.proc.join(5)
        if self.proc.is_alive():
            self.proc.kill()
        del self.rows, self.tt, self.ctl
        for s in self.shm:
            s.close()
            try:
                s.unlink()
            except FileNotFoundError:
                pass
        self.rows = self.tt = self.ctl = None
