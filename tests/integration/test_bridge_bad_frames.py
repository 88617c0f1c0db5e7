"""A bad frame from the simulator mid-run (lockstep): the run trips on it (protocol-error or
sequence-error watchdog), the peer gets the safe actuation and then ERROR, the recording ends on
the watchdog tick with the safe output, and `hilrig run` exits 1. The faults come from the
stand-in (`--corrupt-every`) and from an independent peer: a proxy in this process between the
runtime and the stand-in that mangles one reply. Loopback and ipc only; every wait is bounded.

Trip semantics (a fault ends the run in a latched safe state): common practice, no source."""
import json
import math
import subprocess
import threading
from pathlib import Path

import msgpack
import numpy as np
import pytest
import zmq

from hilrig.bridge import protocol as P
from hilrig.runtime.recording import open_run
from tests.integration.standin import CLI, reaped, serve, wait_listening

BIT_PROTOCOL, BIT_SEQUENCE, BIT_LATCHED = 45, 46, 50  # safety/interlocks.py BIT_WATCHDOG + 5, + 6


def _scenario(tmp_path, demo_path):
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "40 ms"')
    path = tmp_path / "short.toml"
    path.write_text(text)
    return path


def _check_trip(folder: Path, cause: str, bit: int):
    s = json.loads((folder / "summary.json").read_text())
    assert s["outcome"]["status"] == "tripped", s["outcome"]
    assert s["trip"]["cause_id"] == cause, s["trip"]
    run = open_run(folder)
    k = s["trip"]["tick"]
    assert run.time.shape[0] == s["ticks_run"] == k + 1  # the watchdog tick is the last one
    assert run.signals["u"][k] == 0.0                     # the safe output (limits.safe_u)
    word = int(run.signals["interlock_word"][k])
    assert (word >> bit) & 1 and (word >> BIT_LATCHED) & 1
    return s, k


def test_corrupted_reply_trips_sends_safe_actuation_and_error_and_exits_1(tmp_path, demo_path):
    scen = _scenario(tmp_path, demo_path)
    address = f"ipc://{tmp_path}/sim.sock"
    sim = serve(scen, address, "--corrupt-every", "300")
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out",
                                  str(tmp_path / "r"), "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600)
        sim_out, sim_err = sim.communicate(timeout=120)
    assert p.returncode == 1, p.stdout + p.stderr
    s, k = _check_trip(tmp_path / "r", "watchdog protocol error", BIT_PROTOCOL)
    # reply 300: the handshake took 2 replies, so the 298th sample (tick 298) was mangled
    assert k == 298
    ev = [e for e in s["events"] if e["event"] == "bridge protocol error"][0]
    assert ev["peer_told"] == "safe actuation, ERROR 5"
    # 0x94 ^ 0xff is the integer 107, followed by bytes: one frame rejected
    assert s["bridge"]["rejected"] == {"trailing-bytes": 1}
    # the stand-in applied the safe actuation (one more tick) and then ended on the ERROR
    assert f"session 1 ended after {k + 1} ticks (the runtime sent ERROR 5" in sim_out, sim_out
    assert sim.returncode == 0, sim_err


def _sample(data: bytes):
    return msgpack.unpackb(data, raw=False)


def _raw(seq, t, meas: bytes) -> bytes:
    """A SAMPLE written with msgpack-python directly (no checks of ours)."""
    return msgpack.packb([3, seq, t, meas], use_bin_type=True)


def _oversize(f, size=70_016) -> bytes:
    """SAMPLE f with its vector padded so that the frame is exactly ``size`` bytes."""
    pad = size - len(_raw(f[1], f[2], f[3])) - 3  # bin 8 -> bin 32: 3 more header bytes
    out = _raw(f[1], f[2], f[3] + b"\x00" * pad)
    assert len(out) == size
    return out


