"""Transports for the bridge's frames. The protocol (bridge/protocol.py) does not depend on them.

ZeroMQ request/reply: the runtime is the requester (REQ) and the simulator the replier (REP).
In lockstep every tick is one request (the actuation) and one reply (the next sample), which is
exactly REQ/REP's strict alternation, so the pattern enforces the protocol's order of exchange.
Every blocking operation has a timeout; a requester that timed out is closed and not reused (a
REQ socket cannot send again before it has received).

Addresses: ``tcp://HOST:PORT`` or ``ipc:///path``. A tcp host must be loopback (127.0.0.0/8,
localhost, [::1]) unless the caller allows remote peers explicitly.
"""
from __future__ import annotations

import ipaddress
import re

import zmq

from .errors import BridgeError, TransportTimeout  # noqa: F401  (defined in errors.py)


def check_address(address: str, allow_remote: bool = False) -> str:
    """Validate a transport address; refuse a non-loopback tcp host unless allowed."""
    m = re.fullmatch(r"tcp://(\[[^\]]+\]|[^:/]+):(\d+|\*)", address)
    if address.startswith("ipc://") and len(address) > len("ipc://"):
        return address
    if not m:
        raise BridgeError(f"bridge address {address!r} is not tcp://HOST:PORT or ipc:///PATH")
    host = m.group(1).strip("[]")
    if host in ("localhost", "*") and host != "*":
        return address
    try:
        loop = ipaddress.ip_address(host).is_loopback
    except ValueError:
        loop = False
    if host == "*":
        loop = False
    if not loop and not allow_remote:
        raise BridgeError(f"bridge address {address!r} is not on this machine (loopback); a remote "
                          f"peer needs the explicit --allow-remote flag")
    return address


class ReqTransport:
    """The runtime's side: send a frame, wait for the reply frame (with a timeout)."""

    def __init__(self, address: str, timeout_s: float = 1.0, allow_remote: bool = False):
        self.address = check_address(address, allow_remote)
        self.timeout_ms = max(1, int(round(timeout_s * 1000)))
        self.ctx = zmq.Context.instance()
        self.sock = self.ctx.socket(zmq.REQ)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.setsockopt(zmq.RCVTIMEO, self.timeout_ms)
        self.sock.setsockopt(zmq.SNDTIMEO, self.timeout_ms)
        self.sock.setsockopt(zmq.MAXMSGSIZE, 1 << 20)
        self.sock.connect(self.address)
        self.closed = False

    def request(self, data: bytes) -> bytes:
        if self.closed:
            raise BridgeError("the bridge connection is closed")
        try:
            self.sock.send(data, copy=True)
            return self.sock.recv(copy=True)
        except zmq.Again:
            self.close()
            raise TransportTimeout(f"no reply from {self.address} within {self.timeout_ms} ms") from None

    def close(self) -> None:
        if not self.closed:
            self.sock.close(linger=0)
            self.closed = True


class RepTransport:
    """The simulator's side: receive a request, send exactly one reply."""

    def __init__(self, address: str, allow_remote: bool = False):
        self.address = check_address(address, allow_remote)
        self.ctx = zmq.Context.instance()
        self.sock = self.ctx.socket(zmq.REP)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.setsockopt(zmq.MAXMSGSIZE, 1 << 20)
        self.sock.bind(self.address)

    def recv(self, timeout_s: float | None = None) -> bytes | None:
        """The next request, or None when nothing came within ``timeout_s``."""
        if timeout_s is not None and not self.sock.poll(int(timeout_s * 1000), zmq.POLLIN):
            return None
        return self.sock.recv(copy=True)

    def send(self, data: bytes) -> None:
        self.sock.send(data, copy=True)

    def close(self) -> None:
        self.sock.close(linger=0)
