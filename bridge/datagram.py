"""Fixed-layout datagrams: the bridge over UDP with frames of a fixed binary layout, for
simulators that cannot speak msgpack. docs/protocol.md section 16 is the authority.

The layout is agreed out of band: declared in the scenario (``[bridge.layout]``) or in a layout
file named on the command line (``--layout FILE``), and set up the same on the simulator. Each
direction has its own layout: an optional uint32 counter, an optional float64 time [s], then
the signals in the order listed, each float32 or float64, all in one byte order. No handshake
and no serialisation library: a frame is those bytes and nothing else, and one of the wrong
length is rejected and counted (``frame-length``).

The runtime's side is the msgpack session's (bridge/session.py) with :class:`FixedCodec` in
place of the msgpack codec: the same lockstep and free-running exchanges, watchdogs, sequence
tracking and rejection counts. The stand-in simulator's side is :func:`serve`.

Two counter values of the runtime->simulator frame are requests, not actuations:
``START`` (0xFFFFFFFF) asks for the first sample (lockstep) or starts the simulator's clock
(free-running); ``END`` (0xFFFFFFFE) ends the session. A run has at most 2e9 ticks
(scenario.MAX_TICKS), so a tick number never reaches them.
"""
from __future__ import annotations

import difflib
import functools
import math
import struct
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np

from .errors import BridgeError, ProtocolError

#: the counter value of the start request (runtime -> simulator)
START = 0xFFFFFFFF
#: the counter value of the end request (runtime -> simulator)
END = 0xFFFFFFFE
#: the largest tick number a counter carries
MAX_COUNTER = END - 1

TYPES = {"float32": "f", "float64": "d"}
BYTE_ORDERS = {"little": "<", "big": ">"}
#: runtime -> simulator values that are not plant inputs: the runtime's output enable (1.0 on,
#: 0.0 off: the simulator blocks the power stage) and its interlock word (float64 only)
EXTRA_ACTUATION = ("output_enable", "interlock_word")
DIRECTION_KEYS = {"signals", "type", "byte_order", "counter", "time"}
LAYOUT_KEYS = {"sample", "actuation", "type", "byte_order"}


class LayoutError(ValueError):
    """A layout that cannot be used: the message names the file, the key, the value and the fix."""


@dataclass(frozen=True)
class Direction:
    """The layout of one direction's frames."""

    signals: tuple[str, ...]
    type: str = "float64"
    byte_order: str = "little"
    counter: bool = True
    time: bool = False

    @property
    def format(self) -> str:
        """The frame as a Python struct format string (struct module: '<' little, '>' big, 'I'
        uint32, 'd' float64, 'f' float32; no padding with an explicit byte order)."""
        return (BYTE_ORDERS[self.byte_order] + ("I" if self.counter else "")
                + ("d" if self.time else "")
                + (str(len(self.signals)) if len(self.signals) > 1 else "") + TYPES[self.type])

    @property
    def size(self) -> int:
        """Bytes per frame."""
        return 4 * self.counter + 8 * self.time + (4 if self.type == "float32" else 8) * len(
            self.signals)

    def fields(self) -> list[tuple[int, str, str]]:
        """(byte offset, name, type) of every field in order."""
        out, off = [], 0
        if self.counter:
            out.append((0, "counter", "uint32"))
            off = 4
        if self.time:
            out.append((off, "time", "float64"))
            off += 8
        w = 4 if self.type == "float32" else 8
        out.extend((off + w * i, s, self.type) for i, s in enumerate(self.signals))
        return out

    def describe(self) -> str:
        parts = (["counter"] if self.counter else []) + (["time"] if self.time else [])
        return (f"{self.size} bytes, {self.byte_order}-endian: " + ", ".join(parts + [
            f"{len(self.signals)} x {self.type}"]))

    @functools.cached_property
    def _head(self) -> struct.Struct:
        return struct.Struct(BYTE_ORDERS[self.byte_order] + ("I" if self.counter else "")
                             + ("d" if self.time else ""))

    @functools.cached_property
    def _values(self) -> np.dtype:
        return np.dtype(BYTE_ORDERS[self.byte_order] + TYPES[self.type])

    def pack(self, counter: int | None, t: float | None, values) -> bytes:
        """One frame. ``values`` in the order of ``signals`` (float64; a float32 layout rounds
        each to nearest; a value beyond float32's range becomes infinity)."""
        head = (counter, t) if self.counter and self.time else (
            (counter,) if self.counter else (t,) if self.time else ())
        v = np.asarray(values, dtype=np.float64)
        if self.type == "float32":
            with np.errstate(over="ignore"):
                return self._head.pack(*head) + v.astype(self._values).tobytes()
        return self._head.pack(*head) + v.astype(self._values, copy=False).tobytes()

    def unpack(self, data: bytes) -> tuple[int | None, float | None, np.ndarray]:
        """(counter or None, time or None, values as float64) of one frame; a frame of another
        length raises ProtocolError ``frame-length``."""
        if len(data) != self.size:
            raise ProtocolError("frame-length", f"a datagram of {len(data)} bytes where the "
                                f"layout's frame has {self.size} ({self.describe()})")
        head = self._head.unpack_from(data, 0)
        counter = head[0] if self.counter else None
        t = head[-1] if self.time else None
        values = np.frombuffer(data, dtype=self._values, offset=self._head.size).astype(
            np.float64)
        return counter, t, values