MANGLE = {
    # over MAX_FRAME_BYTES (65536): rejected as oversize, reported with its true length
    "oversize": (lambda f, b, w: _oversize(f), "watchdog protocol error", BIT_PROTOCOL),
    # name: (how one SAMPLE reply is changed, the cause it must trip, its bit)
    "trailing bytes": (lambda f, b, w: b + b"\x00", "watchdog protocol error", BIT_PROTOCOL),
    "non-finite time": (lambda f, b, w: _raw(f[1], math.nan, f[3]),
                        "watchdog protocol error", BIT_PROTOCOL),
    "short vector": (lambda f, b, w: _raw(f[1], f[2], f[3][:-8]),
                     "watchdog protocol error", BIT_PROTOCOL),
    "WELCOME mid-run": (lambda f, b, w: w, "watchdog protocol error", BIT_PROTOCOL),
    "sequence jump": (lambda f, b, w: _raw(f[1] + 5, f[2], f[3]),
                      "watchdog sequence error", BIT_SEQUENCE),
    "sequence duplicate": (lambda f, b, w: _raw(f[1] - 1, f[2], f[3]),
                           "watchdog sequence error", BIT_SEQUENCE),
}
AT = 200  # the SAMPLE of this tick is mangled


def _proxy(front: str, back: str, how, seen: list, stop: threading.Event):
    """REP on ``front`` forwarding each request to the stand-in on ``back`` (REQ); the reply
    carrying SAMPLE AT is replaced by how(frame, bytes, welcome bytes). Every request is kept."""
    ctx = zmq.Context.instance()
    rep, req = ctx.socket(zmq.REP), ctx.socket(zmq.REQ)
    for so in (rep, req):
        so.setsockopt(zmq.LINGER, 0)
    rep.bind(front)
    req.connect(back)
    welcome = None
    try:
        while not stop.is_set():
            if not rep.poll(100):
                continue
            data = rep.recv()
            seen.append(_sample(data))
            req.send(data)
            if not req.poll(30_000):
                break
            out = req.recv()
            f = _sample(out)
            if f[0] == 2:
                welcome = out
            elif f[0] == 3 and f[1] == AT:
                out = how(f, out, welcome)
            rep.send(out)
    finally:
        rep.close()
        req.close()


@pytest.mark.parametrize("case", list(MANGLE))
def test_a_bad_sample_from_an_independent_peer_trips(tmp_path, demo_path, case):
    how, cause, bit = MANGLE[case]
    scen = _scenario(tmp_path, demo_path)
    back, front = f"ipc://{tmp_path}/sim.sock", f"ipc://{tmp_path}/proxy.sock"
    sim = serve(scen, back)
    seen: list = []
    stop = threading.Event()
    with reaped(sim):
        wait_listening(sim)
        th = threading.Thread(target=_proxy, args=(front, back, how, seen, stop), daemon=True)
        th.start()
        try:
            # the runtime in its own process: its compiled exchange holds the GIL while it waits
            p = subprocess.run(CLI + ["run", str(scen), "--bridge", front, "--out",
                                      str(tmp_path / "r"), "--headless", "--timeout", "30"],
                               capture_output=True, text=True, timeout=600)
        finally:
            stop.set()
            th.join(60)
        sim_out, _ = sim.communicate(timeout=120)
    assert p.returncode == 1, p.stdout + p.stderr
    s, k = _check_trip(tmp_path / "r", cause, bit)
    assert k == AT
    # after the bad reply the runtime sent the safe actuation of tick AT, then ERROR, then nothing
    act, err = seen[-2], seen[-1]
    assert act[0] == 4 and act[1] == AT and act[4] is False
    assert np.frombuffer(act[2], "<f8")[0] == 0.0
    assert err[0] == 7 and err[1] in (5, 6)
    assert "session 1 ended" in sim_out and "ERROR" in sim_out
    if case == "oversize":
        assert s["bridge"]["rejected"] == {"oversize": 1}
        assert "frame of 70016 bytes, at most 65536 allowed" in s["bridge"]["reject_log"][-1][1]


def _udp_proxy(front, back: tuple, how, stop: threading.Event):
    """Datagrams between the runtime (on ``front``, a bound socket) and the stand-in at
    ``back``; each reply carrying SAMPLE AT goes out as how(frame, bytes, WELCOME bytes) (a list
    of datagrams)."""
    import select
    import socket
    b = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    b.connect(back)
    peer, welcome = None, None
    try:
        while not stop.is_set():
            ready, _, _ = select.select([front, b], [], [], 0.1)
            if front in ready:
                data, peer = front.recvfrom(70000)
                b.send(data)
            if b in ready:
                out = b.recv(70000)
                f = _sample(out)
                welcome = out if f[0] == 2 else welcome
                outs = how(f, out, welcome) if f[0] == 3 and f[1] == AT else [out]
                for o in outs:
                    if peer is not None:
                        front.sendto(o, peer)
    finally:
        b.close()


