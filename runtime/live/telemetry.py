"""Live telemetry of a run: decimated frames on a ZeroMQ PUB socket, operator commands back.

The runtime publishes about 20 frames a second (msgpack maps, below) on a PUB socket and takes
commands (``stop``, ``reset``) on a PULL socket next to it. Neither ever blocks the loop: a PUB
socket drops frames for a subscriber that is not keeping up (high-water mark 10), and commands
are read without waiting, between chunks (SIL, bridge) or by the recording process (paced).
Any number of viewers (``hilrig watch``) may subscribe, on this machine or, with an explicit
address, from another one.

Addresses: ``tcp://HOST:PORT`` (commands on PORT + 1) or ``ipc:///path`` (commands on
``/path.cmd``). Loopback by default; another interface needs ``--allow-remote`` and CurveZMQ
keys (``--telemetry-keys DIR``, a folder made by ``hilrig keys``), as a bridge does: whoever
reaches the command socket can stop a run or clear a latched trip, so it is never open off this
machine without authentication. With keys, frames and commands are encrypted, the run serves with
the folder's server pair (``simulator.key_secret``) and accepts only viewers whose public
certificate is in the folder; a viewer connects with ``hilrig watch ADDRESS --curve-keys DIR``
(the client pair ``runtime.key_secret`` and the server's ``simulator.key``).

Frame (every key always present; values in SI units unless the key says otherwise):
``v`` protocol version 1, ``title``, ``mode``, ``demo_data``, ``caution`` (text or None),
``tick``, ``n_total``, ``t`` [s simulated], ``wall`` [s since start], ``values`` {signal:
[value, unit]}, ``limits`` [[signal, side, threshold, unit]], ``word`` (interlock word),
``latched``, ``cause`` (text or None), ``trip_t``, ``events`` (the last 6: [tick, text]),
``trace`` {"t", "v_out", "v_ref"} (the last ``TRACE_S`` simulated seconds, at most 240 points),
``timing`` {"ticks_per_s", "lateness_p99_us", "late_ticks", "compute_p99_us"} (None where the
mode has no such figure), ``bridge`` (link statistics or None), ``ended``, ``end_event`` (once
ended: how, the outcome's one-line text of runtime/outcome.py in SIL and bridge runs),
``units`` (None for one unit; for paralleled units: ``rows``, one per unit, ``[k, i_out [A],
share current [A], deviation [A], deviation [% of the share] or None, enable (1 runs), trip
cause bits, cause text or None]`` at the newest row, the share renormalised over the units that
run as in runtime/trials/sharing.py; ``trips``, the last 6 trips of single units seen,
``[k, cause text, t [s]]``).
"""
from __future__ import annotations

import math
import time
from collections import deque
from typing import Any

import msgpack
import numpy as np
import zmq

from hilrig.safety.interlocks import (EVENT_NAMES, L_CAUSE, L_TIME, L_TRIPPED, SIDE_WORDS,
                                      InterlockTable)

DEFAULT_ADDRESS = "tcp://127.0.0.1:47820"
#: the CurveZMQ keys folder for telemetry off loopback: set by the command line
#: (``--telemetry-keys``), passed on by :func:`telemetry_config`
CURVE_KEYS = None
#: how long a run waits for its first viewer to subscribe before its first tick: set by the
#: command line when it has started a viewer itself (a fast run would otherwise be over before
#: the viewer connects: a publisher drops what nobody has subscribed to yet)
WAIT_FOR_VIEWER_S = 0.0
FRAME_INTERVAL_S = 0.05
TRACE_S = 2.0
TRACE_POINTS = 240
KEY_SIGNALS = ("v_out", "v_ref", "i_out", "i_L1", "v_C1", "u", "v_dc")
#: the per-unit trips a frame carries (``units["trips"]``, the newest)
UNIT_TRIPS_SHOWN = 6


def needs_keys(address: str) -> bool:
    """True for a tcp address reachable from other machines (not loopback, not ipc)."""
    from hilrig.bridge.transport import _is_loopback
    return not address.startswith("ipc://") and not _is_loopback(address)


