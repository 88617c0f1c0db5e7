"""The suite's network guard (tests/netguard/sitecustomize.py) holds in this process and in the
processes tests start: an address off loopback is refused before any packet leaves, and
loopback, ipc and Unix sockets work. (Loopback only, common practice for tests, no source.)"""
import socket
import subprocess
import sys

import pytest
import zmq

# a documentation address (RFC 5737 TEST-NET-1, from memory): the guard refuses it before the
# system call, so nothing is sent
OFF = "192.0.2.1"


def test_sockets_off_loopback_are_refused_here():
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        with pytest.raises(PermissionError, match="test network guard"):
            s.sendto(b"x", (OFF, 9))
        with pytest.raises(PermissionError):
            s.bind(("0.0.0.0", 0))
        s.bind(("127.0.0.1", 0))
    with pytest.raises(PermissionError):
        socket.getaddrinfo("example.invalid", 80)
    ctx = zmq.Context.instance()
    so = ctx.socket(zmq.REQ)
    try:
        with pytest.raises(PermissionError):
            so.connect(f"tcp://{OFF}:47800")
        with pytest.raises(PermissionError):
            so.bind("tcp://*:47800")
        so.connect("tcp://127.0.0.1:47800")
    finally:
        so.close(linger=0)


def test_a_child_process_is_guarded_too():
    code = ("import socket, zmq\n"
            "s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)\n"
            "try:\n"
            f"    s.connect(('{OFF}', 9))\n"
            "except PermissionError as e:\n"
            "    print('refused', e)\n"
            "z = zmq.Context.instance().socket(zmq.PAIR)\n"
            "try:\n"
            f"    z.connect('tcp://{OFF}:9')\n"
            "except PermissionError:\n"
            "    print('zmq refused')\n"
            "z.close(linger=0)\n")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert "refused" in p.stdout and "zmq refused" in p.stdout, p.stdout + p.stderr