@dataclass(frozen=True)
class Layout:
    """Both directions' layouts and where they were declared (for messages)."""

    sample: Direction
    actuation: Direction
    source: str = ""

    def describe(self) -> dict[str, Any]:
        def one(d: Direction) -> dict[str, Any]:
            return {"signals": list(d.signals), "type": d.type, "byte_order": d.byte_order,
                    "counter": d.counter, "time": d.time, "bytes": d.size}
        return {"source": self.source, "sample": one(self.sample), "actuation": one(self.actuation)}

    def require_counters(self, mode: str) -> None:
        """Lockstep tells a repeated request from a new one, and a late sample from the one due,
        by the counters: both directions need one. Free-running needs the actuation's (its
        start and end requests)."""
        need = (("sample", "actuation") if mode == "lockstep" else ("actuation",))
        for name in need:
            if not getattr(self, name).counter:
                raise LayoutError(f"{self.source}: {name}.counter = false, but {mode} over "
                                  f"fixed-layout datagrams needs the {name} counter; set "
                                  f"{name}.counter = true (docs/protocol.md section 16)")


# -- reading a layout -----------------------------------------------------------------------------

def _hint(name: str, known) -> str:
    close = difflib.get_close_matches(name, list(known), n=3)
    return f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""


def _direction(where: str, key: str, table: Any, defaults: dict, known: list[str],
               required: list[str], extra: tuple[str, ...]) -> Direction:
    at = f"{where}: {key}"
    if not isinstance(table, dict):
        raise LayoutError(f"{at} is {table!r}; expected a table with signals = [...] (and "
                          f"optionally type, byte_order, counter, time)")
    for k in table:
        if k not in DIRECTION_KEYS:
            raise LayoutError(f"{where}: unknown key '{key}.{k}'{_hint(k, DIRECTION_KEYS)} "
                              f"(allowed: {', '.join(sorted(DIRECTION_KEYS))})")
    opts = dict(defaults)
    opts.update({k: table[k] for k in ("type", "byte_order") if k in table})
    for k, choices in (("type", TYPES), ("byte_order", BYTE_ORDERS)):
        if opts[k] not in choices:
            raise LayoutError(f"{at}.{k} = {opts[k]!r} is not one of "
                              f"{', '.join(repr(c) for c in choices)}; write one of them")
    flags = {}
    for k, default in (("counter", True), ("time", False)):
        v = table.get(k, default)
        if not isinstance(v, bool):
            raise LayoutError(f"{at}.{k} = {v!r} is not true or false")
        flags[k] = v
    sig = table.get("signals")
    if sig is None:
        raise LayoutError(f"{at}.signals is missing: list the signals in frame order, "
                          f"e.g. signals = {required[:2]!r}")
    if not isinstance(sig, list) or not all(isinstance(s, str) for s in sig):
        raise LayoutError(f"{at}.signals = {sig!r} is not a list of signal names")
    allowed = list(known) + list(extra)
    seen: set[str] = set()
    for s in sig:
        if s not in allowed:
            raise LayoutError(f"{at}.signals: unknown signal {s!r}{_hint(s, allowed)} "
                              f"(allowed: {', '.join(allowed)})")
        if s in seen:
            raise LayoutError(f"{at}.signals: {s!r} is listed twice; list each signal once")
        seen.add(s)
    missing = [s for s in required if s not in seen]
    if missing:
        raise LayoutError(f"{at}.signals lacks {', '.join(repr(m) for m in missing)}: every "
                          f"one of {', '.join(required)} must be in the frame (add them)")
    if "interlock_word" in seen and opts["type"] != "float64":
        raise LayoutError(f"{at}.signals: 'interlock_word' needs type = 'float64' (its bits "
                          f"reach 52, beyond float32's 24-bit significand); use float64 or "
                          f"leave it out")
    if len(sig) > 256:
        raise LayoutError(f"{at}.signals has {len(sig)} entries; at most 256")
    return Direction(signals=tuple(sig), type=opts["type"], byte_order=opts["byte_order"],
                     counter=flags["counter"], time=flags["time"])