def check_telemetry_address(address: str, allow_remote: bool = False, curve_keys=None) -> str:
    """Validate a telemetry address: loopback or ipc, or another interface with
    ``allow_remote`` and CurveZMQ keys (its command socket can stop a run and clear a trip)."""
    from hilrig.bridge.errors import BridgeError
    from hilrig.bridge.transport import check_address
    check_address(address, allow_remote)
    if curve_keys is None and needs_keys(address):
        raise BridgeError(f"telemetry at {address}, reachable from other machines, takes commands "
                          f"(stop, reset) and needs CurveZMQ keys: make them with 'hilrig keys "
                          f"DIR' and pass --telemetry-keys DIR (viewers: hilrig watch ADDRESS "
                          f"--curve-keys DIR)")
    return address


def command_address(address: str) -> str:
    """The PULL address next to a PUB address (tcp: the next port; ipc: ``.cmd`` added)."""
    if address.startswith("ipc://"):
        return address + ".cmd"
    host, port = address.rsplit(":", 1)
    return f"{host}:{int(port) + 1}"


class Telemetry:
    """The runtime's side: publish frames, take commands. Cheap to call often: a frame goes
    out at most every ``FRAME_INTERVAL_S`` unless ``force``."""

    def __init__(self, address: str, *, info: dict[str, Any], names: list[str], units: list[str],
                 table: InterlockTable, allow_remote: bool = False, wait_for_viewer_s: float = 0.0,
                 curve_keys=None, units_info: dict[str, Any] | None = None):
        check_telemetry_address(address, allow_remote, curve_keys)
        self.address = address
        # a CurveZMQ server owns its context (its authenticator's inproc name: as the bridge's
        # transports, hilrig.bridge.transport._context)
        self.own_ctx = curve_keys is not None
        self.ctx = zmq.Context() if self.own_ctx else zmq.Context.instance()
        self.auth = None
        # XPUB: a PUB socket that also hands over subscriptions, so a run can wait for its viewer
        self.pub = self.ctx.socket(zmq.XPUB)
        self.pub.setsockopt(zmq.SNDHWM, 10)
        self.pub.setsockopt(zmq.LINGER, 0)
        self.cmd = self.ctx.socket(zmq.PULL)
        self.cmd.setsockopt(zmq.LINGER, 0)
        self.cmd.setsockopt(zmq.MAXMSGSIZE, 4096)
        try:
            if curve_keys is not None:
                from hilrig.bridge.keys import server_keys, start_authenticator
                pub, sec = server_keys(curve_keys)
                self.auth = start_authenticator(self.ctx, curve_keys)
                for sock in (self.pub, self.cmd):
                    sock.curve_server = True
                    sock.curve_publickey, sock.curve_secretkey = pub, sec
            self.pub.bind(address)
            self.cmd.bind(command_address(address))
        except BaseException as exc:
            self.pub.close(0)
            self.cmd.close(0)
            self._release()
            if not isinstance(exc, zmq.ZMQError):
                raise
            raise ValueError(f"telemetry address {address} (commands on "
                             f"{command_address(address)}): {exc}; choose another --telemetry "
                             f"address") from None
        self.info = info
        self.names = names
        self.units = units
        self.table = table
        self.idx = {n: names.index(n) for n in KEY_SIGNALS if n in names}
        self.i_word = names.index("interlock_word")
        self.i_late = names.index("tick_lateness") if "tick_lateness" in names else None
        self.i_comp = names.index("tick_compute") if "tick_compute" in names else None
        self.limits = [[r.signal, SIDE_WORDS[r.side_code], r.threshold, r.unit] for r in table.rows]
        self.trace: deque = deque()
        self.last_row: np.ndarray | None = None
        self.t0 = time.perf_counter()
        self.last_sent = 0.0
        self.tick = 0
        self.ticks_at_last = 0
        self.late_ticks = 0
        self.recent_late: list[np.ndarray] = []
        self.recent_comp: list[np.ndarray] = []
        # paralleled units (:func:`units_info`): the columns of each unit's current, enable
        # and trip bits, its weight; the trips seen so far
        self.unit_cols = None
        if units_info:
            self.unit_cols = {
                "i_out": [names.index(n) for n in units_info["i_out"]],
                "enable": [names.index(n) for n in units_info["enable"]],
                "trip": [names.index(n) for n in units_info["trip"]],
                "weights": np.asarray(units_info["weights"], dtype=float)}
            self.unit_bits = np.zeros(len(units_info["i_out"]), dtype=np.int64)
            self.unit_trips: deque = deque(maxlen=UNIT_TRIPS_SHOWN)
        if wait_for_viewer_s > 0 and self.pub.poll(int(wait_for_viewer_s * 1000)):
            self.pub.recv()  # the first subscription: a viewer is there

    def _drain_subscriptions(self) -> None:
        while self.pub.poll(0):
            self.pub.recv()

    # ---- input -------------------------------------------------------------------------
    def add_rows(self, first_tick: int, rows: np.ndarray, ts: float) -> None:
        """Take the newest recorded rows (any number; decimated into the trace)."""
        n = rows.shape[0]
        if n == 0:
            return
        self.tick = first_tick + n
        self.last_row = rows[-1].copy()
        stride = max(1, int(round(TRACE_S / ts / TRACE_POINTS)))
        ks = np.arange((-first_tick) % stride, n, stride)
        iv, ir = self.idx.get("v_out"), self.idx.get("v_ref")
        for k in ks:
            self.trace.append(((first_tick + k) * ts, rows[k, iv] if iv is not None else np.nan,
                               rows[k, ir] if ir is not None else np.nan))
        t_end = (first_tick + n) * ts
        while self.trace and self.trace[0][0] < t_end - TRACE_S:
            self.trace.popleft()
        if self.unit_cols is not None:
            self._unit_trips(first_tick, rows, ts)
        if self.i_late is not None:
            la = rows[:, self.i_late]
            self.late_ticks += int((la > ts).sum())
            self.recent_late.append(la.copy())
            self.recent_comp.append(rows[:, self.i_comp].copy())

    def _unit_trips(self, first_tick: int, rows: np.ndarray, ts: float) -> None:
        """Note each tick on which a unit's latched cause bits gain a bit (a trip of that
        unit; runtime/multi/control.py)."""
        from hilrig.runtime.trials.sharing import LATCH_BITS, cause_text
        for j, col in enumerate(self.unit_cols["trip"]):
            c = rows[:, col]
            bits = np.where(np.isfinite(c), c, 0.0).astype(np.int64) & LATCH_BITS
            prev = np.concatenate(([self.unit_bits[j]], bits[:-1]))
            for k in np.flatnonzero(bits & ~prev):
                self.unit_trips.append([j + 1, cause_text(int(bits[k] & ~prev[k])),
                                        (first_tick + int(k)) * ts])
            self.unit_bits[j] = bits[-1]

    def _unit_rows(self, row: np.ndarray | None) -> dict[str, Any] | None:
        """The frame's ``units``: each unit at the newest row, and the last trips."""
        if self.unit_cols is None:
            return None
        from hilrig.runtime.trials.sharing import LATCH_BITS, PCT_FLOOR_A, cause_text
        u = self.unit_cols
        rows = []
        if row is not None:
            cur = row[u["i_out"]]
            on = row[u["enable"]] > 0.5
            w = u["weights"] * on
            share = w / w.sum() * float(np.sum(cur)) if w.sum() > 0 else np.zeros_like(w)
            for j in range(cur.shape[0]):
                dev = float(cur[j] - share[j])
                pct = 100.0 * dev / float(share[j]) if abs(share[j]) >= PCT_FLOOR_A else None
                tv = row[u["trip"][j]]
                bits = int(tv) & LATCH_BITS if math.isfinite(tv) else 0
                rows.append([j + 1, float(cur[j]), float(share[j]), dev, pct,
                             1 if on[j] else 0, bits, cause_text(bits) if bits else None])
        return {"rows": rows, "trips": [list(x) for x in self.unit_trips]}

    # ---- output ------------------------------------------------------------------------
    def frame(self, latch: np.ndarray, evlog: np.ndarray, evn: np.ndarray, *,
              bridge: dict | None = None, ended: bool = False, end_event: str | None = None) -> dict:
        ts = self.info["Ts"]
        row = self.last_row
        values = {}
        if row is not None:
            for n, j in self.idx.items():
                values[n] = [float(row[j]), self.units[self.names.index(n)]]
            if "v_out" in self.idx and "i_out" in self.idx:
                values["p_out"] = [float(row[self.idx["v_out"]] * row[self.idx["i_out"]]), "W"]
        latched = bool(latch[L_TRIPPED])
        cause = self.table.cause_text(int(latch[L_CAUSE])) if latched else None
        n_ev = int(evn[0])
        events = []
        for r in evlog[max(0, min(n_ev, evlog.shape[0]) - 6):min(n_ev, evlog.shape[0])]:
            kind = int(r[1])
            text = EVENT_NAMES.get(kind, str(kind))
            if kind in (1, 2, 3, 5, 6):
                text += ": " + self.table.cause_text(int(r[2]))
            if kind == 3:
                text += " still holds"
            events.append([int(r[0]), text])
        now = time.perf_counter()
        dt = max(now - self.last_sent, 1e-9) if self.last_sent else max(now - self.t0, 1e-9)
        timing: dict[str, Any] = {"ticks_per_s": (self.tick - self.ticks_at_last) / dt,
                                  "lateness_p99_us": None, "late_ticks": None,
                                  "compute_p99_us": None}
        if self.recent_late:
            la = np.concatenate(self.recent_late)
            co = np.concatenate(self.recent_comp)
            timing.update(lateness_p99_us=float(np.percentile(la, 99) * 1e6),
                          late_ticks=self.late_ticks,
                          compute_p99_us=float(np.percentile(co, 99) * 1e6))
        tr = list(self.trace)
        return {
            "v": 1, "title": self.info.get("title", ""), "mode": self.info.get("mode", ""),
            "demo_data": bool(self.info.get("demo_data")), "caution": self.info.get("caution"),
            "tick": self.tick, "n_total": self.info["n_total"], "t": self.tick * ts,
            "wall": now - self.t0, "values": values, "limits": self.limits,
            "word": int(row[self.i_word]) if row is not None else 0,
            "latched": latched, "cause": cause,
            "trip_t": float(latch[L_TIME]) if latched else None, "events": events,
            "trace": {"t": [p[0] for p in tr], "v_out": [float(p[1]) for p in tr],
                      "v_ref": [float(p[2]) for p in tr]},
            "timing": timing, "bridge": bridge, "ended": ended, "end_event": end_event,
            "units": self._unit_rows(row),
        }

    def publish(self, latch, evlog, evn, *, force: bool = False, **kw) -> bool:
        """Send a frame if one is due (or ``force``); never waits. True if one went out."""
        now = time.perf_counter()
        if not force and now - self.last_sent < FRAME_INTERVAL_S:
            return False
        f = self.frame(latch, evlog, evn, **kw)
        self._drain_subscriptions()
        try:
            self.pub.send(msgpack.packb(f, use_bin_type=True), zmq.NOBLOCK)
        except zmq.Again:
            pass
        self.last_sent = now
        self.ticks_at_last = self.tick
        self.recent_late.clear()
        self.recent_comp.clear()
        return True

    def commands(self) -> list[str]:
        """Commands received since the last call ("stop", "reset"); never waits."""
        out = []
        while True:
            try:
                msg = self.cmd.recv(zmq.NOBLOCK)
            except zmq.Again:
                return out
            try:
                text = msg.decode("utf-8").strip().lower()
            except UnicodeDecodeError:
                continue
            if text in ("stop", "reset"):
                out.append(text)

    def close(self) -> None:
        self.pub.close(linger=200)  # let the last frame (ended) go out
        self.cmd.close(linger=0)
        self._release()

    def _release(self) -> None:
        if self.auth is not None:
            self.auth.stop()
            self.auth = None
        if self.own_ctx and not self.ctx.closed:
            self.ctx.term()  # waits for the last frame's linger, then frees the context


