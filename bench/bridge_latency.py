"""Soft-HIL bridge latency: lockstep ticks/s and round-trip times over ZeroMQ ipc, ZeroMQ tcp
loopback and UDP loopback, each next to a raw ping-pong of the same frames on the same transport
in the same run (the practical limit of that transport from Python on this machine).

Lockstep: the stand-in simulator (``hilrig serve-sim``) runs in a subprocess and the runtime's
bridge session (``hilrig.bridge.session.run_bridge``) in this process, on a two-stage LC plant +
cascaded PI scenario at Ts = 50 us (4 RK4 substeps), a 400 -> 420 V reference step at 0.1 s and a
constant 50 kW load (demo data, written to a temporary folder). Per session:

- lockstep ticks/s = ticks run / wall time of the session's tick phase (summary.json
  "timing" -> "wall_s": every exchange, the tick kernel, the HDF5 writes and the running metrics;
  not the one-off set-up, handshake or summary);
- "loop only" = ticks / time inside the tick loop (summary.json "timing" -> "loop_s", HDF5 writes
  and metrics excluded);
- round trip p50/p99/max = summary.json "bridge" -> "rtt_us" (each request, from handing the
  encoded frame to the transport to getting the reply back, so it includes the simulator's work).

Raw ping-pong: an echo server in a subprocess answers each request with fixed bytes; the client
here sends the encoded bytes of a real ACTUATION frame (1 actuation) and gets back those of a real
SAMPLE frame (the plant's measurements), built with ``hilrig.bridge.protocol``'s encoders, so the
sizes are those of a lockstep tick. ZeroMQ: a REQ/REP pair, one frame per message, as the bridge;
UDP: one datagram each way on a connected socket. Nothing is decoded or computed: the rate is what
the transport alone allows. Ratio = lockstep ticks/s / raw round trips/s.

Two raw ping-pongs are measured: with both loops in Python (pyzmq / socket calls; the peer the
targets are stated against) and with both loops compiled (numba, the same C socket calls as the
bridge's compiled path in ``hilrig.bridge.wire``: the practical limit of the transport with no
interpreter in the way). The lockstep session runs its exchanges in compiled code, so it can beat
the Python ping-pong; the ratio against the compiled ping-pong is printed beside it.

Each measurement is repeated ``--reps`` times (after one warm-up session per transport, which
also compiles or loads the kernels) and the medians are reported. The UDP rows are measured when
the installed hilrig has the datagram transport (``UdpClient``/``UdpServer`` in
``hilrig.bridge.transport``, or an address check that accepts ``udp://``), and are reported as not
available in this version otherwise; the raw UDP ping-pong is measured either way.

Targets (printed with pass/fail, not asserted): ZeroMQ lockstep >= 80 % of its raw ping-pong;
UDP lockstep >= 20 000 ticks/s.

The figures come from a shared, noisy 2-core machine: expect tens of per cent between runs,
and worst-case round trips of milliseconds whenever another process is scheduled. Loopback only;
every loop is bounded in count and time and the script stops by itself. Not run in CI.

Run: python bench/bridge_latency.py [--seconds 0.5] [--reps 3]
     python bench/bridge_latency.py --profile   (adds a cProfile of one short session per
     transport, runtime side and stand-in side, in microseconds per tick, and the pieces of a
     lockstep tick timed in this process without any transport)
The last printed line is JSON: {"zmq_ipc": {"lockstep_ticks_per_s", "lockstep_loop_ticks_per_s",
"raw_round_trips_per_s", "ratio", "rtt_us": {"p50", "p99", "max"}, "raw_rtt_us": {...},
"raw_compiled_round_trips_per_s", "ratio_compiled", ...},
"zmq_tcp": {...}, "udp": {...} or "unavailable", "udp_raw": {...} (only when "udp" is
unavailable), "targets": {...}}.
"""
from __future__ import annotations

import argparse
import cProfile
import json
import os
import pstats
import socket
import statistics as st
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SCENARIO = """
# DEMO DATA: invented parameters for a benchmark, not measurements of any real equipment.
title = "bench: bridge lockstep, two-stage LC + cascaded PI, 20 kHz, RK4 x 4"
description = "Invented demo data for bench/bridge_latency.py."
demo_data = true
[timing]
Ts = "50 us"
substeps = 4
duration = "{seconds} s"
[plant]
plugin = "two_stage_lc"
V_dc = "800 V"
L1 = "150 uH"
R1 = "5 mohm"
C1 = "220 uF"
L2 = "100 uH"
R2 = "3 mohm"
C2 = "680 uF"
[controller]
plugin = "cascaded_pi"
[reference]
plugin = "profile"
points = [[0, "400 V"], ["0.1 s", "400 V"], ["0.1 s", "420 V"]]
[load]
[[load.points]]
t = 0
P = "50 kW"
[[interlocks]]
signal = "v_out"
above = "480 V"
[[interlocks]]
signal = "i_L1"
above = "500 A"
[[interlocks]]
signal = "v_out"
below = "300 V"
debounce = 20
"""

TRANSPORTS = (("zmq_ipc", "ZeroMQ ipc"), ("zmq_tcp", "ZeroMQ tcp loopback"),
              ("udp", "UDP loopback"))
