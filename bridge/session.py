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
from hilrig.runtime.outcome import judge
from hilrig.runtime.run import (RunResult, bind, check_folder, default_folder, execute,
                                fault_args, prepare, supervision_args)

from hilrig.safety.interlocks import (HOST_GAP, HOST_LOST, HOST_PROTOCOL, HOST_SEQUENCE,
                                      HOST_STALE, HOST_STOP, L_RESET_NOW, W_FORCED, W_HOST_BITS,
                                      W_HOST_TIME, W_HOST_VALUE)

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


def _bridge_module(sc):
    return loopgen.module_for(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin)


def _bridge_kernel(sc):
    return _bridge_module(sc).bridge_tick


class _Compiled:
    """The lockstep tick loop in compiled code (``bridge_chunk``, hilrig.bridge.wire): blocks
    of ticks, each sending its actuation and reading the next sample without Python. The
    Python path takes over for anything out of the common case (a reply that is not the next
    SAMPLE, a timeout, a resend, an operator's stop) and hands back afterwards."""

    def __init__(self, sc, a: dict, link, n_meas: int):
        from . import wire as W
        from .transport import ReqTransport, UdpClient
        from hilrig.runtime.clock import cycle_rate
        self.W = W
        kind = (W.KIND_ZMQ if isinstance(link, ReqTransport)
                else W.KIND_UDP if isinstance(link, UdpClient) else 0)
        if not kind or not W.available(kind):
            raise LookupError("no compiled path for this transport here")
        self.kind = kind
        self.chunk = _bridge_module(sc).bridge_chunk
        self.io = np.zeros(W.IO_SIZE, dtype=np.int64)
        self.fio = np.zeros(W.F_SIZE)
        self.meas = np.zeros(n_meas)
        self.sbuf = np.zeros(P.MAX_FRAME_BYTES, dtype=np.uint8)
        self.rbuf = np.zeros(P.MAX_FRAME_BYTES + 1, dtype=np.uint8)
        self.pfd = np.zeros(2, dtype=np.int32)
        self.rtt = np.zeros(256)
        self.io[W.IO_KIND] = kind
        if kind == W.KIND_ZMQ:
            self.io[W.IO_HANDLE] = link.sock.underlying
        else:
            self.io[W.IO_HANDLE] = self.pfd[0] = link.sock.fileno()
            self.pfd[1] = W.POLLIN
        self.link = link
        self.ts, self.v_collapse = sc.Ts, sc.v_collapse
        self.fio[W.F_INV_F] = 1.0 / cycle_rate(0.05)
        self.args = _tick_args(a)
        self.a = a
        # compile (or load) now, on no ticks
        self.run(0, 0, np.zeros((1, 1)))

    def run(self, k0: int, n: int, rec: np.ndarray) -> tuple[int, int]:
        """Ticks k0 .. k0+n-1 into rec[0:n]; (ticks run, status)."""
        W, a = self.W, self.a
        if self.kind == W.KIND_UDP:
            self.io[W.IO_WAIT_MS] = max(1, int(np.ceil(self.link.timeout_s * 1e3)))
        done = self.chunk(k0, n, self.ts, self.v_collapse, a["i_vout"], *self.args,
                          rec, a["ev"], self.io, self.fio, self.meas, self.sbuf,
                          self.rbuf, self.pfd, self.rtt)
        return int(done), int(self.io[W.IO_STATUS])

    def frame(self) -> bytes:
        """The last actuation frame sent."""
        return self.sbuf[:int(self.io[self.W.IO_NSENT])].tobytes()

    def reply(self) -> bytes:
        """The frame that stopped the block (ST_FRAME)."""
        return self.rbuf[:min(int(self.io[self.W.IO_NRECV]), self.rbuf.size)].tobytes()

    def oversize(self) -> "ProtocolError | None":
        """The rejection of the frame that stopped the block when it was longer than the
        receive buffer (its bytes were cut), naming its true length; else None."""
        n = int(self.io[self.W.IO_MSGLEN])
        if n <= P.MAX_FRAME_BYTES:
            return None
        return ProtocolError("oversize", f"frame of {n} bytes, at most {P.MAX_FRAME_BYTES} "
                                         f"allowed")

    def sample(self) -> "P.Sample":
        W = self.W
        return P.Sample(seq=int(self.io[W.IO_SEQ]), t_sim_s=float(self.fio[W.F_TSIM]),
                        meas=self.meas.copy())


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
            a["pv"], *fault_args(a), *supervision_args(a), a["s_tab"], a["s_x"], a["y"], a["d"])


