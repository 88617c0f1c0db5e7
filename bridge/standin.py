"""The stand-in simulator: a separate process that runs a scenario's plant with its load
profile and speaks the bridge protocol, so the runtime's bridge can be rehearsed without a
real-time simulator. It uses the same compiled plant kernels as SIL, so a lockstep run against
it reproduces the SIL recording of the same scenario.
"""
from __future__ import annotations

import math
import time
from typing import Callable

import numpy as np

from hilrig.runtime import loop as loopgen
from hilrig.runtime.run import fault_args, prepare

from . import protocol as P
from .errors import ProtocolError
from .session import signal_maps
from .transport import server_for

SIMULATOR_NAME = "hilrig stand-in simulator"


class Faults:
    """Transport faults the stand-in simulator injects into its replies, on a schedule.

    drop        probability of not answering a tick (datagram transports only: ZeroMQ's
                request/reply cannot skip a reply)
    delay_s     added before every reply; jitter_s: plus a uniform random share of this
    freeze_after stop answering from this tick on (the simulator hangs)
    disconnect_after close the connection at this tick and stop serving
    corrupt_every mangle every N-th reply on the wire (its leading byte)
    seed        seed of the random generator (drops, jitter)
    """

    def __init__(self, drop: float = 0.0, delay_s: float = 0.0, jitter_s: float = 0.0,
                 freeze_after: int | None = None, corrupt_every: int | None = None, seed: int = 0,
                 disconnect_after: int | None = None):
        if not 0.0 <= drop < 1.0:
            raise ValueError(f"--drop {drop:g}: expected a fraction in [0, 1)")
        if delay_s < 0 or jitter_s < 0:
            raise ValueError("--delay and --jitter must not be negative")
        if corrupt_every is not None and corrupt_every < 1:
            raise ValueError(f"--corrupt-every {corrupt_every}: expected a whole number >= 1")
        self.drop, self.delay_s, self.jitter_s = drop, delay_s, jitter_s
        self.freeze_after, self.corrupt_every = freeze_after, corrupt_every
        self.disconnect_after = disconnect_after
        self.rng = np.random.default_rng(seed)
        #: scheduled link faults from the scenario: (first tick, end tick, kind, value)
        self.windows: list = []
        #: the simulator's current tick (set by the serving loop before each send)
        self.tick = 0
        self.replies = 0
        self.dropped = 0
        self.corrupted = 0

    def active(self) -> bool:
        return bool(self.drop or self.delay_s or self.jitter_s or self.freeze_after is not None
                    or self.corrupt_every or self.disconnect_after is not None or self.windows)

    def quiet_until(self, k: int) -> int:
        """The first tick from k on whose actuation a fault may concern (actuations of ticks
        k .. result-1 are answered plainly: no drop, delay, jitter, corruption, freeze or
        disconnect); k when a fault acts now."""
        if self.drop or self.delay_s or self.jitter_s or self.corrupt_every:
            return k
        limit = k + 1_000_000_000
        for at in (self.freeze_after, self.disconnect_after):
            if at is not None:
                limit = min(limit, at)
        for k0, k1, _, _ in self.windows:
            if k1 is None or k + 1 < k1:
                # the actuation of tick j is answered with the sample of tick j + 1
                limit = min(limit, max(k0 - 1, k) if k + 1 < k0 else k)
        return max(k, limit)

    def schedule(self, faults, ts: float, datagrams: bool, log) -> None:
        """Take the scenario's link faults (``link_loss``, ``link_delay``, ``link_freeze``,
        ``link_disconnect``) on their schedule."""
        self.windows = []
        for f in faults:
            k0 = int(round(f.start / ts))
            k1 = int(round(f.end / ts)) if f.end != float("inf") else None
            if f.kind == "link_freeze":
                self.freeze_after = k0 if self.freeze_after is None else min(self.freeze_after, k0)
            elif f.kind == "link_disconnect":
                self.disconnect_after = (k0 if self.disconnect_after is None
                                         else min(self.disconnect_after, k0))
            elif f.kind == "link_loss" and not datagrams:
                log("stand-in simulator: the scenario's link_loss is not applied: ZeroMQ "
                    "request/reply cannot skip a reply (use udp://)")
            elif f.kind in ("link_loss", "link_delay"):
                self.windows.append((k0, k1, f.kind, f.value))

    def wire(self, data: bytes) -> bytes | None:
        """The bytes to send for a reply, or None to drop it."""
        drop, delay = self.drop, self.delay_s
        for k0, k1, kind, value in self.windows:
            if k0 <= self.tick and (k1 is None or self.tick < k1):
                if kind == "link_loss":
                    drop = max(drop, value)
                else:
                    delay += value
        if drop and self.rng.random() < drop:
            self.dropped += 1
            return None
        if delay or self.jitter_s:
            time.sleep(delay + self.jitter_s * self.rng.random())
        self.replies += 1
        if self.corrupt_every and self.replies % self.corrupt_every == 0:
            self.corrupted += 1
            # break the frame's structure (its leading array marker): the protocol has no checksum
            # of its own and relies on the transport's (TCP, UDP); a flipped payload bit that
            # passed those would go unnoticed, so the fault models a frame that arrives mangled
            b = bytearray(data)
            b[0] ^= 0xFF
            return bytes(b)
        return data