TARGET_ZMQ_RATIO = 0.80        # ZeroMQ lockstep / raw ping-pong, from the issue
TARGET_UDP_TICKS_PER_S = 20e3  # UDP lockstep ticks/s, from the issue
REPLY_TIMEOUT_S = 1.0          # one raw round trip; far beyond any loopback figure
RAW_CAP_S = 60.0               # wall-time cap of one raw ping-pong series
START_TIMEOUT_S = 300.0        # a subprocess to come up (a cold numba cache compiles first)
IDLE_TIMEOUT_S = 60.0          # subprocesses stop by themselves when nothing arrives this long

# The echo server of the raw ping-pong (run with ``python -c``): answer every request with the
# given bytes until "quit", a message cap or an idle timeout. Plain blocking receives, no poll.
ECHO_SERVER = r"""
import socket, sys
kind, address, reply, idle_s, cap = (sys.argv[1], sys.argv[2], bytes.fromhex(sys.argv[3]),
                                     float(sys.argv[4]), int(sys.argv[5]))
n = 0
if kind == "zmq":
    import zmq
    ctx = zmq.Context()
    s = ctx.socket(zmq.REP)
    s.setsockopt(zmq.LINGER, 0)
    s.setsockopt(zmq.RCVTIMEO, int(idle_s * 1000))
    s.bind(address)
    print("ready", flush=True)
    while n < cap:
        try:
            msg = s.recv()
        except zmq.Again:
            break
        s.send(reply)  # REP answers every request, "quit" included
        n += 1
        if msg == b"quit":
            break
    s.close(linger=0)
    ctx.term()
else:
    host, port = address[len("udp://"):].rsplit(":", 1)
    s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    s.bind((host, int(port)))
    s.settimeout(idle_s)
    print("ready", flush=True)
    while n < cap:
        try:
            msg, peer = s.recvfrom(65507)
        except socket.timeout:
            break
        if msg == b"quit":
            break
        s.sendto(reply, peer)
        n += 1
    s.close()
"""


# The same echo server with its receive/send loop compiled (numba, the C socket calls of
# hilrig.bridge.wire): the ping-pong with no Python per message on this side either. The quit
# message is any 4-byte request.
COMPILED_ECHO_SERVER = r"""
import socket, sys
import numpy as np
from numba import njit
from hilrig.bridge import wire as W
kind, address, reply, idle_s, cap = (sys.argv[1], sys.argv[2], bytes.fromhex(sys.argv[3]),
                                     float(sys.argv[4]), int(sys.argv[5]))
out = np.frombuffer(reply, dtype=np.uint8).copy()
buf = np.zeros(65536, dtype=np.uint8)

@njit
def zecho(h, buf, out, cap):
    n = 0
    while n < cap:
        m = W.zmq_recv(h, buf, buf.shape[0])
        if m < 0:
            break
        W.zmq_send(h, out, out.shape[0])
        n += 1
        if m == 4:
            break
    return n

@njit
def uecho(fd, pfd, wait_ms, buf, out, addr, alen, cap):
    n = 0
    while n < cap:
        if W.c_poll(pfd, wait_ms) <= 0:
            break
        alen[0] = addr.shape[0]
        m = W.c_recvfrom(fd, buf, buf.shape[0], addr, alen)
        if m == 4:
            break
        W.c_sendto(fd, out, out.shape[0], addr, alen[0])
        n += 1
    return n

if kind == "zmq":
    import zmq
    ctx = zmq.Context()
    s = ctx.socket(zmq.REP)
    s.setsockopt(zmq.LINGER, 0)
    s.setsockopt(zmq.RCVTIMEO, int(idle_s * 1000))
    s.bind(address)
    zecho(s.underlying, buf, out, 0)  # compile before saying ready
    print("ready", flush=True)
    zecho(s.underlying, buf, out, cap)
    s.close(linger=0)
    ctx.term()
else:
    host, port = address[len("udp://"):].rsplit(":", 1)
    s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    s.bind((host, int(port)))
    pfd = np.array([s.fileno(), W.POLLIN], dtype=np.int32)
    addr, alen = np.zeros(128, dtype=np.uint8), np.zeros(1, dtype=np.int32)
    uecho(s.fileno(), pfd, 1, buf, out, addr, alen, 0)
    print("ready", flush=True)
    uecho(s.fileno(), pfd, int(idle_s * 1000), buf, out, addr, alen, cap)
    s.close()
"""


def _compiled_series():
    """The client's side of the compiled ping-pong: n round trips, each timed on the cycle
    counter (compiled on first use)."""
    from numba import njit

    from hilrig.bridge import wire as W
    from hilrig.runtime.clock import cycles

    @njit
    def series(kind, h, pfd, wait_ms, req, buf, rtt):
        for i in range(rtt.shape[0]):
            c0 = cycles()
            if kind == 1:
                W.zmq_send(h, req, req.shape[0])
                if W.zmq_recv(h, buf, buf.shape[0]) < 0:
                    return i
            else:
                W.c_send(h, req, req.shape[0])
                if W.c_poll(pfd, wait_ms) <= 0:
                    return i
                W.c_recv(h, buf, buf.shape[0])
            rtt[i] = cycles() - c0
        return rtt.shape[0]
    return series


