"""The runtime's side of a bridge session: run a scenario's controller against an external
simulator, tick by tick, recording as in SIL.

Lockstep: the simulator advances one tick only after the actuation for that tick arrives, so
the run is a deterministic co-simulation: against the stand-in simulator it reproduces the
in-process SIL recording of the same scenario. The order of exchange is in docs/protocol.md.
"""
from __future__ import annotations

import dataclasses
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

from hilrig.runtime import loop as loopgen
from hilrig.runtime.run import (RunResult, check_folder, default_folder, execute, fault_args,
                                prepare, supervision_args)

from hilrig.safety.interlocks import (HOST_GAP, HOST_LOST, HOST_STALE, HOST_STOP, L_RESET_NOW,
                                      W_FORCED, W_HOST_BITS, W_HOST_TIME, W_HOST_VALUE)

from . import protocol as P
from .errors import BridgeError, PeerError, ProtocolError, TransportTimeout
from .transport import client_for

MODES = ("lockstep", "free-running")


def signal_maps(sc) -> tuple[list[list[str]], list[list[str]]]:
    """The measurement and actuation maps of a scenario's plant: [[name, unit], ...]."""
    decl = sc.plant.plugin.declaration
    meas = [[s.name, s.unit] for s in decl.outputs]
    act = [[s.name, s.unit] for s in decl.inputs] or [["u", "V"]]
    return meas, act


def _bridge_kernel(sc):
    path, _ = loopgen.generate(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin)
    return loopgen.load_module(path).bridge_tick


def _ready_tick(sc):
    """The compiled tick kernel, compiled (or loaded) now on throw-away state; and the seconds
    that took."""
    tick = _bridge_kernel(sc)
    t = time.perf_counter()
    warm = prepare(sc)
    tick(0, 0, sc.Ts, sc.v_collapse, warm.args["i_vout"], *_tick_args(warm.args),
         np.zeros((1, len(warm.signals))), warm.args["ev"])
    return tick, time.perf_counter() - t


def _spin_until(t_end: float) -> None:
    """Busy-wait to a perf_counter time (a forced overrun spends its time for real)."""
    while time.perf_counter() < t_end:
        pass


def _tick_args(a: dict) -> tuple:
    return (a["pc"], a["xc"], a["iyc"], a["yc"], a["u"], a["safe_u"],
            a["pr"], a["xr"], a["iyr"], a["yr"], a["w"],
            a["ad"], a["g1"], a["g2"], a["cr"], a["dr"], a["slew"], a["z"], a["s"], a["zt"], a["r"],
            a["dix"], a["lim_sig"], a["lim_side"], a["lim_thr"], a["lim_deb"], a["lim_cnt"], a["latch"],
            a["pv"], *fault_args(a), *supervision_args(a), a["y"], a["d"])


class _Live:
    """The live view of a bridge session: a telemetry frame every ~50 ms of wall time from the
    tick loop (checked every 256 ticks), and the operator's commands: a stop latches the safe
    output on the next tick, which is then the last; a reset is requested for the next tick."""

    def __init__(self, sc, prep, address: str | None, allow_remote: bool, stats: "BridgeStats"):
        self.tel = None
        if address:
            from hilrig.runtime.telemetry import Telemetry, telemetry_config
            self.tel = Telemetry(**telemetry_config(sc, prep, address, allow_remote))
        self.a, self.ts, self.stats = prep.args, sc.Ts, stats
        self.stop = False
        self.from_i = 0
        self.last = time.perf_counter()

    def chunk(self) -> None:
        self.from_i = 0

    def host_bits(self) -> float:
        return float(HOST_STOP) if self.stop else 0.0

    def after_tick(self, k0: int, i: int, rec: np.ndarray) -> bool:
        """Publish if due; True when the run must end after this tick (operator stop)."""
        if self.stop:
            self.a["ev"][0], self.a["ev"][1] = loopgen.EV_STOPPED, k0 + i
            return True
        if self.tel is None or (i & 255) != 255:
            return False
        now = time.perf_counter()
        if now - self.last >= 0.05:
            self.last = now
            self.publish(k0, i, rec)
        return False

    def publish(self, k0: int, i: int, rec: np.ndarray, ended: bool = False,
                end_event: str | None = None) -> None:
        a = self.a
        if i + 1 > self.from_i:
            self.tel.add_rows(k0 + self.from_i, rec[self.from_i:i + 1], self.ts)
            self.from_i = i + 1
        for c in self.tel.commands():
            if c == "stop":
                self.stop = True
            elif c == "reset":
                a["latch"][L_RESET_NOW] = 1.0
        st = self.stats
        recent = np.array(st.rtt_ns[-1000:], dtype=float) / 1e3
        link = {"frames_sent": st.sent, "frames_received": st.received, "lost": st.seq.lost,
                "resent": getattr(st.link, "resent", 0),
                "rtt_p99_us": float(np.percentile(recent, 99)) if recent.size else None}
        self.tel.publish(a["latch"], a["evlog"], a["evn"], force=ended, bridge=link,
                         ended=ended, end_event=end_event)

    def close(self, summary: dict | None) -> None:
        if self.tel is None:
            return
        if summary is not None:
            self.tel.publish(self.a["latch"], self.a["evlog"], self.a["evn"], force=True,
                             ended=True, end_event=summary.get("end_event") or "completed")
        self.tel.close()