COMMAND_HELP = ("freeze | disconnect | drop FRACTION | delay S | jitter S | corrupt N | clear "
                "(one per line)")


def apply_command(faults: Faults, line: str, tick: int, datagrams: bool) -> str:
    """Apply one fault command typed while serving; return what was done (or why not)."""
    words = line.split()
    if not words:
        return ""
    cmd, args = words[0].lower(), words[1:]
    try:
        if cmd == "freeze" and not args:
            faults.freeze_after = tick
            return f"fault: freezing from tick {tick}"
        if cmd == "disconnect" and not args:
            faults.disconnect_after = tick
            return f"fault: disconnecting at tick {tick}"
        if cmd == "clear" and not args:
            faults.drop = faults.delay_s = faults.jitter_s = 0.0
            faults.corrupt_every = None
            return "fault: drop, delay, jitter and corruption cleared"
        if len(args) == 1:
            v = float(args[0])
            if cmd == "drop":
                if not datagrams:
                    return "refused: drop needs a datagram transport (udp://)"
                if not 0.0 <= v < 1.0:
                    return f"refused: drop {v:g} is not a fraction in [0, 1)"
                faults.drop = v
                return f"fault: dropping {v:.0%} of frames"
            if cmd in ("delay", "jitter"):
                if not 0.0 <= v <= 10.0:
                    return f"refused: {cmd} {v:g} s is not in [0, 10] s"
                setattr(faults, f"{cmd}_s", v)
                return f"fault: {cmd} {v:g} s"
            if cmd == "corrupt":
                if v != int(v) or v < 1:
                    return f"refused: corrupt {args[0]} is not a whole number >= 1"
                faults.corrupt_every = int(v)
                return f"fault: mangling every {int(v)}th frame"
    except ValueError:
        return f"refused: {args[0]!r} is not a number"
    return f"unknown command {line.strip()!r}; commands: {COMMAND_HELP}"


def start_command_reader(faults: Faults, stream, tick: Callable[[], int], datagrams: bool,
                         log: Callable[[str], None]):
    """Read fault commands from ``stream`` (e.g. standard input) in a background thread.

    Each command changes the Faults object the serving loop reads every tick (single attribute
    writes, so no lock is needed)."""
    import threading

    def read():
        for line in stream:
            msg = apply_command(faults, line, tick(), datagrams)
            if msg:
                log(f"stand-in simulator: {msg}")

    th = threading.Thread(target=read, name="fault-commands", daemon=True)
    th.start()
    return th