# ---------------------------------------------------------------------------------------------
# helpers

def free_port(kind: int) -> int:
    """A loopback port the OS reports free now (a small race with other processes is accepted)."""
    with socket.socket(socket.AF_INET, kind) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def addresses(key: str, tmp: Path) -> tuple[str, str]:
    """(stand-in address, echo-server address) for a transport."""
    if key == "zmq_ipc":
        return f"ipc://{tmp}/sim.ipc", f"ipc://{tmp}/echo.ipc"
    if key == "zmq_tcp":
        return (f"tcp://127.0.0.1:{free_port(socket.SOCK_STREAM)}",
                f"tcp://127.0.0.1:{free_port(socket.SOCK_STREAM)}")
    return (f"udp://127.0.0.1:{free_port(socket.SOCK_DGRAM)}",
            f"udp://127.0.0.1:{free_port(socket.SOCK_DGRAM)}")


def udp_support() -> tuple[bool, str]:
    """Whether the installed hilrig bridge has the datagram transport (feature test, no I/O)."""
    try:
        from hilrig.bridge import transport as T
    except ImportError as exc:
        return False, f"hilrig.bridge.transport does not import: {exc}"
    if hasattr(T, "UdpClient") and hasattr(T, "UdpServer"):
        return True, "UdpClient/UdpServer"
    try:
        T.check_address("udp://127.0.0.1:9")
    except Exception as exc:  # noqa: BLE001 -- any refusal means "not in this version"
        return False, f"udp:// addresses refused ({exc})"
    return True, "udp:// addresses accepted"


def child_env() -> dict:
    # unbuffered so readiness lines arrive at once; wide so rich does not wrap log lines
    return dict(os.environ, PYTHONUNBUFFERED="1", COLUMNS="400")


def start(cmd: list, log: Path, ready: str) -> subprocess.Popen:
    """Start a subprocess with its output in ``log``; return once ``ready`` appears in it."""
    fh = open(log, "w")
    proc = subprocess.Popen(cmd, stdout=fh, stderr=subprocess.STDOUT, env=child_env())
    fh.close()  # the child holds its own copy
    deadline = time.monotonic() + START_TIMEOUT_S
    while time.monotonic() < deadline:
        text = log.read_text(errors="replace")
        if ready in text:
            return proc
        if proc.poll() is not None:
            raise RuntimeError(f"{' '.join(cmd[:6])} ... exited with {proc.returncode}:\n"
                               f"{text[-2000:]}")
        time.sleep(0.05)
    stop(proc)
    raise RuntimeError(f"no {ready!r} from {' '.join(cmd[:6])} ... within {START_TIMEOUT_S:g} s")


def stop(proc: subprocess.Popen | None, wait_s: float = 30.0) -> None:
    """Let a subprocess we started finish by itself; terminate it (by its handle) if it hangs."""
    if proc is None:
        return
    try:
        proc.wait(timeout=wait_s)
    except subprocess.TimeoutExpired:
        proc.terminate()
        try:
            proc.wait(timeout=5)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=5)


def pct(values_us: np.ndarray) -> dict:
    return {"p50": float(np.percentile(values_us, 50)), "p99": float(np.percentile(values_us, 99)),
            "max": float(values_us.max())}


def med_dict(dicts: list) -> dict:
    return {k: st.median(d[k] for d in dicts) for k in ("p50", "p99", "max")}


# ---------------------------------------------------------------------------------------------
# lockstep

def start_standin(scen: Path, bind: str, sessions: int, log: Path,
                  profile_to: Path | None = None) -> subprocess.Popen:
    pre = ["-m", "cProfile", "-o", str(profile_to)] if profile_to else []
    cmd = [sys.executable, *pre, "-m", "hilrig.runtime.cli", "serve-sim", "--scenario", str(scen),
           "--bind", bind, "--sessions", str(sessions), "--idle-timeout", f"{IDLE_TIMEOUT_S:g}"]
    return start(cmd, log, "listening")


def lockstep_session(sc, address: str, folder: Path) -> dict:
    """One lockstep session against the running stand-in; figures from its summary.json."""
    from hilrig.bridge.session import run_bridge
    t = time.perf_counter()
    res = run_bridge(sc, address, folder, overwrite=True)
    call_s = time.perf_counter() - t
    s = json.loads((Path(res.folder) / "summary.json").read_text())
    tm, br = s["timing"], s["bridge"]
    if not s["completed"]:
        raise RuntimeError(f"lockstep session over {address} ended early after {s['ticks_run']} "
                           f"ticks: {s['end_event']} {s['events']}")
    return {"ticks": s["ticks_run"], "ticks_per_s": s["ticks_run"] / tm["wall_s"],
            "loop_ticks_per_s": tm["ticks_per_s"], "call_s": call_s,
            "rtt_us": {k: br["rtt_us"][k] for k in ("p50", "p99", "max")},
            "resent": br.get("resent", 0), "lost": br["lost"]}


# ---------------------------------------------------------------------------------------------
# raw ping-pong