class BridgeStats:
    """Frames, losses and round-trip times of one session."""

    def __init__(self):
        self.sent = 0
        self.received = 0
        self.rtt_ns: list[int] = []
        self.seq = P.SequenceTracker()
        self.rejects = P.RejectCounter()
        self.link = None

    def as_dict(self) -> dict[str, Any]:
        rtt = np.array(self.rtt_ns, dtype=float) / 1e3
        pct = (lambda q: float(np.percentile(rtt, q))) if rtt.size else (lambda q: None)
        resent = getattr(self.link, "resent", 0)
        stale = getattr(self.link, "stale", 0)
        return {"frames_sent": self.sent, "frames_received": self.received,
                "resent": resent, "stale_replies": stale,
                "lost": self.seq.lost, "duplicates": self.seq.duplicates,
                "out_of_order": self.seq.out_of_order, "late": 0,
                "rejected": dict(self.rejects.counts),
                "reject_log": [list(e) for e in list(self.rejects.log)[-10:]],
                "rtt_us": {"p50": pct(50), "p99": pct(99),
                           "max": float(rtt.max()) if rtt.size else None, "n": int(rtt.size)}}


def run_bridge(sc, address: str, folder: Path | None = None, *, mode: str = "lockstep",
               timeout_s: float = 2.0, allow_remote: bool = False, overwrite: bool = False,
               curve_keys: Path | None = None,
               progress: Callable[[int, int], None] | None = None,
               notice: Callable[[str], None] | None = None,
               telemetry: str | None = None) -> RunResult:
    """Run the scenario's controller against the simulator at ``address`` (``telemetry``:
    publish the live view there)."""
    if mode not in MODES:
        raise BridgeError(f"bridge mode {mode!r} is not available; modes: {', '.join(MODES)}")
    if mode == "free-running":
        return run_free_running(sc, address, folder, timeout_s=timeout_s, overwrite=overwrite,
                                progress=progress, notice=notice, telemetry=telemetry,
                                allow_remote=allow_remote, curve_keys=curve_keys)
    sc = dataclasses.replace(sc, mode=mode)
    folder = Path(folder) if folder is not None else default_folder(sc)
    check_folder(folder, overwrite)
    tick, t_compile = _ready_tick(sc)
    prep = prepare(sc)
    a = prep.args
    meas_map, act_map = signal_maps(sc)
    n_meas, n_act = len(meas_map), len(act_map)
    h = P.map_hash(meas_map, act_map)
    link = client_for(address, timeout_s=timeout_s, allow_remote=allow_remote,
                      curve_keys=curve_keys)
    stats = BridgeStats()
    stats.link = link
    ended: list[dict[str, Any]] = []

    seen: dict[str, Any] = {}

    def ask(frame, expect, want_seq=None):
        data = frame if isinstance(frame, bytes) else P.encode(frame)
        t0 = time.perf_counter_ns()
        seen.clear()
        if want_seq is None or not hasattr(link, "stale"):
            reply = link.request(data)
        else:
            # datagrams: a late copy of an earlier sample is recognised by its sequence number;
            # a datagram that does not decode is counted and treated as lost (resent)
            reply = link.request(data, accept=lambda b: _acceptable(b, want_seq))
        stats.rtt_ns.append(time.perf_counter_ns() - t0)
        stats.sent += 1
        stats.received += 1
        got = seen.get("frame")
        if got is None:
            try:
                got = P.decode(reply, n_meas=n_meas, n_act=n_act)
            except ProtocolError as exc:
                stats.rejects.add(exc.reason, str(exc))
                raise
        if isinstance(got, P.Error):
            raise PeerError(got.code, got.reason)
        if isinstance(got, P.Stop) and expect is not P.Stop:
            # the simulator ends the session unasked (an orderly disconnect on its side)
            raise PeerError(0, f"the simulator stopped: {got.reason}")
        if not isinstance(got, expect):
            stats.rejects.add("unexpected", f"expected {expect.__name__}, got {type(got).__name__}")
            raise ProtocolError("unexpected", f"the simulator answered a {type(got).__name__} "
                                f"frame where a {expect.__name__} was due")
        return got

    def _acceptable(b: bytes, want: int) -> bool:
        try:
            got = P.decode(b, n_meas=n_meas, n_act=n_act)
        except ProtocolError as exc:
            stats.rejects.add(exc.reason, str(exc))
            return False
        if isinstance(got, P.Sample) and got.seq != want:
            return False
        seen["frame"] = got  # decoded once: ask() reuses it
        return True

    hello = P.Hello(version=P.PROTOCOL_VERSION, tick_period_s=sc.Ts, mode=mode,
                    meas_map=meas_map, act_map=act_map, map_hash=h)
    try:
        welcome = ask(hello, P.Welcome)
        P.handshake_check(hello, welcome)
        current = ask(P.Heartbeat(seq=0, t_sender_s=0.0), P.Sample, want_seq=0)
    except (ProtocolError, PeerError, TransportTimeout) as exc:
        link.close()
        raise BridgeError(f"bridge handshake with {address} failed: {exc}") from None
    stale_s = sc.watchdogs["stale_limit"] or timeout_s
    link.set_timeout(stale_s)
    if notice:
        notice(f"bridge: connected to {welcome.simulator_name!r} at {address} ({mode}, "
               f"{n_meas} measurements, {n_act} actuations; stale after {stale_s * 1e3:g} ms)")
    # the sample for the next tick, or the reason there is none: ("stale" | "lost", detail)
    state: dict[str, Any] = {"sample": current, "took": 0.0, "missing": None, "waited": 0.0}
    wd = a["wd"]

    live = _Live(sc, prep, telemetry, allow_remote, stats)

    def produce(k0: int, n: int, rec: np.ndarray) -> int:
        targs = _tick_args(a)
        live.chunk()
        for i in range(n):
            kk = k0 + i
            if state["missing"] is not None:
                # watchdog tick: no fresh sample; the controller runs on the measurement held,
                # the trip forces the safe output, and the run ends (nobody answers any more)
                why, detail = state["missing"]
                wd[W_HOST_BITS] = HOST_STALE if why == "stale" else HOST_LOST
                wd[W_HOST_VALUE] = state["waited"] if why == "stale" else 0.0
                tick(kk, i, sc.Ts, sc.v_collapse, a["i_vout"], *targs, rec, a["ev"])
                wd[W_HOST_BITS] = 0.0
                e = {"event": f"bridge {'stale' if why == 'stale' else 'peer lost'}",
                     "tick": kk, "detail": detail}
                if why == "stale":
                    e["detected_after_s"] = state["waited"]
                ended.append(e)
                return i + 1
            smp = state["sample"]
            verdict = stats.seq.check(smp.seq)
            if smp.seq != kk:
                ended.append({"event": "bridge sequence error", "tick": kk,
                              "detail": f"sample seq {smp.seq} ({verdict}) where {kk} was due"})
                return i
            t_in = time.perf_counter()
            a["y"][:] = smp.meas
            a["d"][:] = np.nan  # the load lives in the simulator
            wd[W_HOST_TIME] = state["took"]
            wd[W_HOST_BITS] = live.host_bits()
            go = tick(kk, i, sc.Ts, sc.v_collapse, a["i_vout"], *targs, rec, a["ev"])
            if wd[W_FORCED] > 0.0:
                _spin_until(t_in + wd[W_FORCED])
            enable = not bool(a["latch"][0])
            word = int(rec[i, -2])
            frame = P.encode_actuation(kk, a["u"], word, enable)
            t_sent = time.perf_counter()
            state["took"] = t_sent - t_in
            try:
                state["sample"] = ask(frame, P.Sample, want_seq=kk + 1)
            except TransportTimeout as exc:
                state["waited"] = time.perf_counter() - t_sent
                state["missing"] = ("stale", f"no sample within {stale_s * 1e3:g} ms: {exc}")
            except PeerError as exc:
                state["missing"] = ("lost", f"the simulator ended the session: {exc}")
            except ProtocolError as exc:
                ended.append({"event": "bridge protocol error", "tick": kk, "detail": str(exc)})
                return i + 1
            if not go or live.after_tick(k0, i, rec):
                return i + 1
        return n

    def finish() -> list[dict[str, Any]]:
        # the orderly end goes out before the summary is written, so its statistics count it
        if not link.closed and state["missing"] is None:
            try:
                ask(P.Stop(reason="run ended"), P.Stop)
            except (ProtocolError, PeerError, TransportTimeout) as exc:
                ended.append({"event": "bridge stop not acknowledged", "detail": str(exc)})
        return ended

    summary = None
    try:
        res = execute(sc, prep, folder, produce,
                      timing={"compile_or_load_s": t_compile, "compiled_now": False},
                      progress=progress, extra=lambda: {"bridge": {
                          "address": address, "mode": mode,
                          "simulator": welcome.simulator_name, **stats.as_dict()}},
                      end_events=finish)
        summary = res.summary
        return res
    finally:
        live.close(summary)
        link.close()