class Rejections:
    """The frames the stand-in refused, counted by reason (docs/protocol.md section 12): the
    first of each reason is logged at once, the counts when serving ends."""

    def __init__(self, log: Callable[[str], None]):
        self.counter = P.RejectCounter()
        self.log = log

    def add(self, reason: str, message: str) -> None:
        self.counter.add(reason, message)
        if self.counter.counts[reason] == 1:
            self.log(f"stand-in simulator: rejected a frame ({reason}): {message} (further "
                     f"rejections for this reason are counted)")

    def summary(self) -> str:
        c = self.counter.counts
        return (f"rejected frames: {self.counter.total}"
                + (" (" + ", ".join(f"{k} {v}" for k, v in sorted(c.items())) + ")" if c else ""))


def _refuse_second_hello(rejects: "Rejections") -> P.Error:
    """The answer to a HELLO while a session is in progress: the session is never replaced."""
    rejects.add("unexpected", "HELLO while a session is in progress")
    return P.Error(code=P.ERR_UNEXPECTED, reason="unexpected: a session is in progress; "
                                                 "HELLO refused")


class StandIn:
    """State of the simulated plant for one session (reset by each handshake)."""

    def __init__(self, sc):
        self.sc = sc
        mod = loopgen.module_for(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin)
        self.sample_k, self.advance_k = mod.sim_sample, mod.sim_advance
        self.meas_map, self.act_map = signal_maps(sc)
        self.hash = P.map_hash(self.meas_map, self.act_map)
        self.reset()
        # compile (or load) both kernels now, not in the middle of a session
        self.sample(0)
        self.advance_k(0.0, sc.Ts, self.nsub, self.zf, self.pp, self.x.copy(), self.u, self.d.copy())
        self.reset()

    def welcome(self, mode: str) -> P.Welcome:
        """This simulator's answer to a HELLO in ``mode``."""
        return P.Welcome(version=P.PROTOCOL_VERSION, tick_period_s=self.sc.Ts, mode=mode,
                         meas_map=self.meas_map, act_map=self.act_map, map_hash=self.hash,
                         simulator_name=SIMULATOR_NAME)

    def reset(self):
        a = prepare(self.sc).args
        self.faults = (*fault_args(a), a["wd"])
        # the same integration as a SIL run of the scenario (sub-steps and stiffness rule)
        self.nsub, self.zf = a["nsub"], a["zf"]
        self.pp, self.x = a["pp"], a["x"].copy()
        self.load_t, self.load_v = a["load_t"], a["load_v"]
        self.lcur = np.zeros(1, dtype=np.int64)
        self.d = np.zeros(3)
        self.u = np.zeros(len(self.act_map))
        self.y = np.zeros(len(self.meas_map))
        self.k = 0
        self.last: bytes | None = None

    def sample(self, k: int) -> bytes:
        """The encoded SAMPLE frame of tick k (the per-tick path: no frame object)."""
        t = k * self.sc.Ts
        self.sample_k(k, t, self.pp, self.x, self.u, self.load_t, self.load_v, self.lcur, self.d,
                      self.y, *self.faults)
        return P.encode_sample(k, t, self.y)

    def compiled(self, rep):
        """The compiled serving loop for this transport, or None (see hilrig.bridge.wire)."""
        from . import wire as W
        from .transport import RepTransport, UdpServer
        kind = (W.KIND_ZMQ if isinstance(rep, RepTransport)
                else W.KIND_UDP if isinstance(rep, UdpServer) else 0)
        if not kind or not W.available(kind):
            return None
        return _CompiledServer(self, rep, kind)

    def step(self, u: np.ndarray) -> bool:
        """Apply u for one period from tick k (load held as sampled), advance to k + 1."""
        self.u[:] = u
        ok = self.advance_k(self.k * self.sc.Ts, self.sc.Ts, self.nsub, self.zf, self.pp, self.x,
                            self.u, self.d)
        self.k += 1
        return bool(ok)