class RawClient:
    """The requesting end of the raw ping-pong, on one transport."""

    def __init__(self, address: str):
        self.address = address
        if address.startswith("udp://"):
            host, port = address[len("udp://"):].rsplit(":", 1)
            self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            self.sock.connect((host, int(port)))
            self.sock.settimeout(REPLY_TIMEOUT_S)
            self.zmq = False
        else:
            import zmq
            self.sock = zmq.Context.instance().socket(zmq.REQ)
            for opt, val in ((zmq.LINGER, 0), (zmq.RCVTIMEO, int(REPLY_TIMEOUT_S * 1000)),
                             (zmq.SNDTIMEO, int(REPLY_TIMEOUT_S * 1000))):
                self.sock.setsockopt(opt, val)
            self.sock.connect(address)
            self.zmq = True

    def exchange(self, data: bytes) -> bytes:
        """One request and its reply (no timing)."""
        self.sock.send(data)
        return self.sock.recv() if self.zmq else self.sock.recv(65507)

    def series(self, request: bytes, n: int) -> dict:
        """``n`` round trips (capped at :data:`RAW_CAP_S`); rate and round-trip percentiles."""
        rtt = np.empty(n, dtype=np.int64)
        send, recv = self.sock.send, self.sock.recv
        clock = time.perf_counter_ns
        lost = 0
        done = 0
        deadline = clock() + int(RAW_CAP_S * 1e9)
        t_start = clock()
        if self.zmq:
            import zmq
            try:
                while done < n:
                    t0 = clock()
                    send(request)
                    recv()
                    t1 = clock()
                    rtt[done] = t1 - t0
                    done += 1
                    if t1 > deadline:
                        break
            except zmq.Again:
                raise RuntimeError(f"raw ping-pong over {self.address}: no reply within "
                                   f"{REPLY_TIMEOUT_S:g} s") from None
        else:
            while done < n:
                t0 = clock()
                send(request)
                try:
                    recv(65507)
                except socket.timeout:
                    lost += 1  # a lost datagram: the next request simply goes out
                t1 = clock()
                rtt[done] = t1 - t0
                done += 1
                if t1 > deadline:
                    break
        wall = (clock() - t_start) / 1e9
        us = rtt[:done] / 1e3
        return {"n": done, "round_trips_per_s": done / wall, "rtt_us": pct(us), "lost": lost}

    def compiled_series(self, request: bytes, n: int) -> dict:
        """As :meth:`series`, the loop compiled (against the compiled echo server)."""
        from hilrig.bridge import wire as W
        from hilrig.runtime.clock import cycle_rate
        fn = getattr(RawClient, "_series", None) or _compiled_series()
        RawClient._series = fn
        req = np.frombuffer(request, dtype=np.uint8).copy()
        buf = np.zeros(65536, dtype=np.uint8)
        rtt = np.zeros(n, dtype=np.uint64)
        if self.zmq:
            kind, h, pfd = W.KIND_ZMQ, self.sock.underlying, np.zeros(2, dtype=np.int32)
        else:
            self.sock.settimeout(None)  # a blocking descriptor: the compiled loop polls
            kind, h = W.KIND_UDP, self.sock.fileno()
            pfd = np.array([h, W.POLLIN], dtype=np.int32)
        rate = getattr(RawClient, "_rate", None) or cycle_rate(0.1)
        RawClient._rate = rate
        t = time.perf_counter()
        done = fn(kind, h, pfd, int(REPLY_TIMEOUT_S * 1000), req, buf, rtt)
        wall = time.perf_counter() - t
        if not self.zmq:
            self.sock.settimeout(REPLY_TIMEOUT_S)
        if done < n:
            raise RuntimeError(f"compiled ping-pong over {self.address}: no reply after {done}")
        return {"n": done, "round_trips_per_s": done / wall,
                "rtt_us": pct(rtt.astype(float) / rate * 1e6), "lost": 0}

    def quit(self) -> None:
        try:
            self.sock.send(b"quit")
            if self.zmq:
                self.sock.recv()
        except Exception:  # noqa: BLE001 -- the server stops on its idle timeout anyway
            pass
        self.sock.close()


def start_echo(address: str, reply: bytes, cap: int, log: Path,
               compiled: bool = False) -> subprocess.Popen:
    kind = "udp" if address.startswith("udp://") else "zmq"
    cmd = [sys.executable, "-c", COMPILED_ECHO_SERVER if compiled else ECHO_SERVER, kind, address,
           reply.hex(), f"{IDLE_TIMEOUT_S:g}", str(cap)]
    return start(cmd, log, "ready")


# ---------------------------------------------------------------------------------------------
# one transport

