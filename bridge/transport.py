"""Transports for the bridge's frames. The protocol (bridge/protocol.py) does not depend on them.

Datagrams (UDP): one frame per datagram, the same order of exchange as ZeroMQ request/reply.
Loss is the protocol's business: the requester resends its last frame after a timeout (up to a
number of retries) and the simulator answers a repeated frame with its last reply, without
advancing; a late duplicate reply is recognised by its sequence number and dropped.

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
import select
import socket
from typing import Callable

import zmq

from .errors import BridgeError, TransportTimeout  # noqa: F401  (defined in errors.py)
from .protocol import MAX_FRAME_BYTES

#: the longest ZeroMQ message hilrig's sockets read (ZMQ_MAXMSGSIZE). Not a second frame cap:
#: every frame over MAX_FRAME_BYTES is rejected as oversize; reading up to this much lets the
#: rejection name the frame's true length. A longer message makes ZeroMQ drop the connection
#: (the receiver then sees silence). docs/protocol.md section 13.
READ_LIMIT_BYTES = 16 * MAX_FRAME_BYTES


def check_address(address: str, allow_remote: bool = False) -> str:
    """Validate a transport address; refuse a non-loopback host unless allowed."""
    m = re.fullmatch(r"(?:tcp|udp)://(\[[^\]]+\]|[^:/]+):(\d+|\*)", address)
    if address.startswith("ipc://") and len(address) > len("ipc://"):
        return address
    if not m:
        raise BridgeError(f"bridge address {address!r} is not tcp://HOST:PORT, udp://HOST:PORT "
                          f"or ipc:///PATH")
    host = m.group(1).strip("[]")
    if host == "localhost":
        return address
    try:
        loop = ipaddress.ip_address(host).is_loopback
    except ValueError:  # a host name or "*" (every interface): not loopback
        loop = False
    if not loop and not allow_remote:
        raise BridgeError(f"bridge address {address!r} is not on this machine (loopback); a remote "
                          f"peer needs the explicit --allow-remote flag")
    return address


def _is_loopback(address: str) -> bool:
    try:
        check_address(address, allow_remote=False)
        return True
    except BridgeError:
        return False


_HANDSHAKE_FAILED = (zmq.EVENT_HANDSHAKE_FAILED_AUTH | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL
                     | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL)


def _context(own: bool) -> zmq.Context:
    """A context of the transport's own for a CurveZMQ side, else the process-wide one.

    Why a CurveZMQ side owns one: ZeroMQ frees an inproc name only some time after the socket
    that bound it is closed, so with a shared context a new authenticator, started right after
    an old one stopped, found "inproc://zeromq.zap.01" still taken (seen in CI; in a loop of
    300 start/stop pairs about half failed), and two authenticated servers could not live in
    one process at all. The handshake monitor of a CurveZMQ client binds an inproc name made
    from its socket's file descriptor, which the system hands out again after a close. A
    context of its own starts with no names taken; :func:`_release` ends it on close.
    """
    return zmq.Context() if own else zmq.Context.instance()


def _release(ctx: zmq.Context, own: bool) -> None:
    if own and not ctx.closed:
        ctx.destroy(linger=0)


class ReqTransport:
    """The runtime's side: send a frame, wait for the reply frame (with a timeout).

    With ``curve_keys`` (a folder made by ``hilrig keys``) the connection is authenticated and
    encrypted with CurveZMQ; a ZeroMQ peer that is not on this machine requires it.
    """

    def __init__(self, address: str, timeout_s: float = 1.0, allow_remote: bool = False,
                 curve_keys=None):
        self.address = check_address(address, allow_remote)
        if curve_keys is None and not _is_loopback(address) and not address.startswith("ipc://"):
            raise BridgeError(f"a ZeroMQ peer that is not on this machine ({address}) needs "
                              f"CurveZMQ keys: make them with 'hilrig keys DIR' and pass --curve-keys DIR")
        self.timeout_ms = max(1, int(round(timeout_s * 1000)))
        self.own_ctx = curve_keys is not None  # the monitor's inproc name: see _context
        self.ctx = _context(self.own_ctx)
        self.sock = self.ctx.socket(zmq.REQ)
        self.monitor = None
        self.closed = False
        try:
            if curve_keys is not None:
                from .keys import client_keys
                pub, sec, server_pub = client_keys(curve_keys)
                self.sock.curve_publickey, self.sock.curve_secretkey = pub, sec
                self.sock.curve_serverkey = server_pub
                self.monitor = self.sock.get_monitor_socket(_HANDSHAKE_FAILED)
            self.sock.setsockopt(zmq.LINGER, 0)
            self.sock.setsockopt(zmq.RCVTIMEO, self.timeout_ms)
            self.sock.setsockopt(zmq.SNDTIMEO, self.timeout_ms)
            self.sock.setsockopt(zmq.MAXMSGSIZE, READ_LIMIT_BYTES)
            self.sock.connect(self.address)
        except BaseException:
            self.close()
            raise

    def request(self, data: bytes) -> bytes:
        if self.closed:
            raise BridgeError("the bridge connection is closed")
        try:
            self.sock.send(data, copy=True)
            return self.sock.recv(copy=True)
        except zmq.Again:
            why = self._handshake_failure()
            self.close()
            if why:
                raise BridgeError(f"{self.address} refused the CurveZMQ handshake ({why}): the "
                                  f"simulator does not accept this runtime's key, or its key is "
                                  f"not the one in the keys folder") from None
            raise TransportTimeout(f"no reply from {self.address} within {self.timeout_ms} ms") from None

    def resume(self) -> bytes:
        """Keep waiting for the reply to a request that went out already (by the compiled
        lockstep path, on this socket's handle)."""
        if self.closed:
            raise BridgeError("the bridge connection is closed")
        try:
            return self.sock.recv(copy=True)
        except zmq.Again:
            self.close()
            raise TransportTimeout(f"no reply from {self.address} within {self.timeout_ms} ms") from None

    def set_timeout(self, timeout_s: float) -> None:
        """The reply timeout from now on (the session's staleness limit after the handshake)."""
        self.timeout_ms = max(1, int(round(timeout_s * 1000)))
        self.sock.setsockopt(zmq.RCVTIMEO, self.timeout_ms)
        self.sock.setsockopt(zmq.SNDTIMEO, self.timeout_ms)

    def _handshake_failure(self) -> str | None:
        if self.monitor is None:
            return None
        from zmq.utils.monitor import recv_monitor_message
        while self.monitor.poll(0):
            ev = recv_monitor_message(self.monitor)
            if ev["event"] & _HANDSHAKE_FAILED:
                return zmq.Event(ev["event"]).name.lower()
        return None

    def close(self) -> None:
        if not self.closed:
            if self.monitor is not None:
                self.sock.disable_monitor()
                self.monitor.close(linger=0)
            self.sock.close(linger=0)
            _release(self.ctx, self.own_ctx)
            self.closed = True


class RepTransport:
    """The simulator's side: receive a request, send exactly one reply.

    With ``curve_keys`` only runtimes whose public certificate is in that folder get through.
    """

    def __init__(self, address: str, allow_remote: bool = False, curve_keys=None):
        self.address = check_address(address, allow_remote)
        if curve_keys is None and not _is_loopback(address) and not address.startswith("ipc://"):
            raise BridgeError(f"binding ZeroMQ to {address}, reachable from other machines, needs "
                              f"CurveZMQ keys: make them with 'hilrig keys DIR' and pass --curve-keys DIR")
        self.own_ctx = curve_keys is not None
        self.ctx = _context(self.own_ctx)
        self.auth = None
        self.sock = self.ctx.socket(zmq.REP)
        try:
            if curve_keys is not None:
                from .keys import server_keys, start_authenticator
                pub, sec = server_keys(curve_keys)
                self.auth = start_authenticator(self.ctx, curve_keys)
                self.sock.curve_server = True
                self.sock.curve_publickey, self.sock.curve_secretkey = pub, sec
            self.sock.setsockopt(zmq.LINGER, 0)
            self.sock.setsockopt(zmq.MAXMSGSIZE, READ_LIMIT_BYTES)
            self.sock.bind(self.address)
        except BaseException:
            self.close()
            raise

    def recv(self, timeout_s: float | None = None) -> bytes | None:
        """The next request, or None when nothing came within ``timeout_s``."""
        # poll first, also without a timeout: the compiled serving loop sets RCVTIMEO
        if not self.sock.poll(None if timeout_s is None else int(timeout_s * 1000), zmq.POLLIN):
            return None
        return self.sock.recv(copy=True)

    def send(self, data: bytes) -> None:
        self.sock.send(data, copy=True)

    def close(self) -> None:
        self.sock.close(linger=0)
        if self.auth is not None:
            self.auth.stop()
            self.auth = None
        _release(self.ctx, self.own_ctx)


def _udp_endpoint(address: str) -> tuple[int, tuple]:
    m = re.fullmatch(r"udp://(\[[^\]]+\]|[^:/]+):(\d+)", address)
    if not m:
        raise BridgeError(f"bridge address {address!r} is not udp://HOST:PORT")
    host, port = m.group(1).strip("[]"), int(m.group(2))
    try:
        info = socket.getaddrinfo(host, port, type=socket.SOCK_DGRAM)[0]
    except socket.gaierror as exc:
        raise BridgeError(f"bridge address {address!r}: {exc}") from None
    return info[0], info[4]


#: largest UDP payload (IPv4: 65535 - 8 UDP - 20 IP header bytes)
MAX_DATAGRAM = 65507


class UdpClient:
    """The runtime's side over UDP: send a frame, wait for the reply, resend on timeout."""

    def __init__(self, address: str, timeout_s: float = 0.05, retries: int = 20,
                 allow_remote: bool = False):
        self.address = check_address(address, allow_remote)
        family, self.peer = _udp_endpoint(address)
        self.sock = socket.socket(family, socket.SOCK_DGRAM)
        self.sock.connect(self.peer)
        self.timeout_s = timeout_s
        self.retries = retries
        self.resent = 0
        self.stale = 0
        self.closed = False

    def request(self, data: bytes, accept: Callable[[bytes], bool] | None = None,
                resend: bool | None = None) -> bytes:
        """Send ``data`` and return the first reply that ``accept`` takes (default: any).

        ``resend``: ``data`` went out already (by the compiled lockstep path) and its first try
        timed out (True: go on with the second try) or was cut short (False: wait out the first
        try again, without sending)."""
        if self.closed:
            raise BridgeError("the bridge connection is closed")
        first = 1 if resend else 0
        for attempt in range(first, self.retries + 1):
            if attempt:
                self.resent += 1
            try:
                if resend is False and attempt == 0:
                    pass  # sent already: keep waiting
                else:
                    self.sock.send(data)
            except OSError as exc:  # e.g. ICMP port unreachable reported on a connected socket
                if attempt == self.retries:
                    raise TransportTimeout(f"{self.address}: {exc}") from None
                continue
            while True:
                ready, _, _ = select.select([self.sock], [], [], self.timeout_s)
                if not ready:
                    break
                try:
                    reply = self.sock.recv(MAX_DATAGRAM)
                except OSError:
                    break
                if accept is None or accept(reply):
                    return reply
                self.stale += 1  # dropped (the caller counts it by kind), keep waiting
        self.close()
        raise TransportTimeout(f"no reply from {self.address} after {self.retries + 1} tries "
                               f"{self.timeout_s * 1e3:g} ms apart")

    def set_timeout(self, timeout_s: float) -> None:
        """The total wait for a reply from now on, split into at least 4 tries of at most 50 ms."""
        self.timeout_s = min(0.05, timeout_s / 4)
        self.retries = max(1, int(round(timeout_s / self.timeout_s))) - 1

    def send(self, data: bytes) -> None:
        """Free-running: send without waiting for an answer."""
        try:
            self.sock.send(data)
        except OSError as exc:  # e.g. the peer's port is closed (ICMP unreachable)
            raise TransportTimeout(f"{self.address}: {exc}") from None

    def recv(self, timeout_s: float | None = None) -> bytes | None:
        """Free-running: the next datagram, or None after ``timeout_s``."""
        ready, _, _ = select.select([self.sock], [], [], timeout_s)
        if not ready:
            return None
        try:
            return self.sock.recv(MAX_DATAGRAM)
        except OSError:
            return None

    def close(self) -> None:
        if not self.closed:
            self.sock.close()
            self.closed = True


class UdpServer:
    """The simulator's side over UDP: receive a request, answer its sender."""

    def __init__(self, address: str, allow_remote: bool = False):
        self.address = check_address(address, allow_remote)
        family, endpoint = _udp_endpoint(address)
        self.sock = socket.socket(family, socket.SOCK_DGRAM)
        self.sock.bind(endpoint)
        self.peer = None

    def recv(self, timeout_s: float | None = None) -> bytes | None:
        ready, _, _ = select.select([self.sock], [], [], timeout_s)
        if not ready:
            return None
        data, self.peer = self.sock.recvfrom(MAX_DATAGRAM)
        return data

    def send(self, data: bytes) -> None:
        if self.peer is not None:
            self.sock.sendto(data, self.peer)

    def close(self) -> None:
        self.sock.close()


class PairTransport:
    """Free-running over ZeroMQ: an exclusive pair, both sides send when they have something.

    The simulator binds, the runtime connects. A tcp address that is not loopback needs
    ``allow_remote`` and ``curve_keys`` (a folder made by ``hilrig keys``), as in lockstep: with
    keys the connection is authenticated and encrypted with CurveZMQ, the simulator's side
    admits only runtimes whose public certificate is in its folder, and the runtime's side only
    a simulator holding the secret of ``simulator.key``.

    Until the first frame has arrived, the runtime's side watches the connection's handshake
    (a ZeroMQ monitor socket): a refused CurveZMQ handshake ends the wait at once with a
    :class:`BridgeError` that says so, instead of a silent timeout. The monitor is closed once a
    frame has come, so the per-tick path is a plain poll and receive.
    """

    def __init__(self, address: str, bind: bool, allow_remote: bool = False, curve_keys=None):
        self.address = check_address(address, allow_remote)
        if curve_keys is None and not _is_loopback(address) and not address.startswith("ipc://"):
            side = "binding the free-running pair to" if bind else "a free-running ZeroMQ peer at"
            raise BridgeError(f"{side} {address}, reachable from other machines, needs CurveZMQ "
                              f"keys: make them with 'hilrig keys DIR' and pass --curve-keys DIR")
        self.own_ctx = curve_keys is not None  # also for the monitor's inproc name
        self.ctx = _context(self.own_ctx)
        self.sock = self.ctx.socket(zmq.PAIR)
        self.auth = None
        self.monitor = None
        self.curve = curve_keys is not None
        self.closed = False
        try:
            if curve_keys is not None:
                if bind:
                    from .keys import server_keys, start_authenticator
                    pub, sec = server_keys(curve_keys)
                    self.auth = start_authenticator(self.ctx, curve_keys)
                    self.sock.curve_server = True
                    self.sock.curve_publickey, self.sock.curve_secretkey = pub, sec
                else:
                    from .keys import client_keys
                    pub, sec, server_pub = client_keys(curve_keys)
                    self.sock.curve_publickey, self.sock.curve_secretkey = pub, sec
                    self.sock.curve_serverkey = server_pub
                    self.monitor = self.sock.get_monitor_socket(_HANDSHAKE_FAILED)
            self.sock.setsockopt(zmq.LINGER, 0)
            self.sock.setsockopt(zmq.MAXMSGSIZE, READ_LIMIT_BYTES)
            self.sock.setsockopt(zmq.SNDHWM, 1000)
            (self.sock.bind if bind else self.sock.connect)(self.address)
        except BaseException:
            self.close()
            raise

    def send(self, data: bytes) -> None:
        try:
            self.sock.send(data, flags=zmq.NOBLOCK)
        except zmq.Again:
            if self.monitor is not None:
                # before the first frame: a refused handshake also drops the connection, and
                # on a loaded machine the send can fail before the monitor's event is read
                why = self._handshake_failure(wait_ms=1000)
                if why:
                    self._refused(why)
            raise TransportTimeout(f"{self.address}: the peer is not taking frames") from None

    def recv(self, timeout_s: float | None = None) -> bytes | None:
        ms = None if timeout_s is None else max(0, int(timeout_s * 1000))
        if self.monitor is not None:
            return self._first_recv(ms)
        if not self.sock.poll(ms, zmq.POLLIN):
            return None
        return self.sock.recv(copy=True)

    def _first_recv(self, ms: int | None) -> bytes | None:
        """recv() until the first frame: wait on the socket and on its handshake events."""
        import time
        poller = zmq.Poller()
        poller.register(self.sock, zmq.POLLIN)
        poller.register(self.monitor, zmq.POLLIN)
        deadline = None if ms is None else time.monotonic() + ms / 1000.0
        while True:
            left = None if deadline is None else max(0, int((deadline - time.monotonic()) * 1000))
            ready = dict(poller.poll(left))
            if self.sock in ready:
                self._stop_monitor()  # the handshake is done: the per-tick path needs no monitor
                return self.sock.recv(copy=True)
            if self.monitor in ready:
                why = self._handshake_failure()
                if why:
                    self._refused(why)
            if deadline is not None and time.monotonic() >= deadline:
                return None

    def _refused(self, why: str):
        """Close, and raise the BridgeError that names a refused handshake's cause."""
        self.close()
        if why == "handshake_failed_auth":
            hint = ("the simulator does not accept this runtime's key (its keys folder has no "
                    "matching runtime.key)")
        else:
            hint = ("the simulator's key is not the simulator.key in this keys folder, or the "
                    "simulator does not use CurveZMQ")
        raise BridgeError(f"{self.address} refused the CurveZMQ handshake ({why}): {hint}")

    def _handshake_failure(self, wait_ms: int = 0) -> str | None:
        """The name of a handshake failure the monitor reported, or None; waits up to wait_ms
        for the first event."""
        from zmq.utils.monitor import recv_monitor_message
        if self.monitor is not None and wait_ms:
            self.monitor.poll(wait_ms)
        while self.monitor is not None and self.monitor.poll(0):
            ev = recv_monitor_message(self.monitor)
            if ev["event"] & _HANDSHAKE_FAILED:
                return zmq.Event(ev["event"]).name.lower()
        return None

    def _stop_monitor(self) -> None:
        if self.monitor is not None:
            self.sock.disable_monitor()
            self.monitor.close(linger=0)
            self.monitor = None

    def close(self) -> None:
        if not self.closed:
            self._stop_monitor()
            self.sock.close(linger=0)
            if self.auth is not None:
                self.auth.stop()
                self.auth = None
            _release(self.ctx, self.own_ctx)
            self.closed = True


def free_running_link(address: str, bind: bool, allow_remote: bool = False, curve_keys=None):
    """A transport for free-running: UDP for udp://, a ZeroMQ pair otherwise (with CurveZMQ
    when ``curve_keys`` is given; see :class:`PairTransport`)."""
    if address.startswith("udp://"):
        if curve_keys is not None:
            raise BridgeError("--curve-keys applies to ZeroMQ addresses (tcp://, ipc://), not udp://")
        return (UdpServer(address, allow_remote=allow_remote) if bind
                else UdpClient(address, allow_remote=allow_remote))
    return PairTransport(address, bind, allow_remote=allow_remote, curve_keys=curve_keys)


def client_for(address: str, timeout_s: float, allow_remote: bool = False, curve_keys=None):
    """The runtime's transport for an address: UDP for udp://, ZeroMQ request/reply otherwise."""
    if address.startswith("udp://"):
        if curve_keys is not None:
            raise BridgeError("--curve-keys applies to ZeroMQ addresses (tcp://, ipc://), not udp://")
        # a datagram transport retries instead of waiting long: the timeout is split into tries
        return UdpClient(address, timeout_s=min(0.05, timeout_s), retries=max(1, int(timeout_s / 0.05)),
                         allow_remote=allow_remote)
    return ReqTransport(address, timeout_s=timeout_s, allow_remote=allow_remote,
                        curve_keys=curve_keys)


def server_for(address: str, allow_remote: bool = False, curve_keys=None):
    """The simulator's transport for an address."""
    if address.startswith("udp://"):
        if curve_keys is not None:
            raise BridgeError("--curve-keys applies to ZeroMQ addresses (tcp://, ipc://), not udp://")
        return UdpServer(address, allow_remote=allow_remote)
    return RepTransport(address, allow_remote=allow_remote, curve_keys=curve_keys)