class _CompiledServer:
    """Lockstep actuations answered in compiled code (``sim_serve``), in blocks of at most 256
    ticks, while no fault acts; everything else goes to the Python serving loop."""

    BLOCK = 256
    WAIT_MS = 50

    def __init__(self, sim: StandIn, rep, kind: int):
        from . import wire as W
        self.W, self.sim, self.rep = W, sim, rep
        self.serve_k = loopgen.module_for(
            sim.sc.plant.plugin, sim.sc.controller.plugin, sim.sc.reference.plugin).sim_serve
        self.io = np.zeros(W.IO_SIZE, dtype=np.int64)
        self.rbuf = np.zeros(P.MAX_FRAME_BYTES + 1, dtype=np.uint8)
        self.sbuf = np.zeros(P.MAX_FRAME_BYTES, dtype=np.uint8)
        self.pfd = np.zeros(2, dtype=np.int32)
        self.addr = np.zeros(128, dtype=np.uint8)
        self.alen = np.zeros(1, dtype=np.int32)
        self.io[W.IO_KIND] = kind
        self.io[W.IO_WAIT_MS] = self.WAIT_MS
        if kind == W.KIND_ZMQ:
            import zmq
            # the compiled receive returns to Python after this long without a request
            rep.sock.setsockopt(zmq.RCVTIMEO, self.WAIT_MS)
            self.io[W.IO_HANDLE] = rep.sock.underlying
        else:
            self.io[W.IO_HANDLE] = self.pfd[0] = rep.sock.fileno()
            self.pfd[1] = W.POLLIN
        self.block(0, 0)  # compile (or load) now, serving nothing

    def block(self, k: int, limit: int) -> int:
        """Serve ticks k .. limit-1 at most; return the status (the tick reached is sim.k)."""
        sim = self.sim
        k_end = self.serve_k(k, limit, sim.sc.Ts, sim.nsub, sim.zf, sim.pp, sim.x, sim.u,
                             sim.load_t, sim.load_v, sim.lcur, sim.d, sim.y, *sim.faults,
                             self.io, self.rbuf, self.sbuf, self.pfd, self.addr, self.alen)
        if k_end > k:
            sim.k = int(k_end)
            sim.last = self.sbuf[:int(self.io[self.W.IO_NSENT])].tobytes()
        if self.io[self.W.IO_KIND] == self.W.KIND_UDP and self.io[self.W.IO_ADDRLEN] > 0:
            self.rep.peer = _sockaddr(self.addr[:int(self.io[self.W.IO_ADDRLEN])].tobytes())
        return int(self.io[self.W.IO_STATUS])

    def frame(self) -> bytes:
        return self.rbuf[:min(int(self.io[self.W.IO_NRECV]), self.rbuf.size)].tobytes()


def _sockaddr(raw: bytes):
    """A C struct sockaddr (IPv4 or IPv6, as recvfrom fills it on Linux) as a Python address."""
    import socket
    import struct
    family = struct.unpack_from("=H", raw, 0)[0]
    port = struct.unpack_from(">H", raw, 2)[0]
    if family == socket.AF_INET:
        return socket.inet_ntop(socket.AF_INET, raw[4:8]), port
    flow, scope = struct.unpack_from("=I", raw, 4)[0], struct.unpack_from("=I", raw, 24)[0]
    return socket.inet_ntop(socket.AF_INET6, raw[8:24]), port, flow, scope