def measure(key: str, sc, scen: Path, tmp: Path, reps: int, frames: tuple[bytes, bytes],
            lockstep_ok: bool) -> dict:
    """Interleaved lockstep sessions and raw ping-pong series on one transport."""
    sim_addr, echo_addr = addresses(key, tmp)
    request, reply = frames
    n = sc.n_ticks
    warm = min(n, 1000)
    sim = echo = cecho = None
    client = cclient = None
    out: dict = {"lockstep": [], "raw": [], "raw_compiled": [], "lockstep_error": None}
    try:
        echo = start_echo(echo_addr, reply, cap=(reps + 1) * (n + warm) + 10, log=tmp / f"{key}-echo.log")
        client = RawClient(echo_addr)
        client.series(request, warm)  # connection set-up and first-use costs stay out
        c_addr = addresses(key, tmp / "c")[1] if key != "zmq_ipc" else f"ipc://{tmp}/echo-c.ipc"
        cecho = start_echo(c_addr, reply, cap=(reps + 1) * (n + warm) + 10,
                           log=tmp / f"{key}-echo-compiled.log", compiled=True)
        cclient = RawClient(c_addr)
        cclient.compiled_series(request, warm)
        if lockstep_ok:
            try:
                sim = start_standin(scen, sim_addr, reps + 1, tmp / f"{key}-sim.log")
                lockstep_session(sc, sim_addr, tmp / f"{key}-warm")  # also compiles or loads
            except Exception as exc:  # noqa: BLE001 -- reported in the table, not fatal
                out["lockstep_error"] = f"{type(exc).__name__}: {exc}"
        for rep in range(reps):
            if sim is not None and out["lockstep_error"] is None:
                try:
                    out["lockstep"].append(lockstep_session(sc, sim_addr, tmp / f"{key}-{rep}"))
                except Exception as exc:  # noqa: BLE001
                    out["lockstep_error"] = f"{type(exc).__name__}: {exc}"
            out["raw"].append(client.series(request, n))
            out["raw_compiled"].append(cclient.compiled_series(request, n))
    finally:
        for c in (client, cclient):
            if c is not None:
                c.quit()
        stop(echo, wait_s=10)
        stop(cecho, wait_s=10)
        stop(sim, wait_s=10 if out["lockstep_error"] is None else 0.1)
    return out


def summarise(m: dict) -> dict:
    raw = {"raw_round_trips_per_s": st.median(r["round_trips_per_s"] for r in m["raw"]),
           "raw_rtt_us": med_dict([r["rtt_us"] for r in m["raw"]]),
           "raw_n": m["raw"][0]["n"], "raw_lost": sum(r["lost"] for r in m["raw"]),
           "raw_compiled_round_trips_per_s": st.median(r["round_trips_per_s"]
                                                       for r in m["raw_compiled"]),
           "raw_compiled_rtt_us": med_dict([r["rtt_us"] for r in m["raw_compiled"]])}
    if m["lockstep_error"] is not None or not m["lockstep"]:
        return {"error": m["lockstep_error"] or "no lockstep session ran", **raw}
    ls = m["lockstep"]
    lock = st.median(r["ticks_per_s"] for r in ls)
    return {"lockstep_ticks_per_s": lock,
            "lockstep_loop_ticks_per_s": st.median(r["loop_ticks_per_s"] for r in ls),
            "raw_round_trips_per_s": raw["raw_round_trips_per_s"],
            "ratio": lock / raw["raw_round_trips_per_s"],
            "raw_compiled_round_trips_per_s": raw["raw_compiled_round_trips_per_s"],
            "raw_compiled_rtt_us": raw["raw_compiled_rtt_us"],
            "ratio_compiled": lock / raw["raw_compiled_round_trips_per_s"],
            "rtt_us": med_dict([r["rtt_us"] for r in ls]),
            "raw_rtt_us": raw["raw_rtt_us"],
            "ticks": ls[0]["ticks"], "reps": len(ls),
            "lockstep_rates": [round(r["ticks_per_s"]) for r in ls],
            "raw_rates": [round(r["round_trips_per_s"]) for r in m["raw"]],
            "resent": sum(r["resent"] for r in ls), "raw_lost": raw["raw_lost"]}


# ---------------------------------------------------------------------------------------------
# profile (optional)

# The stand-in under cProfile (run with ``python -c``): the plant kernels are compiled or loaded
# before profiling starts, so the profile holds the serving loop, not imports and kernel loading.
PROFILED_STANDIN = r"""
import cProfile, sys
from hilrig.bridge import standin
from hilrig.runtime.scenario import load_scenario
scen, bind, out = sys.argv[1:4]
sc = load_scenario(scen)
sim = standin.StandIn(sc)
standin.StandIn = lambda *a, **k: sim  # serve() builds its plant state once: hand it the loaded one
pr = cProfile.Profile()
pr.enable()
standin.serve(sc, bind, sessions=1, idle_timeout_s=60.0, log=lambda m: print(m, flush=True))
pr.disable()
pr.dump_stats(out)
"""


def print_profile(side: str, stats: pstats.Stats, ticks: int, top: int) -> None:
    rows = []
    for (file, line, fn), (cc, nc, tt, ct, _) in stats.stats.items():
        if nc >= ticks // 2:  # called about once per tick or more: the per-tick path
            rows.append((tt, nc, ct, f"{Path(file).name}:{line}({fn})"))
    rows.sort(reverse=True)
    per_tick = sum(r[0] for r in rows) / ticks * 1e6
    print(f"  {side}: {ticks} ticks; functions called >= once per tick: {per_tick:.1f} us of own "
          f"time per tick under the profiler (waits included)")
    print(f"    {'own us/tick':>11} {'cum us/tick':>11} {'calls/tick':>10}  function")
    for tt, nc, ct, name in rows[:top]:
        print(f"    {tt / ticks * 1e6:11.2f} {ct / ticks * 1e6:11.2f} {nc / ticks:10.2f}  {name}")