def run_free_running(sc, address: str, folder: Path | None = None, *, timeout_s: float = 2.0,
                     stale_s: float | None = None, overwrite: bool = False,
                     progress: Callable[[int, int], None] | None = None,
                     notice: Callable[[str], None] | None = None,
                     telemetry: str | None = None, allow_remote: bool = False,
                     curve_keys: Path | None = None) -> RunResult:
    """Free-running: the simulator keeps its own clock and sends a sample every period; the
    runtime answers each within the deadline of one period. A lost sample is a gap: the
    controller runs its tick on the last measurement held; more than ``watchdogs.max_gap``
    samples lost in a row trip the sequence-gap watchdog. No sample for ``stale_s`` (default:
    the scenario's ``watchdogs.stale_limit``, else 20 periods and at least 50 ms) trips the
    staleness watchdog: that tick runs on the measurement held, its safe output goes out, and
    the runtime waits ``watchdogs.peer_timeout`` more for the simulator; if nothing comes the
    peer-lost watchdog ends the run, with the safe state latched and the recording closed.
    An ERROR or unasked STOP frame from the simulator trips peer lost at once.

    Over ZeroMQ with ``curve_keys`` (a folder made by ``hilrig keys``) the pair is authenticated
    and encrypted with CurveZMQ; a tcp address that is not loopback needs ``allow_remote`` and
    the keys. A refused CurveZMQ handshake ends the wait for WELCOME at once with a
    :class:`BridgeError` that says so."""
    from .transport import free_running_link
    mode = "free-running"
    sc = dataclasses.replace(sc, mode=mode)
    folder = Path(folder) if folder is not None else default_folder(sc)
    check_folder(folder, overwrite)
    stale_s = stale_s if stale_s is not None else sc.stale_limit_s
    peer_timeout = sc.watchdogs["peer_timeout"]
    max_gap = int(sc.watchdogs["max_gap"])
    tick, t_compile = _ready_tick(sc)
    prep = prepare(sc)
    a = prep.args
    meas_map, act_map = signal_maps(sc)
    n_meas, n_act = len(meas_map), len(act_map)
    link = free_running_link(address, bind=False, allow_remote=allow_remote,
                             curve_keys=curve_keys)
    stats = BridgeStats()
    ended: list[dict[str, Any]] = []
    counts = {"late_runtime": 0, "held_ticks": 0, "sim_late": None, "sim_missing": None}

    def recv_frame(wait):
        data = link.recv(wait)
        if data is None:
            return None
        stats.received += 1
        try:
            return P.decode(data, n_meas=n_meas, n_act=n_act)
        except ProtocolError as exc:
            stats.rejects.add(exc.reason, str(exc))
            return False

    hello = P.Hello(version=P.PROTOCOL_VERSION, tick_period_s=sc.Ts, mode=mode,
                    meas_map=meas_map, act_map=act_map, map_hash=P.map_hash(meas_map, act_map))
    try:
        link.send(P.encode(hello))
        stats.sent += 1
        welcome = recv_frame(timeout_s)  # a refused CurveZMQ handshake raises BridgeError here
        if welcome is None:
            raise BridgeError(f"no answer from {address} within {timeout_s:g} s")
        if isinstance(welcome, P.Error):
            raise PeerError(welcome.code, welcome.reason)
        if not isinstance(welcome, P.Welcome):
            raise BridgeError(f"the simulator answered HELLO with {type(welcome).__name__}")
        P.handshake_check(hello, welcome)
    except (ProtocolError, PeerError, BridgeError, TransportTimeout) as exc:
        link.close()
        raise BridgeError(f"bridge handshake with {address} failed: {exc}") from None
    if notice:
        notice(f"bridge: connected to {welcome.simulator_name!r} at {address} (free-running, "
               f"Ts = {sc.Ts:g} s, stale after {stale_s * 1e3:g} ms)")
    state: dict[str, Any] = {"next": None, "took": 0.0, "last_seq": -1, "t_last": None,
                             "stale": False, "lost": None, "started": False}
    wd = a["wd"]

    def next_sample(kk, wait, since):
        """The sample for tick kk, or None when none came ``wait`` s after ``since`` (a
        perf_counter time); a later sample means kk was lost. An ERROR or STOP frame from the
        simulator sets state["lost"]."""
        nxt = state["next"]
        if nxt is not None and nxt.seq >= kk:
            return nxt
        deadline = since + wait
        while True:
            left = deadline - time.perf_counter()
            if left <= 0.0:
                return None
            f = recv_frame(left)
            if f is None:
                continue  # the transport's wait is rounded to whole ms: wait out the rest
            if isinstance(f, P.Sample):
                verdict = stats.seq.check(f.seq)
                if verdict in ("duplicate", "out-of-order"):
                    continue
                # a runtime that fell behind answers the newest sample, not a queue of old
                # ones: the samples passed over are lost ticks (held measurement)
                while True:
                    g = recv_frame(0.0)
                    if g is None or g is False:
                        break
                    if isinstance(g, P.Sample) and stats.seq.check(g.seq) not in (
                            "duplicate", "out-of-order"):
                        f = g
                state["next"] = f
                state["t_last"] = time.perf_counter()
                return f
            if isinstance(f, P.Error):
                state["lost"] = f"simulator error {f.code}: {f.reason}"
                return None
            if isinstance(f, P.Stop):
                state["lost"] = f"the simulator stopped: {f.reason}"
                return None

    live = _Live(sc, prep, telemetry, allow_remote, stats)

    def produce(k0: int, n: int, rec: np.ndarray) -> int:
        targs = _tick_args(a)
        live.chunk()
        if not state["started"]:
            # the simulator's clock starts now, with the recording open and the loop ready
            link.send(P.encode(P.Heartbeat(seq=0, t_sender_s=0.0)))
            stats.sent += 1
            state["started"] = True
        for i in range(n):
            kk = k0 + i
            # after a stale trip the runtime waits for the peer a while longer
            t_wait = time.perf_counter()
            if state["stale"]:
                smp = next_sample(kk, peer_timeout, t_wait)
            else:
                # staleness counts from the last sample that arrived
                smp = next_sample(kk, stale_s, state["t_last"] or t_wait)
            t_in = time.perf_counter()
            bits, value, end = 0, 0.0, None
            fresh = False
            if smp is None:
                since = t_in - (state["t_last"] if state["t_last"] is not None else t_wait)
                if state["lost"] is not None or state["stale"]:
                    bits, value = HOST_LOST, since
                    end = {"event": "bridge peer lost", "tick": kk,
                           "detail": state["lost"] or f"nothing from the simulator for "
                                                      f"{since * 1e3:.1f} ms"}
                else:
                    state["stale"] = True
                    bits, value = HOST_STALE, since
                    ended.append({"event": "bridge stale", "tick": kk, "ends_run": False,
                                  "detail": f"no sample for {stale_s * 1e3:g} ms (limit)",
                                  "detected_after_s": since})
            else:
                state["stale"] = False
                fresh = smp.seq == kk
                if fresh:
                    gap = kk - state["last_seq"] - 1
                    state["last_seq"] = kk
                    a["y"][:] = smp.meas
                    if gap > max_gap:
                        bits, value = HOST_GAP, float(gap)
                else:
                    counts["held_ticks"] += 1  # sample kk was lost: hold the last measurement
            a["d"][:] = np.nan
            wd[W_HOST_BITS] = bits | int(live.host_bits())
            wd[W_HOST_VALUE] = value
            wd[W_HOST_TIME] = state["took"]
            go = tick(kk, i, sc.Ts, sc.v_collapse, a["i_vout"], *targs, rec, a["ev"])
            wd[W_HOST_BITS] = 0.0
            if fresh or bits:
                if wd[W_FORCED] > 0.0:
                    _spin_until(t_in + wd[W_FORCED])
                try:
                    # a watchdog tick answers too: the safe output, output enable off
                    link.send(P.encode_actuation(kk, a["u"], int(rec[i, -2]),
                                                 not bool(a["latch"][0])))
                    stats.sent += 1
                except TransportTimeout as exc:
                    if end is None:
                        end = {"event": "bridge timeout", "tick": kk, "detail": str(exc)}
                took = time.perf_counter() - t_in
                if fresh:
                    state["took"] = took
                    stats.rtt_ns.append(int(took * 1e9))  # the runtime's response time
                    if took > sc.Ts:
                        counts["late_runtime"] += 1
            if end is not None:
                ended.append(end)
                return i + 1
            if not go or live.after_tick(k0, i, rec):
                return i + 1
        return n

    def finish() -> list[dict[str, Any]]:
        if any(e["event"] == "bridge peer lost" for e in ended):
            return ended  # nobody is there to answer a STOP
        try:
            link.send(P.encode(P.Stop(reason="run ended")))
            stats.sent += 1
            deadline = time.perf_counter() + min(timeout_s, 2.0)
            while time.perf_counter() < deadline:
                f = recv_frame(max(0.0, deadline - time.perf_counter()))
                if f is None:
                    break
                if isinstance(f, P.Stop):
                    import re
                    m = re.search(r"late (\d+); missing (\d+)", f.reason)
                    if m:
                        counts["sim_late"], counts["sim_missing"] = int(m.group(1)), int(m.group(2))
                    break
        except TransportTimeout:
            pass
        return ended

    def extra():
        d = stats.as_dict()
        d["response_us"] = d.pop("rtt_us")
        d["late"] = counts["late_runtime"]
        return {"bridge": {"address": address, "mode": mode, "simulator": welcome.simulator_name,
                           "stale_limit_s": stale_s, "held_ticks": counts["held_ticks"],
                           "simulator_late_actuations": counts["sim_late"],
                           "simulator_missing_actuations": counts["sim_missing"], **d}}

    summary = None
    try:
        res = execute(sc, prep, folder, produce,
                      timing={"compile_or_load_s": t_compile, "compiled_now": False},
                      progress=progress, extra=extra, end_events=finish)
        summary = res.summary
        return res
    finally:
        live.close(summary)
        link.close()