class _Live:
    """The live view of a bridge session: a telemetry frame every ~50 ms of wall time from the
    tick loop (checked every 256 ticks), and the operator's commands: a stop latches the safe
    output on the next tick, which is then the last; a reset is requested for the next tick."""

    def __init__(self, sc, prep, address: str | None, allow_remote: bool, stats: "BridgeStats"):
        self.tel = None
        if address:
            from hilrig.runtime.live.telemetry import Telemetry, telemetry_config
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
                             ended=True, end_event=judge(summary)["text"])
        self.tel.close()


class BridgeStats:
    """Frames, losses and round-trip times of one session."""

    def __init__(self):
        self.sent = 0
        self.received = 0
        self.compiled = 0  # ticks whose exchange ran in compiled code (hilrig.bridge.wire)
        self.rtt_ns: list[int] = []
        self.seq = P.SequenceTracker()
        self.rejects = P.RejectCounter()
        self.link = None

    def as_dict(self) -> dict[str, Any]:
        rtt = np.array(self.rtt_ns, dtype=float) / 1e3
        pct = (lambda q: float(np.percentile(rtt, q))) if rtt.size else (lambda q: None)
        resent = getattr(self.link, "resent", 0)
        return {"frames_sent": self.sent, "frames_received": self.received,
                "ticks_compiled": self.compiled,
                "resent": resent,
                "lost": self.seq.lost, "duplicates": self.seq.duplicates,
                "out_of_order": self.seq.out_of_order, "late": 0,
                "rejected": dict(self.rejects.counts),
                "reject_log": [list(e) for e in list(self.rejects.log)[-10:]],
                "rtt_us": {"p50": pct(50), "p99": pct(99),
                           "max": float(rtt.max()) if rtt.size else None, "n": int(rtt.size)}}


#: what the lockstep loop raises in ``wd`` for each reason a sample is missing, and the event
_HOST_BIT = {"stale": HOST_STALE, "lost": HOST_LOST, "protocol": HOST_PROTOCOL,
             "sequence": HOST_SEQUENCE}
_END_EVENT = {"stale": "bridge stale", "lost": "bridge peer lost",
              "protocol": "bridge protocol error", "sequence": "bridge sequence error"}


def _send_error(link, exc: ProtocolError, codec=P) -> bool:
    """Tell the peer the session ends: ERROR with the code of ``exc`` (section 12). Over
    request/reply its answer (STOP) is read and dropped. True when it went out. (Fixed-layout
    datagrams, ``codec`` a hilrig.bridge.datagram.FixedCodec: the end request.)"""
    try:
        data = codec.encode(P.error_frame(exc))
        if hasattr(link, "send"):  # datagrams: no answer awaited
            link.send(data)
        else:
            link.request(data)
        return True
    except (BridgeError, ProtocolError, TransportTimeout, OSError):
        return False


def _abort_peer(link, safe_frame: bytes, exc: ProtocolError, codec=P) -> str:
    """After a protocol or sequence error: the safe actuation (output enable off) to the peer,
    then ERROR. Over request/reply each answer is read and dropped; over datagrams nothing is
    awaited. Returns what went out."""
    sent = []
    try:
        if hasattr(link, "send"):
            link.send(safe_frame)
        else:
            link.request(safe_frame)
        sent.append("safe actuation")
    except (BridgeError, TransportTimeout, OSError):
        pass
    if not link.closed and _send_error(link, exc, codec):
        sent.append(f"ERROR {P.error_frame(exc).code}")
    return ", ".join(sent) or "nothing (the link failed)"


class _Agreed(Exception):
    """No handshake: the fixed layout is agreed out of band."""


#: what stands for the WELCOME when there is no handshake (fixed-layout datagrams)
_NO_HANDSHAKE = type("NoHandshake", (), {"simulator_name": "(fixed layout: no handshake)"})()