def profile(key: str, sc, scen: Path, tmp: Path, top: int = 12) -> None:
    """cProfile of one short session: runtime side here, stand-in side in its process."""
    from hilrig.bridge.session import run_bridge
    sim_addr, _ = addresses(key, tmp)
    prof_sim = tmp / f"{key}-sim.prof"
    sim = start([sys.executable, "-c", PROFILED_STANDIN, str(scen), sim_addr, str(prof_sim)],
                tmp / f"{key}-prof-sim.log", "listening")
    pr = cProfile.Profile()
    try:
        pr.enable()
        res = run_bridge(sc, sim_addr, tmp / f"{key}-prof", overwrite=True)
        pr.disable()
    finally:
        stop(sim, wait_s=30)
    ticks = res.summary["ticks_run"]
    print_profile("runtime (run_bridge)", pstats.Stats(pr), ticks, top)
    if prof_sim.exists():
        print_profile("stand-in simulator (serve)", pstats.Stats(str(prof_sim)), ticks, top)
    else:
        print("  stand-in simulator: no profile written")


def standin_probe(key: str, sc, scen: Path, tmp: Path, n: int) -> dict:
    """The stand-in's service in place: a bare client (no controller, frames encoded beforehand)
    runs one lockstep session of ``n`` ACTUATIONs against it. Its round trip is the transport
    plus the stand-in's work per tick, in its own process, as the bridge sees it."""
    from hilrig.bridge import protocol as P
    from hilrig.bridge.session import signal_maps
    sim_addr, _ = addresses(key, tmp)
    sim = start_standin(scen, sim_addr, 1, tmp / f"{key}-probe-sim.log")
    client = RawClient(sim_addr)
    try:
        meas_map, act_map = signal_maps(sc)
        u = np.full(len(act_map), 400.0)
        hello = P.encode(P.Hello(version=P.PROTOCOL_VERSION, tick_period_s=sc.Ts, mode="lockstep",
                                 meas_map=meas_map, act_map=act_map,
                                 map_hash=P.map_hash(meas_map, act_map)))
        reqs = [P.encode_actuation(k, u, 0, True) for k in range(n)]
        for frame in (hello, P.encode(P.Heartbeat(seq=0, t_sender_s=0.0))):
            client.exchange(frame)
        rtt = np.empty(n, dtype=np.int64)
        clock = time.perf_counter_ns
        exchange = client.exchange
        deadline = clock() + int(RAW_CAP_S * 1e9)
        done = 0
        t_start = clock()
        while done < n and clock() < deadline:
            t0 = clock()
            exchange(reqs[done])
            rtt[done] = clock() - t0
            done += 1
        wall = (clock() - t_start) / 1e9
        client.exchange(P.encode(P.Stop(reason="probe ended")))
    finally:
        client.sock.close()
        stop(sim, wait_s=10)
    return {"round_trips_per_s": done / wall, "rtt_us": pct(rtt[:done] / 1e3)}


def pieces(sc, n: int) -> None:
    """The work of a lockstep tick without any transport, piece by piece, in this process.

    The same calls as the session's tick loop and the stand-in's reply to an ACTUATION, in the
    same order, closed into a loop (SAMPLE bytes -> runtime -> ACTUATION bytes -> simulator ->
    SAMPLE bytes ...), each piece timed with perf_counter_ns. Their sum is the processing a
    lockstep tick adds to a raw round trip.
    """
    from hilrig.bridge import protocol as P
    from hilrig.bridge.session import _bridge_kernel, _tick_args, signal_maps
    from hilrig.bridge.standin import StandIn
    from hilrig.runtime.run import prepare
    meas_map, act_map = signal_maps(sc)
    n_meas, n_act = len(meas_map), len(act_map)
    tick = _bridge_kernel(sc)
    prep = prepare(sc)
    a = prep.args
    targs = _tick_args(a)
    warm = min(n, 500)  # first calls load kernels and fill caches: not counted
    rec = np.zeros((n + warm, len(prep.signals)))
    sim = StandIn(sc)
    seq = P.SequenceTracker()
    names = ("runtime: decode SAMPLE", "runtime: tick kernel + bookkeeping",
             "runtime: build + encode ACTUATION", "sim: decode ACTUATION",
             "sim: plant advance (kernel)", "sim: plant sample + build SAMPLE", "sim: encode SAMPLE")
    cost = dict.fromkeys(names, 0)
    clock = time.perf_counter_ns
    wire = P.encode(sim.sample(0))
    t_all = 0
    for kk in range(n + warm):
        if kk == warm:
            cost = dict.fromkeys(names, 0)
            t_all = clock()
        t0 = clock()
        smp = P.decode(wire, n_meas=n_meas, n_act=n_act)
        t1 = clock()
        seq.check(smp.seq)
        a["y"][:] = smp.meas
        a["d"][:] = np.nan
        tick(kk, kk, sc.Ts, sc.v_collapse, a["i_vout"], *targs, rec, a["ev"])
        enable = not bool(a["latch"][0])
        word = int(rec[kk, -2])
        t2 = clock()
        act = P.encode(P.Actuation(seq=kk, u=a["u"].copy(), interlock_word=word,
                                   output_enable=enable))
        t3 = clock()
        frame = P.decode(act, n_meas=n_meas, n_act=n_act)
        t4 = clock()
        sim.step(frame.u if frame.output_enable else np.zeros_like(frame.u))
        t5 = clock()
        out = sim.sample(sim.k)
        t6 = clock()
        wire = P.encode(out)
        t7 = clock()
        for name, dt in zip(names, (t1 - t0, t2 - t1, t3 - t2, t4 - t3, t5 - t4, t6 - t5, t7 - t6)):
            cost[name] += dt
    wall = (clock() - t_all) / 1e9
    total = sum(cost.values()) / n / 1e3
    print(f"  in-process lockstep, no transport: {n / wall:,.0f} ticks/s ({wall / n * 1e6:.1f} us "
          f"per tick; the pieces below sum to {total:.1f} us)")
    for name in names:
        print(f"    {cost[name] / n / 1e3:7.2f} us  {name}")