def serve(sc, bind: str, *, sessions: int | None = None, allow_remote: bool = False,
          idle_timeout_s: float | None = None, faults: Faults | None = None, curve_keys=None,
          commands=None, log: Callable[[str], None] = print) -> int:
    """Serve lockstep sessions on ``bind`` until ``sessions`` have ended (None: forever) or
    nothing arrives for ``idle_timeout_s``. Returns the number of sessions served."""
    faults = faults or Faults()
    if faults.drop and not bind.startswith("udp://"):
        raise ValueError("--drop needs a datagram transport (udp://): ZeroMQ request/reply "
                         "cannot skip a reply; use --freeze-after to stop answering")
    sim = StandIn(sc)
    faults.schedule([f for f in sc.faults if f.kind.startswith("link_")], sc.Ts,
                    bind.startswith("udp://"), log)
    rep = server_for(bind, allow_remote=allow_remote, curve_keys=curve_keys)
    if commands is not None:
        start_command_reader(faults, commands, lambda: sim.k, bind.startswith("udp://"), log)
    n_meas, n_act = len(sim.meas_map), len(sim.act_map)
    served = 0
    in_session = False
    datagrams = bind.startswith("udp://")
    rejects = Rejections(log)
    first_hello = None  # (HELLO bytes, peer) that opened the session in progress
    log(f"stand-in simulator: {sc.plant.plugin.name}, Ts = {sc.Ts:g} s, listening on {bind}")

    def send(data: bytes) -> None:
        faults.tick = sim.k
        wire = faults.wire(data) if faults.active() else data
        if wire is not None:
            rep.send(wire)

    def reply(frame):
        data = frame if isinstance(frame, bytes) else P.encode(frame)
        send(data)
        return data

    fast = sim.compiled(rep)
    W = fast.W if fast is not None else None
    try:
        while sessions is None or served < sessions:
            data = None
            if fast is not None and in_session and sim.last is not None:
                limit = min(faults.quiet_until(sim.k), sim.k + fast.BLOCK)
                if limit > sim.k:
                    status = fast.block(sim.k, limit)
                    if status == W.ST_NONFINITE:
                        reply(P.Error(code=6, reason=f"the plant state became non-finite at tick {sim.k}"))
                        in_session = False
                        continue
                    if status == W.ST_FRAME:
                        data = fast.frame()
                    elif status != W.ST_IDLE:
                        continue  # a full block, or a failed send: go round
                    # idle: wait in Python below, where the idle timeout counts
            if data is None:
                data = rep.recv(timeout_s=idle_timeout_s)
            if data is None:
                log("stand-in simulator: idle timeout, stopping")
                break
            try:
                frame = P.decode(data, n_meas=n_meas, n_act=n_act)
            except ProtocolError as exc:
                rejects.add(exc.reason, str(exc))
                if not datagrams:  # REQ/REP answers every request; a datagram is dropped
                    reply(P.error_frame(exc))
                continue
            if isinstance(frame, P.Hello) and in_session:
                if (datagrams and sim.k == 0 and sim.last is None
                        and first_hello == (data, getattr(rep, "peer", None))):
                    reply(sim.welcome("lockstep"))  # its WELCOME was lost: answer again
                else:
                    reply(_refuse_second_hello(rejects))
                    log("stand-in simulator: refused a HELLO: a session is in progress")
            elif isinstance(frame, P.Hello):
                welcome = sim.welcome("lockstep")
                try:
                    P.handshake_check(frame, welcome)
                except ProtocolError as exc:
                    rejects.add(exc.reason, str(exc))
                    reply(P.error_frame(exc))
                    continue
                sim.reset()
                in_session = True
                first_hello = (data, getattr(rep, "peer", None))
                reply(welcome)
            elif isinstance(frame, P.Heartbeat) and in_session and sim.k == 0:
                if sim.last is None:
                    sim.last = reply(sim.sample(0))
                else:
                    send(sim.last)  # the first sample was lost: send it again
            elif isinstance(frame, P.Actuation) and in_session:
                if faults.disconnect_after is not None and sim.k >= faults.disconnect_after:
                    # an orderly disconnect: the simulator says so (an unasked STOP), then goes
                    reply(P.Stop(reason=f"simulator disconnecting at tick {sim.k}"))
                    log(f"stand-in simulator: disconnected at tick {sim.k} (fault injection)")
                    break
                if faults.freeze_after is not None and sim.k >= faults.freeze_after:
                    log(f"stand-in simulator: frozen at tick {sim.k} (fault injection)")
                    time.sleep(idle_timeout_s if idle_timeout_s is not None else 3600.0)
                    break
                if frame.seq == sim.k - 1 and sim.last is not None:
                    send(sim.last)  # a repeated actuation: answer again, do not advance
                elif frame.seq == sim.k:
                    # output disabled: the stage is switched off, modelled as 0 V applied
                    u = frame.u if frame.output_enable else np.zeros_like(frame.u)
                    if not sim.step(u):
                        reply(P.Error(code=6, reason=f"the plant state became non-finite at tick {sim.k}"))
                        in_session = False
                        continue
                    sim.last = reply(sim.sample(sim.k))
                else:
                    reply(P.Error(code=6, reason=f"actuation seq {frame.seq} where {sim.k} was due"))
            elif isinstance(frame, (P.Stop, P.Error)):
                # an ERROR request is answered with STOP too (section 13: REQ/REP)
                reply(P.Stop(reason="session ended"))
                if in_session:
                    served += 1
                    why = (f" (the runtime sent ERROR {frame.code}: {frame.reason})"
                           if isinstance(frame, P.Error) else "")
                    log(f"stand-in simulator: session {served} ended after {sim.k} ticks{why}")
                in_session = False
            else:
                reply(P.Error(code=6, reason=f"unexpected {type(frame).__name__} frame"))
    finally:
        rep.close()
        if faults.active():
            log(f"stand-in simulator: faults injected: {faults.dropped} dropped, "
                f"{faults.corrupted} corrupted replies")
        log(f"stand-in simulator: {rejects.summary()}")
    return served