def _codec(layout, sc, mode: str, address: str):
    """The frames' codec: msgpack (hilrig.bridge.protocol), or with a layout the fixed-layout
    one (hilrig.bridge.datagram), after checking the address and the counters the mode needs."""
    if layout is None:
        return P
    from .datagram import check_address, codec_for
    check_address(address)
    return codec_for(layout, sc, mode)


def _layout_entry(layout) -> dict[str, Any]:
    return {} if layout is None else {"frames": "fixed-layout", "layout": layout.describe()}


def run_bridge(sc, address: str, folder: Path | None = None, *, mode: str = "lockstep",
               timeout_s: float = 2.0, allow_remote: bool = False, overwrite: bool = False,
               curve_keys: Path | None = None,
               progress: Callable[[int, int], None] | None = None,
               notice: Callable[[str], None] | None = None,
               telemetry: str | None = None, layout=None) -> RunResult:
    """Run the scenario's controller against the simulator at ``address`` (``telemetry``:
    publish the live view there; ``layout``, a hilrig.bridge.datagram.Layout: fixed-layout
    datagrams instead of msgpack frames, no handshake, docs/protocol.md section 16)."""
    if mode not in MODES:
        raise BridgeError(f"bridge mode {mode!r} is not available; modes: {', '.join(MODES)}")
    if mode == "free-running":
        return run_free_running(sc, address, folder, timeout_s=timeout_s, overwrite=overwrite,
                                progress=progress, notice=notice, telemetry=telemetry,
                                allow_remote=allow_remote, curve_keys=curve_keys,
                                layout=layout)
    sc = dataclasses.replace(sc, mode=mode)
    codec = _codec(layout, sc, mode, address)
    folder = Path(folder) if folder is not None else default_folder(sc)
    check_folder(folder, overwrite)
    # the link first: a refused address or missing keys are reported before any compiling
    link = client_for(address, timeout_s=timeout_s, allow_remote=allow_remote,
                      curve_keys=curve_keys)
    try:
        tick, t_compile = _ready_tick(sc)
        prep = prepare(sc)
        bind(tick, prep.args, len(prep.signals))
        a = prep.args
        meas_map, act_map = signal_maps(sc)
        n_meas, n_act = len(meas_map), len(act_map)
        h = P.map_hash(meas_map, act_map)
        try:
            if layout is not None:
                raise LookupError("fixed-layout frames take the Python path")
            fast = _Compiled(sc, a, link, n_meas)
        except LookupError:
            fast = None  # the Python path for every tick (e.g. NUMBA_DISABLE_JIT)
    except BaseException:
        link.close()
        raise
    stats = BridgeStats()
    stats.link = link
    ended: list[dict[str, Any]] = []

    seen: dict[str, Any] = {}
    handshake: dict[str, Any] = {}  # the WELCOME taken (a late copy of it is a duplicate)

    def ask(frame, expect, want_seq=None, reply=None, resume=None):
        """Send a frame and return the reply, decoded and checked. After the compiled path
        (the frame already went out): ``reply``, the bytes it received; or ``resume``: "wait"
        (keep waiting, no resend) or "resend" (the first try timed out)."""
        data = frame if isinstance(frame, bytes) else codec.encode(frame)
        t0 = time.perf_counter_ns()
        seen.clear()
        datagrams = hasattr(link, "stale")
        accept = None
        if want_seq is not None and datagrams:
            # datagrams: a late copy of an earlier sample is recognised by its sequence number;
            # a datagram that does not decode is counted and treated as lost (resent)
            accept = lambda b: _acceptable(b, want_seq)  # noqa: E731
        if reply is not None and accept is not None and not accept(reply):
            reply, resume = None, "wait"  # dropped and counted by accept
        if reply is None:
            if resume is None:
                reply = link.request(data, accept=accept) if datagrams else link.request(data)
                stats.sent += 1
            elif datagrams:
                reply = link.request(data, accept=accept, resend=resume == "resend")
            else:
                reply = link.resume()
        stats.rtt_ns.append(time.perf_counter_ns() - t0)
        stats.received += 1
        got = seen.get("frame")
        if got is None:
            try:
                got = codec.decode(reply, n_meas=n_meas, n_act=n_act)
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
        """Datagrams (section 11): an undecodable datagram is dropped and counted by reason;
        a SAMPLE below the one due (a late copy of an answer already taken) is dropped and
        counted as a duplicate or out of order; anything else goes to the exchange, where a
        SAMPLE beyond the one due is a sequence error."""
        try:
            got = codec.decode(b, n_meas=n_meas, n_act=n_act)
        except ProtocolError as exc:
            stats.rejects.add(exc.reason, str(exc))
            return False
        if isinstance(got, P.Sample) and got.seq < want:
            if stats.seq.last is not None and got.seq <= stats.seq.last:
                stats.seq.check(got.seq)  # counts it: duplicate or out-of-order
            else:
                stats.seq.out_of_order += 1
            return False
        if isinstance(got, P.Welcome) and got == handshake.get("welcome"):
            # a late copy of the handshake's answer (the HELLO was resent): a duplicate
            stats.seq.duplicates += 1
            return False
        seen["frame"] = got  # decoded once: ask() reuses it
        return True

    hello = P.Hello(version=P.PROTOCOL_VERSION, tick_period_s=sc.Ts, mode=mode,
                    meas_map=meas_map, act_map=act_map, map_hash=h)
    try:
        if layout is None:
            welcome = ask(hello, P.Welcome)
            P.handshake_check(hello, welcome)
            handshake["welcome"] = welcome
        else:
            welcome = _NO_HANDSHAKE  # the layout is agreed out of band
        current = ask(P.Heartbeat(seq=0, t_sender_s=0.0), P.Sample, want_seq=0)
    except ProtocolError as exc:
        # a refused WELCOME (or an undecodable answer) is answered with ERROR (section 7.3)
        _send_error(link, exc, codec)
        link.close()
        raise BridgeError(f"bridge handshake with {address} failed: {exc}") from None
    except (PeerError, TransportTimeout) as exc:
        link.close()
        raise BridgeError(f"bridge handshake with {address} failed: {exc}") from None
    stale_s = sc.watchdogs["stale_limit"] or timeout_s
    link.set_timeout(stale_s)
    if notice:
        notice(f"bridge: connected to {welcome.simulator_name!r} at {address} ({mode}, "
               f"{n_meas} measurements, {n_act} actuations; stale after {stale_s * 1e3:g} ms)")
    # the sample for the next tick, or the reason there is none: ("stale" | "lost", detail)
    state: dict[str, Any] = {"sample": current, "took": 0.0, "missing": None, "waited": 0.0,
                             "raw": None}
    wd = a["wd"]

    live = _Live(sc, prep, telemetry, allow_remote, stats)

    def await_sample(kk: int, frame: bytes, i: int, **how) -> int:
        """The actuation of tick kk went out: take the next sample into state, or note why
        there is none. Returns -1 to go on, else the tick count the chunk ends with."""
        t_sent = time.perf_counter() - how.pop("waited", 0.0)
        try:
            state["sample"] = ask(frame, P.Sample, want_seq=kk + 1, **how)
        except TransportTimeout as exc:
            state["waited"] = time.perf_counter() - t_sent
            state["missing"] = ("stale", f"no sample within {stale_s * 1e3:g} ms: {exc}")
        except PeerError as exc:
            state["missing"] = ("lost", f"the simulator ended the session: {exc}")
        except ProtocolError as exc:
            # the next tick trips on it (protocol-error watchdog), then safe actuation and ERROR
            state["missing"] = ("protocol", str(exc))
            state["error"] = exc
        return -1

    def compiled_block(k0: int, i: int, n: int, rec: np.ndarray) -> int:
        """Run ticks from k0 + i in compiled code, at most to the next multiple of 256 (the
        live view's cadence). Returns the chunk's next row, or -(rows) - 1 when it ends."""
        W = fast.W
        kk = k0 + i
        m = min(n - i, 256 - (i & 255))
        fast.meas[:] = state["sample"].meas
        fast.fio[W.F_TOOK] = state["took"]
        done, status = fast.run(kk, m, rec[i:])
        state["took"] = float(fast.fio[W.F_TOOK])
        stats.seq.take_run(kk, done)
        stats.sent += done
        stats.compiled += done
        ok = done - (status not in (W.ST_OK, W.ST_END))
        stats.received += ok
        stats.rtt_ns.extend(fast.rtt[:ok].astype(np.int64).tolist())
        last = kk + done - 1
        end = -1
        if done and status not in (W.ST_OK, W.ST_END):
            state["raw"] = fast.meas.copy()  # the last tick's sample (no next one was read)
        if status in (W.ST_OK, W.ST_END):
            state["sample"] = fast.sample()
        elif status == W.ST_FRAME and fast.oversize() is not None:
            exc = fast.oversize()  # the bytes were cut: decoding them would misreport the size
            stats.received += 1
            stats.rejects.add(exc.reason, str(exc))
            state["missing"], state["error"] = ("protocol", str(exc)), exc
        elif status == W.ST_FRAME:
            end = await_sample(last, fast.frame(), i + done - 1, reply=fast.reply())
        elif status == W.ST_TIMEOUT or (status == W.ST_SENDFAIL and fast.kind == W.KIND_ZMQ):
            link.close()  # a ZeroMQ requester that timed out cannot be used again
            state["waited"] = float(fast.fio[W.F_WAITED])
            state["missing"] = ("stale", f"no sample within {stale_s * 1e3:g} ms: no reply "
                                         f"from {address} within {stale_s * 1e3:g} ms")
        else:  # one datagram try timed out (resend), or a wait was interrupted (keep waiting)
            end = await_sample(last, fast.frame(), i + done - 1,
                               resume="wait" if status == W.ST_PENDING else "resend",
                               waited=float(fast.fio[W.F_WAITED]))
        if end >= 0:
            return -end - 1
        if a["ev"][0] != 0:
            return -(i + done) - 1  # the run ends (collapse) after this tick
        i += done
        if (i - 1) & 255 == 255 and live.after_tick(k0, i - 1, rec):
            return -i - 1
        return i

    def produce(k0: int, n: int, rec: np.ndarray) -> int:
        targs = _tick_args(a)
        live.chunk()
        i = 0
        while i < n:
            kk = k0 + i
            if (fast is not None and state["missing"] is None and not live.stop
                    and not link.closed and state["sample"].seq == kk):
                i = compiled_block(k0, i, n, rec)
                if i < 0:
                    return -i - 1
                continue
            if state["missing"] is not None:
                # watchdog tick: no fresh sample; the controller runs on the measurement held,
                # the trip forces the safe output, and the run ends (nobody answers any more)
                why, detail = state["missing"]
                wd[W_HOST_BITS] = _HOST_BIT[why]
                wd[W_HOST_VALUE] = state["waited"] if why == "stale" else 0.0
                if state["raw"] is not None:
                    # the sample held, as received: the last tick changed y in place (sensor
                    # chain, sensor faults), which must not be applied to it twice
                    a["y"][:] = state["raw"]
                tick(kk, i, sc.Ts, sc.v_collapse, a["i_vout"], *targs, rec, a["ev"])
                wd[W_HOST_BITS] = 0.0
                e = {"event": _END_EVENT[why], "tick": kk, "detail": detail}
                if why == "stale":
                    e["detected_after_s"] = state["waited"]
                if why in ("protocol", "sequence") and not link.closed:
                    # the peer is still there: it gets the safe actuation, then ERROR
                    e["peer_told"] = _abort_peer(
                        link, codec.encode_actuation(kk, a["u"], int(rec[i, -2]), False),
                        state.get("error") or ProtocolError("unexpected", detail), codec)
                    stats.sent += 2
                ended.append(e)
                return i + 1
            smp = state["sample"]
            verdict = stats.seq.check(smp.seq)
            if smp.seq != kk:
                # lockstep answers ACTUATION k-1 with SAMPLE k, nothing else (section 11): this
                # tick runs on the measurement held and trips (sequence-error watchdog)
                state["missing"] = ("sequence", f"sample seq {smp.seq} ({verdict}) where {kk} "
                                                f"was due")
                state["error"] = ProtocolError("unexpected", state["missing"][1])
                continue
            t_in = time.perf_counter()
            a["y"][:] = state["raw"] = smp.meas
            a["d"][:] = np.nan  # the load lives in the simulator
            wd[W_HOST_TIME] = state["took"]
            wd[W_HOST_BITS] = live.host_bits()
            go = tick(kk, i, sc.Ts, sc.v_collapse, a["i_vout"], *targs, rec, a["ev"])
            if wd[W_FORCED] > 0.0:
                _spin_until(t_in + wd[W_FORCED])
            enable = not bool(a["latch"][0])
            word = int(rec[i, -2])
            frame = codec.encode_actuation(kk, a["u"], word, enable)
            state["took"] = time.perf_counter() - t_in
            if fast is not None:
                fast.fio[fast.W.F_TOOK] = state["took"]
            end = await_sample(kk, frame, i)
            if end >= 0:
                return end
            if not go or live.after_tick(k0, i, rec):
                return i + 1
            i += 1
        return n

    def finish() -> list[dict[str, Any]]:
        # the orderly end goes out before the summary is written, so its statistics count it
        if not link.closed and state["missing"] is None:
            try:
                if layout is not None:
                    link.send(codec.encode(P.Stop(reason="run ended")))  # the end request
                    stats.sent += 1
                    return ended  # no answer: a fixed-layout simulator sends samples only
                ask(P.Stop(reason="run ended"), P.Stop)
            except (ProtocolError, PeerError, TransportTimeout) as exc:
                ended.append({"event": "bridge stop not acknowledged", "detail": str(exc)})
        return ended

    summary = None
    try:
        res = execute(sc, prep, folder, produce,
                      timing={"compile_or_load_s": t_compile, "compiled_now": False},
                      progress=progress, extra=lambda: {"bridge": {
                          "address": address, "mode": mode, **_layout_entry(layout),
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
                     curve_keys: Path | None = None, layout=None) -> RunResult:
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
    codec = _codec(layout, sc, mode, address)
    folder = Path(folder) if folder is not None else default_folder(sc)
    check_folder(folder, overwrite)
    stale_s = stale_s if stale_s is not None else sc.stale_limit_s
    peer_timeout = sc.watchdogs["peer_timeout"]
    max_gap = int(sc.watchdogs["max_gap"])
    # the link first: a refused address or missing keys are reported before any compiling
    link = free_running_link(address, bind=False, allow_remote=allow_remote,
                             curve_keys=curve_keys)
    try:
        tick, t_compile = _ready_tick(sc)
        prep = prepare(sc)
        bind(tick, prep.args, len(prep.signals))
    except BaseException:
        link.close()
        raise
    a = prep.args
    meas_map, act_map = signal_maps(sc)
    n_meas, n_act = len(meas_map), len(act_map)
    stats = BridgeStats()
    ended: list[dict[str, Any]] = []
    counts = {"late_runtime": 0, "held_ticks": 0, "passed_over": 0, "sim_late": None,
              "sim_missing": None}

    datagrams = hasattr(link, "stale")
    # a fault of the peer that ends the session (section 12); armed once the ticks start
    fault: dict[str, Any] = {"armed": False, "protocol": None}

    def recv_frame(wait):
        data = link.recv(wait)
        if data is None:
            return None
        stats.received += 1
        try:
            return codec.decode(data, n_meas=n_meas, n_act=n_act)
        except ProtocolError as exc:
            stats.rejects.add(exc.reason, str(exc))
            if fault["armed"] and not datagrams and fault["protocol"] is None:
                # over ZeroMQ (reliable, ordered) a frame that fails decoding is a fault of
                # the peer: the session ends on it (section 12); a datagram is dropped
                fault["protocol"] = exc
            return False

    hello = P.Hello(version=P.PROTOCOL_VERSION, tick_period_s=sc.Ts, mode=mode,
                    meas_map=meas_map, act_map=act_map, map_hash=P.map_hash(meas_map, act_map))
    try:
        if layout is not None:
            raise _Agreed()  # the layout is agreed out of band: no handshake
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
    except _Agreed:
        welcome = _NO_HANDSHAKE
    except (ProtocolError, PeerError, BridgeError, TransportTimeout) as exc:
        link.close()
        raise BridgeError(f"bridge handshake with {address} failed: {exc}") from None
    if notice:
        notice(f"bridge: connected to {welcome.simulator_name!r} at {address} (free-running, "
               f"Ts = {sc.Ts:g} s, stale after {stale_s * 1e3:g} ms)")
    state: dict[str, Any] = {"next": None, "took": 0.0, "last_seq": -1, "t_last": None,
                             "stale": False, "lost": None, "started": False, "held_first": False,
                             "lost_run": 0, "raw": None}
    wd = a["wd"]

    def take(f) -> str:
        """Classify a received sample's seq (section 11); a gap adds the seq numbers never
        received to the run of lost samples the gap watchdog judges."""
        expected = stats.seq.expected
        verdict = stats.seq.check(f.seq)
        if verdict == "gap":
            state["lost_run"] = max(state["lost_run"], f.seq - expected)
        return verdict

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
            if fault["protocol"] is not None:
                return None
            if f is None:
                continue  # the transport's wait is rounded to whole ms: wait out the rest
            if isinstance(f, P.Sample):
                if take(f) in ("duplicate", "out-of-order"):
                    continue
                # a runtime that fell behind answers the newest sample, not a queue of old
                # ones: the samples passed over were received, and their ticks run on the
                # measurement held (counted as held, not as lost)
                while True:
                    g = recv_frame(0.0)
                    if g is None or g is False:
                        break
                    if isinstance(g, P.Sample) and take(g) not in ("duplicate", "out-of-order"):
                        counts["passed_over"] += 1
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
            if isinstance(f, (P.Hello, P.Welcome, P.Actuation)) and not datagrams:
                stats.rejects.add("unexpected", f"a {type(f).__name__} frame mid-run")
                fault["protocol"] = ProtocolError("unexpected", f"the simulator sent a "
                                                  f"{type(f).__name__} frame mid-run")
                return None

    live = _Live(sc, prep, telemetry, allow_remote, stats)

    def produce(k0: int, n: int, rec: np.ndarray) -> int:
        targs = _tick_args(a)
        live.chunk()
        if not state["started"]:
            # the simulator's clock starts now, with the recording open and the loop ready
            link.send(codec.encode(P.Heartbeat(seq=0, t_sender_s=0.0)))
            stats.sent += 1
            state["started"] = fault["armed"] = True
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
                if fault["protocol"] is not None:
                    bits, value = HOST_PROTOCOL, 0.0
                    end = {"event": "bridge protocol error", "tick": kk,
                           "detail": str(fault["protocol"])}
                elif state["lost"] is not None or state["stale"]:
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
                    # the longest run of seq numbers never received since the last fresh tick
                    # (samples received and passed over in a burst are held, not lost)
                    gap, state["lost_run"] = state["lost_run"], 0
                    state["last_seq"] = kk
                    a["y"][:] = state["raw"] = smp.meas
                    if gap > max_gap:
                        bits, value = HOST_GAP, float(gap)
                else:
                    counts["held_ticks"] += 1  # sample kk was lost: hold the last measurement
                    if state["last_seq"] < 0 and not state["held_first"]:
                        # lost before any sample arrived: there is nothing older to hold, so
                        # these first ticks run on the first sample received (a later one)
                        a["y"][:] = state["raw"] = smp.meas
                        state["held_first"] = True
            if state["raw"] is not None:
                # a held tick runs on the sample as received: the tick changes y in place
                # (sensor chain, sensor faults), which must not be applied to it twice
                a["y"][:] = state["raw"]
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
                    link.send(codec.encode_actuation(kk, a["u"], int(rec[i, -2]),
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
                if bits == HOST_PROTOCOL:
                    # the safe actuation went out above; then ERROR, and the session is over
                    told = _send_error(link, fault["protocol"], codec)
                    stats.sent += int(told)
                    end["peer_told"] = "safe actuation" + (
                        f", ERROR {P.error_frame(fault['protocol']).code}" if told else "")
                ended.append(end)
                return i + 1
            if not go or live.after_tick(k0, i, rec):
                return i + 1
        return n

    def finish() -> list[dict[str, Any]]:
        if any(e["event"] in ("bridge peer lost", "bridge protocol error") for e in ended):
            return ended  # nobody is there to answer a STOP, or the session ended with ERROR
        try:
            link.send(codec.encode(P.Stop(reason="run ended")))
            stats.sent += 1
            if layout is not None:
                return ended  # the end request has no answer
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
        return {"bridge": {"address": address, "mode": mode, **_layout_entry(layout),
                           "simulator": welcome.simulator_name,
                           "stale_limit_s": stale_s, "held_ticks": counts["held_ticks"],
                           "passed_over": counts["passed_over"],
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