def layout_from_table(table: Any, meas: list[str], act: list[str], where: str) -> Layout:
    """A Layout from its TOML table (``sample``, ``actuation``, and ``type``, ``byte_order``
    as defaults for both). ``meas``: the plant's measurement names (every one in the sample
    frame); ``act``: its actuation names (every one in the actuation frame)."""
    if not isinstance(table, dict):
        raise LayoutError(f"{where} is {table!r}; expected a table with [sample] and [actuation]")
    for k in table:
        if k not in LAYOUT_KEYS:
            raise LayoutError(f"{where}: unknown key {k!r}{_hint(k, LAYOUT_KEYS)} "
                              f"(allowed: {', '.join(sorted(LAYOUT_KEYS))})")
    defaults = {"type": table.get("type", "float64"),
                "byte_order": table.get("byte_order", "little")}
    for k in ("sample", "actuation"):
        if k not in table:
            raise LayoutError(f"{where}: the {k} table is missing; give {k}.signals = [...]")
    sample = _direction(where, "sample", table["sample"], defaults, meas, meas, ())
    actuation = _direction(where, "actuation", table["actuation"], defaults, act, act,
                           EXTRA_ACTUATION)
    return Layout(sample=sample, actuation=actuation, source=where)


def plant_names(plant) -> tuple[list[str], list[str]]:
    """The measurement and actuation names of a plant choice (as bridge.session.signal_maps)."""
    decl = plant.plugin.declaration
    return [s.name for s in decl.outputs], [s.name for s in decl.inputs] or ["u"]