def serve_free_running(sc, bind: str, *, sessions: int | None = None,
                       idle_timeout_s: float | None = None, stale_s: float = 1.0,
                       faults: Faults | None = None, commands=None, allow_remote: bool = False,
                       curve_keys=None, log: Callable[[str], None] = print) -> int:
    """Serve free-running sessions: after the handshake the simulator advances on its own clock
    every tick period, applies the actuation that answered the current sample if it came in
    time, holds the last input otherwise (a *missing* actuation), and counts actuations that
    arrive after their tick as *late*. A session ends on STOP, or when the runtime has sent
    nothing for ``stale_s``. Faults act on the samples sent: drop, delay, jitter, corrupt;
    ``freeze_after`` stops sending (and advancing) from that tick; ``disconnect_after`` sends
    an unasked STOP at that tick and ends the session. With ``curve_keys`` (a folder made by
    ``hilrig keys``) the ZeroMQ pair is authenticated and encrypted with CurveZMQ and only
    runtimes whose public key is in the folder get through; binding to an address reachable
    from other machines needs ``allow_remote`` and the keys."""
    faults = faults or Faults()
    from .transport import free_running_link
    sim = StandIn(sc)
    faults.schedule([f for f in sc.faults if f.kind.startswith("link_")], sc.Ts, True, log)
    link = free_running_link(bind, bind=True, allow_remote=allow_remote, curve_keys=curve_keys)
    if commands is not None:
        # a free-running simulator sends its samples unasked: dropping them works on any transport
        start_command_reader(faults, commands, lambda: sim.k, True, log)
    n_meas, n_act = len(sim.meas_map), len(sim.act_map)
    ts = sc.Ts
    served = 0
    datagrams = bind.startswith("udp://")
    rejects = Rejections(log)
    log(f"stand-in simulator (free-running): {sc.plant.plugin.name}, Ts = {ts:g} s, "
        f"listening on {bind}")

    def send(frame) -> None:
        link.send(frame if isinstance(frame, bytes) else P.encode(frame))

    try:
        while sessions is None or served < sessions:
            data = link.recv(idle_timeout_s)
            if data is None:
                log("stand-in simulator: idle timeout, stopping")
                break
            try:
                hello = P.decode(data, n_meas=n_meas, n_act=n_act)
            except ProtocolError as exc:
                rejects.add(exc.reason, str(exc))
                if not datagrams:  # an undecodable datagram is dropped, never answered
                    send(P.error_frame(exc))
                continue
            if not isinstance(hello, P.Hello):
                rejects.add("unexpected", f"expected HELLO, got {type(hello).__name__}")
                send(P.Error(code=6, reason=f"expected HELLO, got {type(hello).__name__}"))
                continue
            welcome = sim.welcome("free-running")
            try:
                P.handshake_check(hello, welcome)
            except ProtocolError as exc:
                rejects.add(exc.reason, str(exc))
                send(P.error_frame(exc))
                continue
            sim.reset()
            session_peer = getattr(link, "peer", None)
            send(welcome)
            ready = link.recv(10.0)
            try:
                hb = P.decode(ready) if ready is not None else None
            except ProtocolError:
                hb = None
            if not isinstance(hb, P.Heartbeat):
                continue
            late = missing = 0
            pending = None
            last_heard = time.perf_counter()
            t0 = time.perf_counter()
            faults.tick = 0
            first = sim.sample(0)
            wire = faults.wire(first) if faults.active() else first
            if wire is not None:  # the first sample can be lost too
                link.send(wire)
            reason = "stale"
            while True:
                deadline = t0 + (sim.k + 1) * ts
                stop = False
                while True:
                    now = time.perf_counter()
                    if now >= deadline:
                        break
                    data = link.recv(min(deadline - now, 0.0005) if deadline - now > 0.002 else 0)
                    if data is None:
                        continue
                    if datagrams and link.peer != session_peer:
                        # another client: a HELLO is refused, the rest dropped; the session's
                        # runtime keeps the samples (and the plant is not reset)
                        try:
                            f = P.decode(data, n_meas=n_meas, n_act=n_act)
                        except ProtocolError as exc:
                            rejects.add(exc.reason, str(exc))
                            f = None
                        if isinstance(f, P.Hello):
                            send(_refuse_second_hello(rejects))
                            log("stand-in simulator: refused a HELLO: a session is in progress")
                        elif f is not None:
                            rejects.add("unexpected", f"{type(f).__name__} from another client")
                        link.peer = session_peer
                        continue
                    last_heard = time.perf_counter()
                    try:
                        f = P.decode(data, n_meas=n_meas, n_act=n_act)
                    except ProtocolError as exc:
                        rejects.add(exc.reason, str(exc))
                        continue
                    if isinstance(f, P.Hello):
                        send(_refuse_second_hello(rejects))
                        log("stand-in simulator: refused a HELLO: a session is in progress")
                        continue
                    if isinstance(f, P.Actuation):
                        if f.seq == sim.k and pending is None:
                            pending = f.u if f.output_enable else np.zeros_like(f.u)
                        elif f.seq < sim.k:
                            late += 1
                    elif isinstance(f, P.Stop):
                        stop = True
                        reason = "stop"
                        break
                    elif isinstance(f, P.Error):
                        # the runtime ended the session (not answered: section 10)
                        stop = True
                        reason = f"the runtime sent ERROR {f.code}: {f.reason}"
                        break
                if stop or time.perf_counter() - last_heard > stale_s:
                    break
                if pending is None:
                    missing += 1
                    u = sim.u.copy()
                else:
                    u = pending
                pending = None
                if not sim.step(u):
                    send(P.Error(code=6, reason=f"the plant state became non-finite at tick {sim.k}"))
                    break
                if faults.disconnect_after is not None and sim.k >= faults.disconnect_after:
                    send(P.Stop(reason=f"simulator disconnecting at tick {sim.k}"))
                    log(f"stand-in simulator: disconnected at tick {sim.k} (fault injection)")
                    reason = "disconnect"
                    break
                if faults.freeze_after is not None and sim.k >= faults.freeze_after:
                    log(f"stand-in simulator: frozen at tick {sim.k} (fault injection)")
                    # hang: send nothing until the runtime has been silent for stale_s
                    while True:
                        got = link.recv(stale_s)
                        if got is None:
                            break
                    reason = "frozen"
                    break
                data = sim.sample(sim.k)
                faults.tick = sim.k
                wire = faults.wire(data) if faults.active() else data
                if wire is not None:
                    link.send(wire)
            text = f"ticks {sim.k}; late {late}; missing {missing}"
            if reason == "stop":
                send(P.Stop(reason=text))
            served += 1
            log(f"stand-in simulator: session {served} ended ({reason}) after {text}")
    finally:
        link.close()
        log(f"stand-in simulator: {rejects.summary()}")
    return served