@pytest.mark.parametrize("case", ["duplicate", "late WELCOME", "jump"])
def test_udp_lockstep_sequence_handling(tmp_path, demo_path, case):
    """Section 11 over datagrams in lockstep: a second copy of a SAMPLE already taken is dropped
    and counted as a duplicate (the run goes on); a SAMPLE beyond the one due is a sequence
    error (trip). A late copy of the handshake's WELCOME is a duplicate too."""
    import socket
    from tests.integration.standin import udp_address
    scen = _scenario(tmp_path, demo_path)
    back = udp_address()
    host, port = back[len("udp://"):].rsplit(":", 1)
    front = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    front.bind(("127.0.0.1", 0))
    how = {"duplicate": lambda f, b, w: [b, b],
           "late WELCOME": lambda f, b, w: [b, w],   # a copy of the handshake's answer
           "jump": lambda f, b, w: [_raw(f[1] + 3, f[2], f[3])]}[case]
    sim = serve(scen, back)
    stop = threading.Event()
    with reaped(sim):
        wait_listening(sim)
        th = threading.Thread(target=_udp_proxy, args=(front, (host, int(port)), how, stop),
                              daemon=True)
        th.start()
        try:
            p = subprocess.run(CLI + ["run", str(scen), "--bridge",
                                      f"udp://127.0.0.1:{front.getsockname()[1]}", "--out",
                                      str(tmp_path / "r"), "--headless", "--timeout", "30"],
                               capture_output=True, text=True, timeout=600)
        finally:
            stop.set()
            th.join(60)
            front.close()
        sim.communicate(timeout=120)
    if case != "jump":
        assert p.returncode == 0, p.stdout + p.stderr
        s = json.loads((tmp_path / "r" / "summary.json").read_text())
        br = s["bridge"]
        assert br["duplicates"] == 1 and br["out_of_order"] == 0 and br["lost"] == 0, br
        assert "stale_replies" not in br
    else:
        assert p.returncode == 1, p.stdout + p.stderr
        s, k = _check_trip(tmp_path / "r", "watchdog sequence error", BIT_SEQUENCE)
        assert k == AT


def test_a_refused_welcome_is_answered_with_error(tmp_path, demo_path):
    """Section 7.3: the runtime checks the WELCOME and, when it does not match, tells the
    simulator with ERROR (here code 4, period) instead of leaving it waiting."""
    from hilrig.bridge.errors import BridgeError
    from hilrig.bridge.session import run_bridge, signal_maps
    from hilrig.runtime.scenario import load_scenario
    sc = load_scenario(_scenario(tmp_path, demo_path))
    meas, act = signal_maps(sc)
    address = f"ipc://{tmp_path}/peer.sock"
    got: list = []

    def peer():
        ctx = zmq.Context.instance()
        rep = ctx.socket(zmq.REP)
        rep.setsockopt(zmq.LINGER, 0)
        rep.bind(address)
        try:
            if rep.poll(60_000):
                got.append(_sample(rep.recv()))
                rep.send(P.encode(P.Welcome(P.PROTOCOL_VERSION, 2 * sc.Ts, "lockstep", meas, act,
                                            P.map_hash(meas, act), "other period")))
            if rep.poll(10_000):
                got.append(_sample(rep.recv()))
                rep.send(P.encode(P.Stop("session ended")))
        finally:
            rep.close()

    th = threading.Thread(target=peer, daemon=True)
    th.start()
    with pytest.raises(BridgeError, match="period"):
        run_bridge(sc, address, tmp_path / "r", timeout_s=20.0)
    th.join(30)
    assert [f[0] for f in got] == [1, 7], got  # HELLO, then ERROR
    assert got[1][1] == 4 and "period" in got[1][2]
