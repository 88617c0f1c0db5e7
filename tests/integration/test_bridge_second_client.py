"""serve-sim with a session in progress: a second client's HELLO is refused with ERROR (code 6)
and counted, the session goes on untouched; an undecodable datagram is never answered; rejected
frames are counted by reason and logged. Loopback and ipc only; every wait is bounded."""
import json
import socket
import subprocess
import time
from pathlib import Path

import msgpack
import pytest
import zmq

from hilrig.bridge import protocol as P
from hilrig.bridge.session import signal_maps
from hilrig.runtime.scenario import load_scenario
from tests.integration.standin import CLI, reaped, serve, udp_address, wait_listening


def _scenario(tmp_path, demo_path, duration="3 s"):
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', f'duration = "{duration}"')
    path = tmp_path / "short.toml"
    path.write_text(text)
    return path


def _hello(scen) -> bytes:
    sc = load_scenario(scen)
    meas, act = signal_maps(sc)
    return P.encode(P.Hello(P.PROTOCOL_VERSION, sc.Ts, "lockstep", meas, act,
                            P.map_hash(meas, act)))


def _second_hello_zmq(address: str, hello: bytes):
    ctx = zmq.Context.instance()
    s = ctx.socket(zmq.REQ)
    s.setsockopt(zmq.LINGER, 0)
    s.connect(address)
    try:
        s.send(hello)
        return msgpack.unpackb(s.recv(), raw=False) if s.poll(30_000) else None
    finally:
        s.close()


def _second_hello_udp(address: str, hello: bytes):
    host, port = address[len("udp://"):].rsplit(":", 1)
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        s.settimeout(5.0)
        s.sendto(hello, (host, int(port)))
        return msgpack.unpackb(s.recv(70000), raw=False)


@pytest.mark.parametrize("transport", ["ipc", "udp"])
def test_a_second_hello_mid_run_is_refused_and_the_run_completes(tmp_path, demo_path, transport):
    scen = _scenario(tmp_path, demo_path)
    address = f"ipc://{tmp_path}/sim.sock" if transport == "ipc" else udp_address()
    sim = serve(scen, address)
    with reaped(sim):
        wait_listening(sim)
        run = subprocess.Popen(CLI + ["run", str(scen), "--bridge", address, "--out",
                                      str(tmp_path / "r"), "--headless", "--timeout", "30"],
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        with reaped(run):
            deadline = time.monotonic() + 300
            while not (tmp_path / "r" / "recording.h5").exists() and time.monotonic() < deadline:
                time.sleep(0.05)
            assert run.poll() is None, "the run ended before the second client came"
            ask = _second_hello_zmq if transport == "ipc" else _second_hello_udp
            answer = ask(address, _hello(scen))
            out, err = run.communicate(timeout=600)
        sim_out, _ = sim.communicate(timeout=120)
    assert answer is not None and answer[0] == 7 and answer[1] == 6, answer  # ERROR unexpected
    assert "session is in progress" in answer[2]
    assert run.returncode == 0, out + err
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert s["outcome"]["status"] == "completed"
    assert "refused a HELLO: a session is in progress" in sim_out
    assert "rejected frames: 1 (unexpected 1)" in sim_out
    assert f"session 1 ended after {s['ticks_run']} ticks" in sim_out


def test_an_undecodable_datagram_is_counted_and_never_answered(tmp_path, demo_path):
    scen = _scenario(tmp_path, demo_path, "40 ms")
    address = udp_address()
    host, port = address[len("udp://"):].rsplit(":", 1)
    sim = serve(scen, address)
    with reaped(sim):
        wait_listening(sim)
        with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
            s.settimeout(1.0)
            s.sendto(b"\x94", (host, int(port)))         # a 4-array cut after its first byte
            s.sendto(b"\xc1", (host, int(port)))         # never valid msgpack
            with pytest.raises(socket.timeout):
                s.recv(70000)
            # still serving: a valid HELLO gets its WELCOME, then the session ends
            s.sendto(_hello(scen), (host, int(port)))
            assert msgpack.unpackb(s.recv(70000), raw=False)[0] == 2
            s.sendto(P.encode(P.Stop("done")), (host, int(port)))
            assert msgpack.unpackb(s.recv(70000), raw=False)[0] == 6
        sim_out, _ = sim.communicate(timeout=120)
    assert "rejected a frame (truncated)" in sim_out and "rejected a frame (malformed)" in sim_out
    assert "rejected frames: 2 (malformed 1, truncated 1)" in sim_out
