"""Telemetry's command channel (stop, reset) is never open off this machine without CurveZMQ
keys, as the bridge's; with keys only a viewer holding them sees frames and sends commands.

Servers here bind loopback only. The refusal off loopback is checked on a TEST-NET-1 address
(192.0.2.1, RFC 5737 documentation range, from memory: no interface of this machine has it),
and the check comes before any bind.
"""
import subprocess
import sys
import time

import msgpack
import numpy as np
import pytest
import zmq

from hilrig.bridge.errors import BridgeError
from hilrig.bridge.keys import generate
from hilrig.runtime.live.telemetry import Telemetry, check_telemetry_address
from hilrig.runtime.live.watch import connect
from hilrig.safety.interlocks import LATCH_SIZE, InterlockTable
from tests.integration.test_live_view import _free_port

CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
REMOTE = "tcp://192.0.2.1:47820"
INFO = {"title": "keys (test data)", "mode": "sil", "demo_data": False, "caution": None,
        "n_total": 100, "Ts": 1e-4}


def _telemetry(address, keys):
    return Telemetry(address, info=INFO, names=["v_out", "interlock_word"], units=["V", "-"],
                     table=InterlockTable.build([], ["v_out"]), curve_keys=keys)


def test_telemetry_off_loopback_without_keys_is_refused_before_binding():
    with pytest.raises(BridgeError, match=r"telemetry at tcp://192\.0\.2\.1:47820, reachable from "
                                          r"other machines, takes commands \(stop, reset\) and "
                                          r"needs CurveZMQ keys"):
        check_telemetry_address(REMOTE, allow_remote=True)
    # the runtime's own publisher refuses the same way, before it binds anything
    with pytest.raises(BridgeError, match="needs CurveZMQ keys"):
        Telemetry(REMOTE, info=INFO, names=["v_out", "interlock_word"], units=["V", "-"],
                  table=InterlockTable.build([], ["v_out"]), allow_remote=True)
    # loopback and ipc need none
    assert check_telemetry_address("tcp://127.0.0.1:47820") and check_telemetry_address("ipc:///tmp/x")


def test_run_and_watch_off_loopback_without_keys_are_one_clear_error(tmp_path, demo_path):
    p = subprocess.run(CLI + ["run", demo_path, "--telemetry", REMOTE, "--allow-remote",
                              "--out", str(tmp_path / "r"), "--headless"],
                       capture_output=True, text=True, timeout=600)
    assert p.returncode == 2, p.stdout + p.stderr
    assert "needs CurveZMQ keys" in p.stdout and "--telemetry-keys DIR" in p.stdout
    assert "Traceback" not in p.stdout + p.stderr and not (tmp_path / "r").exists()
    p = subprocess.run(CLI + ["watch", REMOTE, "--allow-remote", "--plain", "--give-up", "2"],
                       capture_output=True, text=True, timeout=120)
    assert p.returncode == 2 and "needs CurveZMQ keys" in p.stdout, p.stdout + p.stderr


def _frames(sub, tel, latch, evlog, evn, seconds=3.0):
    got = []
    end = time.monotonic() + seconds
    while time.monotonic() < end and not got:
        tel.publish(latch, evlog, evn, force=True)
        if sub.poll(50):
            got.append(msgpack.unpackb(sub.recv(), raw=False))
    return got


def _commands(push, tel, seconds=3.0):
    try:
        push.send(b"reset", zmq.NOBLOCK)
    except zmq.Again:
        pass
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        c = tel.commands()
        if c:
            return c
        time.sleep(0.02)
    return []


def test_with_keys_only_a_key_holder_views_and_commands(tmp_path):
    keys, other = tmp_path / "keys", tmp_path / "other"
    generate(keys)
    generate(other)
    address = f"tcp://127.0.0.1:{_free_port()}"
    latch, evlog, evn = np.zeros(LATCH_SIZE), np.zeros((8, 4)), np.zeros(1)
    tel = _telemetry(address, keys)
    socks = []
    try:
        # a viewer without keys, and one with another folder's keys: no frame, no command
        for folder in (None, other):
            sub, push = connect(address, folder)
            socks += [sub, push]
            assert _frames(sub, tel, latch, evlog, evn, 1.5) == []
            assert _commands(push, tel, 1.5) == []
        # the key holder sees the frames and its reset arrives
        sub, push = connect(address, keys)
        socks += [sub, push]
        got = _frames(sub, tel, latch, evlog, evn)
        assert got and got[0]["title"] == "keys (test data)"
        assert _commands(push, tel) == ["reset"]
    finally:
        for s in socks:
            s.close(0)
        tel.close()