# ---------------------------------------------------------------------------------------------

def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=0.5,
                    help="simulated time per lockstep session [s] (default 0.5: 10 000 ticks)")
    ap.add_argument("--reps", type=int, default=3, help="repetitions per measurement (default 3)")
    ap.add_argument("--profile", action="store_true",
                    help="also profile one short session per transport (both sides)")
    ap.add_argument("--profile-seconds", type=float, default=0.2,
                    help="simulated time of a profiled session [s] (default 0.2)")
    args = ap.parse_args()
    if not 0.01 <= args.seconds <= 5.0:
        ap.error(f"--seconds {args.seconds} is outside [0.01, 5] s")
    if not 1 <= args.reps <= 20:
        ap.error(f"--reps {args.reps} is outside [1, 20]")

    tmp = Path(tempfile.mkdtemp(prefix="hilrig-bench-"))
    os.environ.setdefault("HILRIG_CACHE_DIR", str(tmp / "cache"))
    from hilrig.bridge import protocol as P
    from hilrig.bridge.session import signal_maps
    from hilrig.runtime.scenario import load_scenario

    scen = tmp / "bridge_bench.toml"
    scen.write_text(SCENARIO.format(seconds=args.seconds))
    sc = load_scenario(scen)
    meas_map, act_map = signal_maps(sc)
    # the frames of a tick in the middle of a session: same field encodings, same sizes
    k = sc.n_ticks // 2
    request = P.encode_actuation(k, np.full(len(act_map), 402.5), 0, True)
    reply = P.encode_sample(k + 1, (k + 1) * sc.Ts, np.linspace(125.0, 800.0, len(meas_map)))

    udp_ok, udp_how = udp_support()
    t_all = time.perf_counter()
    print(f"bridge latency bench: {sc.n_ticks} ticks per session (Ts {sc.Ts * 1e6:g} us, "
          f"{args.seconds:g} s simulated), {args.reps} reps, median reported; loopback only; "
          f"ACTUATION {len(request)} B out, SAMPLE {len(reply)} B back "
          f"({len(act_map)} actuation, {len(meas_map)} measurements); demo scenario")
    print(f"UDP bridge transport: {'available (' + udp_how + ')' if udp_ok else 'not available in this version: ' + udp_how}")
    results: dict = {}
    for key, label in TRANSPORTS:
        t = time.perf_counter()
        m = measure(key, sc, scen, tmp, args.reps, (request, reply),
                    lockstep_ok=(key != "udp" or udp_ok))
        results[key] = summarise(m)
        if key == "udp" and not udp_ok:
            results[key]["error"] = "not available in this version"
        print(f"  {label}: measured in {time.perf_counter() - t:.1f} s", flush=True)

    # table
    print()
    head = (f"{'transport':<20} {'lockstep t/s':>12} {'loop only':>10} {'rtt p50/p99/max us':>22} "
            f"{'raw rt/s':>9} {'raw p50/p99/max us':>22} {'ratio':>6}")
    print(head)
    print("-" * len(head))

    def trip(d):
        return f"{d['p50']:.0f} / {d['p99']:.0f} / {d['max']:.0f}"

    for key, label in TRANSPORTS:
        r = results[key]
        raw = f"{r['raw_round_trips_per_s']:>9,.0f} {trip(r['raw_rtt_us']):>22}"
        if "error" in r:
            print(f"{label:<20} {'-':>12} {'-':>10} {'-':>22} {raw} {'-':>6}   lockstep: {r['error']}")
        else:
            print(f"{label:<20} {r['lockstep_ticks_per_s']:>12,.0f} {r['lockstep_loop_ticks_per_s']:>10,.0f} "
                  f"{trip(r['rtt_us']):>22} {raw} {r['ratio']:>6.2f}")
    print()
    print("next to the compiled ping-pong (both ends' loops in numba, no Python per message):")
    for key, label in TRANSPORTS:
        r = results[key]
        if "raw_compiled_round_trips_per_s" in r:
            ratio = f"{r['ratio_compiled']:.2f}" if "ratio_compiled" in r else "-"
            print(f"  {label:<20} raw compiled {r['raw_compiled_round_trips_per_s']:>9,.0f} rt/s "
                  f"({trip(r['raw_compiled_rtt_us'])} us), lockstep / raw compiled {ratio}")
    print()
    for key, label in TRANSPORTS:
        r = results[key]
        if "error" not in r:
            print(f"{label}: lockstep t/s per rep {r['lockstep_rates']}, raw rt/s per rep "
                  f"{r['raw_rates']}, UDP resends {r['resent']}, raw datagrams lost {r['raw_lost']}"
                  if key == "udp" else
                  f"{label}: lockstep t/s per rep {r['lockstep_rates']}, raw rt/s per rep {r['raw_rates']}")

    # targets
    print()
    targets = {}
    for key in ("zmq_ipc", "zmq_tcp"):
        r = results[key]
        label = dict(TRANSPORTS)[key]
        if "error" in r:
            targets[key] = {"target": "ratio >= 0.80", "value": None, "pass": False}
            print(f"target {label}: lockstep >= {TARGET_ZMQ_RATIO:.0%} of raw ping-pong: not measured -> FAIL")
            continue
        ok = r["ratio"] >= TARGET_ZMQ_RATIO
        targets[key] = {"target": f"ratio >= {TARGET_ZMQ_RATIO}", "value": r["ratio"], "pass": ok}
        print(f"target {label}: lockstep >= {TARGET_ZMQ_RATIO:.0%} of raw ping-pong: "
              f"{r['ratio']:.0%} -> {'PASS' if ok else 'FAIL'}")
    r = results["udp"]
    if "error" in r:
        targets["udp"] = {"target": "lockstep_ticks_per_s >= 20000", "value": None, "pass": False}
        print(f"target UDP loopback: lockstep >= {TARGET_UDP_TICKS_PER_S:,.0f} ticks/s: "
              f"{r['error']} -> FAIL (raw UDP ping-pong {r['raw_round_trips_per_s']:,.0f} rt/s)")
    else:
        ok = r["lockstep_ticks_per_s"] >= TARGET_UDP_TICKS_PER_S
        targets["udp"] = {"target": "lockstep_ticks_per_s >= 20000",
                          "value": r["lockstep_ticks_per_s"], "pass": ok}
        print(f"target UDP loopback: lockstep >= {TARGET_UDP_TICKS_PER_S:,.0f} ticks/s: "
              f"{r['lockstep_ticks_per_s']:,.0f} -> {'PASS' if ok else 'FAIL'}")
    print(f"(bench wall time {time.perf_counter() - t_all:.0f} s; run folders and logs in {tmp})")

    if args.profile:
        print()
        print(f"profile: one session of {args.profile_seconds:g} s simulated per transport "
              f"(cProfile inflates every Python call; read the shares, not the absolute figures)")
        psc_path = tmp / "bridge_bench_profile.toml"
        psc_path.write_text(SCENARIO.format(seconds=args.profile_seconds))
        psc = load_scenario(psc_path)
        for key, label in TRANSPORTS:
            if key == "udp" and "error" in results["udp"]:
                continue
            if "error" in results[key]:
                continue
            r = results[key]
            try:
                probe = standin_probe(key, psc, psc_path, tmp, psc.n_ticks)
            except Exception as exc:  # noqa: BLE001 -- a side measurement: report and go on
                print(f" {label}: bare-client probe failed: {type(exc).__name__}: {exc}")
                continue
            per_tick = 1e6 / r["lockstep_ticks_per_s"]
            print(f" {label}: round trip p50 raw {r['raw_rtt_us']['p50']:.0f} us -> bare client "
                  f"against the stand-in {probe['rtt_us']['p50']:.0f} us "
                  f"({probe['round_trips_per_s']:,.0f} rt/s) -> lockstep {r['rtt_us']['p50']:.0f} us;"
                  f" lockstep tick {per_tick:.0f} us, of which about "
                  f"{per_tick - r['rtt_us']['p50']:.0f} us in this process between round trips")
            profile(key, psc, psc_path, tmp)
        print(" pieces of a tick:")
        try:
            pieces(psc, psc.n_ticks)
        except Exception as exc:  # noqa: BLE001 -- mirrors session internals that may change
            print(f"  not measured: {type(exc).__name__}: {exc}")

    out = {}
    for key in ("zmq_ipc", "zmq_tcp", "udp"):
        r = results[key]
        if "error" in r:
            out[key] = "unavailable" if key == "udp" and not udp_ok else {"error": r["error"]}
            if key == "udp":
                out["udp_raw"] = {k: r[k] for k in ("raw_round_trips_per_s", "raw_rtt_us")}
        else:
            out[key] = {k: r[k] for k in ("lockstep_ticks_per_s", "lockstep_loop_ticks_per_s",
                                          "raw_round_trips_per_s", "ratio", "rtt_us", "raw_rtt_us",
                                          "raw_compiled_round_trips_per_s", "ratio_compiled",
                                          "ticks", "reps")}
    out["targets"] = targets
    print(json.dumps(out))


if __name__ == "__main__":
    main()