def load_layout(source: str | Path | None, sc) -> Layout:
    """The layout for a run of ``sc``: from the file ``source``, or with ``source`` None from
    the scenario's ``[bridge.layout]``."""
    import tomllib
    meas, act = plant_names(sc.plant)
    if source is None:
        raw = tomllib.loads(sc.text).get("bridge", {})
        if "layout" not in raw:
            name = Path(sc.path).name if sc.path else "the scenario"
            raise LayoutError(f"{name} has no [bridge.layout] table: declare the frames there "
                              f"(docs/scenarios.md) or name a layout file: --layout FILE")
        name = Path(sc.path).name if sc.path else "scenario"
        return layout_from_table(raw["layout"], meas, act, f"{name}: bridge.layout")
    path = Path(source)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise LayoutError(f"layout file {str(path)!r} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise LayoutError(f"{path}: cannot read: {exc}") from None
    try:
        table = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise LayoutError(f"{path}: not valid TOML: {exc}") from None
    return layout_from_table(table, meas, act, str(path))


def check_address(address: str) -> None:
    if not address.startswith("udp://"):
        raise BridgeError(f"fixed-layout frames (--layout) travel as datagrams: the address "
                          f"{address!r} must be udp://HOST:PORT")


# -- the runtime's codec ----------------------------------------------------------------------------

class FixedCodec:
    """What bridge/session.py calls in place of the msgpack codec (hilrig.bridge.protocol):
    ``decode`` a sample datagram into a ``Sample``, ``encode_actuation``, and ``encode`` of
    the session's control frames (HEARTBEAT "ready" -> the start request; STOP or ERROR -> the
    end request). There is no handshake."""

    def __init__(self, layout: Layout, act_names: list[str]):
        self.layout = layout
        a = layout.actuation
        self.u_index = [act_names.index(s) if s in act_names else -1 for s in a.signals]
        self.extra = {s: i for i, s in enumerate(a.signals) if s in EXTRA_ACTUATION}
        self._u_at = np.array([i for i, j in enumerate(self.u_index) if j >= 0], dtype=np.intp)
        self._u_from = np.array([j for j in self.u_index if j >= 0], dtype=np.intp)
        self._vals = np.zeros(len(a.signals))
        self.arrivals = 0  # samples without a counter are numbered in order of arrival
        self.meas_order: np.ndarray | None = None
        self.ts = 0.0  # the tick period: an actuation's time field is counter * ts
        self.safe_u = np.zeros(max(1, len(act_names)))  # the values of start and end requests

    def set_meas_names(self, meas_names: list[str]) -> None:
        order = [self.layout.sample.signals.index(s) for s in meas_names]
        self.meas_order = None if order == list(range(len(order))) else np.array(order)

    def decode(self, data: bytes, n_meas: int | None = None, n_act: int | None = None):
        from . import protocol as P
        counter, t, values = self.layout.sample.unpack(data)
        if t is not None and not math.isfinite(t):
            raise ProtocolError("not-finite", f"sample time {t!r}: not finite")
        if counter is None:
            counter = self.arrivals
        elif counter > MAX_COUNTER:
            raise ProtocolError("out-of-range", f"sample counter {counter:#x} is reserved "
                                f"(at most {MAX_COUNTER:#x})")
        self.arrivals += 1
        meas = values[self.meas_order] if self.meas_order is not None else values
        meas.flags.writeable = False
        # every value is checked and of its final type: set them directly, as the msgpack
        # decoder does (the per-tick path: Sample's __post_init__ normalises again)
        frame = P.Sample.__new__(P.Sample)
        frame.__dict__.update(seq=counter, t_sim_s=float("nan") if t is None else t, meas=meas)
        return frame

    def encode_actuation(self, seq: int, u, word: int, enable: bool) -> bytes:
        a = self.layout.actuation
        vals = self._vals
        vals[self._u_at] = u[self._u_from]
        if "output_enable" in self.extra:
            vals[self.extra["output_enable"]] = 1.0 if enable else 0.0
        if "interlock_word" in self.extra:
            vals[self.extra["interlock_word"]] = float(word)
        return a.pack(seq, seq * self.ts if seq <= MAX_COUNTER else 0.0, vals)

    def request(self, counter: int, safe_u) -> bytes:
        """The start or end request: the counter, and the safe output with output enable off."""
        return self.encode_actuation(counter, safe_u, 0, False)

    def encode(self, frame) -> bytes:
        from . import protocol as P
        if isinstance(frame, P.Heartbeat):
            return self.request(START, self.safe_u)
        if isinstance(frame, (P.Stop, P.Error)):
            return self.request(END, self.safe_u)
        raise BridgeError(f"fixed-layout datagrams carry no {type(frame).__name__} frame")


def codec_for(layout: Layout, sc, mode: str) -> FixedCodec:
    """The runtime's codec for a run of ``sc`` in ``mode`` (checks the counters the mode needs)."""
    layout.require_counters(mode)
    meas, act = plant_names(sc.plant)
    c = FixedCodec(layout, act)
    c.set_meas_names(meas)
    c.ts = sc.Ts
    c.safe_u = np.full(len(act), sc.safe_u)
    return c


# -- the stand-in simulator's side --------------------------------------------------------------

class SimCodec:
    """The simulator's side: samples out, actuations in."""

    def __init__(self, layout: Layout, meas_names: list[str], act_names: list[str]):
        self.layout = layout
        order = [meas_names.index(s) for s in layout.sample.signals]
        self.y_index = None if order == list(range(len(order))) else np.array(order)
        a = layout.actuation.signals
        self.u_pos = np.array([a.index(s) for s in act_names])
        self.enable_pos = a.index("output_enable") if "output_enable" in a else None

    def sample(self, k: int, t: float, y) -> bytes:
        return self.layout.sample.pack(k, t, y if self.y_index is None else
                                       np.asarray(y)[self.y_index])

    def actuation(self, data: bytes) -> tuple[int | None, np.ndarray, bool]:
        """(counter, plant inputs, output enable) of a datagram; ProtocolError if it is not an
        actuation frame of the layout (wrong length, non-finite value)."""
        counter, _t, values = self.layout.actuation.unpack(data)
        if counter in (START, END):
            return counter, values[self.u_pos], False
        # a finite sum means every value is finite; a sum that overflowed is checked one by one
        if not math.isfinite(values.sum()) and not np.all(np.isfinite(values)):
            raise ProtocolError("not-finite", "an actuation value is not finite")
        enable = True if self.enable_pos is None else bool(values[self.enable_pos] != 0.0)
        return counter, values[self.u_pos], enable


def serve(sc, bind: str, layout: Layout, *, mode: str = "lockstep", sessions: int | None = None,
          allow_remote: bool = False, idle_timeout_s: float | None = None, faults=None,
          stale_s: float = 1.0, commands=None, log: Callable[[str], None] = print) -> int:
    """The stand-in simulator over fixed-layout datagrams, lockstep or free-running, until
    ``sessions`` have ended (None: forever) or nothing arrives for ``idle_timeout_s``.

    Lockstep: the start request is answered with sample 0 (the state before any actuation);
    actuation k, when k is the last sample sent, advances the plant one tick and is answered
    with sample k + 1; a repeat of the last actuation (k - 1) is answered with the same sample
    again, without advancing. Free-running: the start request starts the clock; sample k goes
    out at k Ts; the actuation answering sample k is applied from the next step on if it came
    in time. The end request ends the session. Faults (hilrig.bridge.standin.Faults, also
    typed on ``commands``, e.g. standard input): drop, delay, jitter, freeze; a mangled frame
    (``corrupt_every``) goes out one byte short; a disconnect (there is no frame to say so)
    falls silent and ends the session."""
    from .standin import Faults, Rejections, StandIn, start_command_reader
    from .transport import UdpServer
    check_address(bind)
    layout.require_counters(mode)
    faults = faults or Faults()
    sim = StandIn(sc)
    faults.schedule([f for f in sc.faults if f.kind.startswith("link_")], sc.Ts, True, log)
    codec = SimCodec(layout, [m[0] for m in sim.meas_map], [m[0] for m in sim.act_map])
    rep = UdpServer(bind, allow_remote=allow_remote)
    if commands is not None:
        start_command_reader(faults, commands, lambda: sim.k, True, log)
    rejects = Rejections(log)
    served = 0
    log(f"stand-in simulator ({mode}, fixed-layout datagrams): {sc.plant.plugin.name}, "
        f"Ts = {sc.Ts:g} s, sample {layout.sample.describe()}, actuation "
        f"{layout.actuation.describe()}, listening on {bind}")

    def sample_bytes(k: int) -> bytes:
        sim.sample(k)  # fills sim.y (the msgpack frame it returns is not used)
        return codec.sample(k, k * sc.Ts, sim.y)

    def send(data: bytes) -> None:
        faults.tick = sim.k
        if faults.active():
            before = faults.corrupted
            wire = faults.wire(data)
            if wire is not None and faults.corrupted != before:
                wire = data[:-1]  # mangled: a fixed frame has no structure to break but its length
            data = wire
        if data is not None:
            rep.send(data)

    def receive(wait):
        data = rep.recv(timeout_s=wait)
        if data is None:
            return None
        try:
            return codec.actuation(data)
        except ProtocolError as exc:
            rejects.add(exc.reason, str(exc))
            return False

    try:
        restart = False
        while sessions is None or served < sessions:
            got = (None, None, False) if restart else receive(idle_timeout_s)
            restart = False
            if got is None:
                log("stand-in simulator: idle timeout, stopping")
                break
            if got is False:
                continue
            counter, u, enable = got
            if counter is not None and counter != START:
                rejects.add("unexpected", f"counter {counter} outside a session (expected the "
                                          f"start request {START:#x})")
                continue
            sim.reset()
            session_peer = rep.peer
            if mode == "lockstep":
                silence = min(SESSION_SILENCE_S, idle_timeout_s or SESSION_SILENCE_S)
                why = _lockstep(sim, faults, rep, receive, send, sample_bytes, rejects,
                                silence, session_peer, log)
                restart = why == "a new start request"
            else:
                why = _free_running(sim, sc, faults, rep, receive, send, sample_bytes, stale_s,
                                    session_peer, log)
            served += 1
            log(f"stand-in simulator: session {served} ended ({why}) after {sim.k} ticks")
    finally:
        rep.close()
        if faults.active():
            log(f"stand-in simulator: faults injected: {faults.dropped} dropped, "
                f"{faults.corrupted} corrupted replies")
        log(f"stand-in simulator: {rejects.summary()}")
    return served


#: a lockstep session of the stand-in ends after this long without a datagram from its runtime
#: (a live runtime resends every 50 ms at most); a new start request then opens the next one
SESSION_SILENCE_S = 10.0


def _lockstep(sim, faults, rep, receive, send, sample_bytes, rejects, silence_s,
              session_peer, log) -> str:
    last = sample_bytes(0)
    send(last)
    while True:
        got = receive(silence_s)
        if got is None:
            return f"nothing from the runtime for {silence_s:g} s"
        if rep.peer != session_peer:
            rep.peer = session_peer  # not the session's runtime: dropped (counted if malformed)
            if got is not False:
                rejects.add("unexpected", "a datagram from another address mid-session")
            continue
        if got is False:
            continue
        counter, u, enable = got
        if counter == END:
            return "end request"
        if counter == START and sim.k == 0:
            send(last)  # the first sample was lost: send it again
        elif counter == START:
            return "a new start request"  # the runtime started over: so does the plant
        elif counter == sim.k - 1:
            send(last)  # a repeated actuation: answer again, do not advance
        elif counter == sim.k:
            if faults.disconnect_after is not None and sim.k >= faults.disconnect_after:
                log(f"stand-in simulator: disconnected at tick {sim.k} (fault injection)")
                return "disconnect"
            if faults.freeze_after is not None and sim.k >= faults.freeze_after:
                log(f"stand-in simulator: frozen at tick {sim.k} (fault injection)")
                while receive(silence_s) is not None:
                    pass
                return "frozen"
            if not sim.step(u, enable):
                log(f"stand-in simulator: the plant state became non-finite at tick {sim.k}")
                return "non-finite plant state"
            last = sample_bytes(sim.k)
            send(last)
        else:
            rejects.add("unexpected", f"actuation counter {counter} where {sim.k} was due")


def _free_running(sim, sc, faults, rep, receive, send, sample_bytes, stale_s, session_peer,
                  log) -> str:
    ts = sc.Ts
    late = missing = 0
    pending = None
    enable = True
    t0 = last_heard = time.perf_counter()
    send(sample_bytes(0))
    while True:
        deadline = t0 + (sim.k + 1) * ts
        while True:
            now = time.perf_counter()
            if now >= deadline:
                break
            got = receive(min(deadline - now, 0.0005) if deadline - now > 0.002 else 0)
            if got is None or got is False:
                continue
            if rep.peer != session_peer:
                rep.peer = session_peer  # another client: dropped, the session's runtime keeps it
                continue
            last_heard = time.perf_counter()
            counter, u, en = got
            if counter == END:
                log(f"stand-in simulator: ticks {sim.k}; late {late}; missing {missing}")
                return "end request"
            if counter == sim.k and pending is None:
                pending, enable = u, en
            elif counter is not None and counter < sim.k:
                late += 1
        if time.perf_counter() - last_heard > stale_s:
            return "stale"
        if pending is None:
            missing += 1
            u = sim.u.copy()
        else:
            u = pending
        pending = None
        if not sim.step(u, enable):
            return "non-finite plant state"
        if faults.disconnect_after is not None and sim.k >= faults.disconnect_after:
            log(f"stand-in simulator: disconnected at tick {sim.k} (fault injection)")
            return "disconnect"
        if faults.freeze_after is not None and sim.k >= faults.freeze_after:
            log(f"stand-in simulator: frozen at tick {sim.k} (fault injection)")
            while receive(stale_s) is not None:
                pass
            return "frozen"
        send(sample_bytes(sim.k))