def run_info(sc) -> dict[str, Any]:
    """The static part of every frame: what runs, and the high-voltage caution if it applies."""
    from hilrig.safety.caution import caution_text, scenario_voltages
    return {"title": sc.title, "mode": sc.mode, "demo_data": sc.demo_data,
            "caution": caution_text(scenario_voltages(sc)), "n_total": sc.n_ticks, "Ts": sc.Ts}


def units_info(sc) -> dict[str, Any] | None:
    """What the frames need of paralleled units (plain data: it goes to the paced recording
    process too): each unit's recorded current, enable and trip columns and its weight; None
    for a single unit."""
    us = getattr(sc, "units", None)
    if us is None:
        return None
    from hilrig.runtime.multi.plant import unit_signal
    ks = range(1, us.count + 1)
    return {"i_out": list(us.i_out), "enable": [unit_signal(k, "enable") for k in ks],
            "trip": [unit_signal(k, "trip") for k in ks], "weights": [float(w) for w in us.shares]}


def telemetry_config(sc, prep, address: str, allow_remote: bool = False) -> dict[str, Any]:
    """Keyword arguments of :class:`Telemetry` for a prepared run."""
    return dict(address=address, info=run_info(sc), names=[s.name for s in prep.signals],
                units=[s.unit for s in prep.signals], table=prep.table, allow_remote=allow_remote,
                wait_for_viewer_s=WAIT_FOR_VIEWER_S, curve_keys=CURVE_KEYS,
                units_info=units_info(sc))
