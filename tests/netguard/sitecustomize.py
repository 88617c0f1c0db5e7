"""Network guard for the test suite: no socket of a test, or of a process a test starts, may
reach or serve any address but this machine's loopback (127.0.0.0/8, ::1, localhost), ipc://,
inproc:// or a Unix socket.

tests/conftest.py puts this folder first on PYTHONPATH, so Python imports this module at the
start of every process the suite runs (``sitecustomize``), and imports it into the pytest
process itself. It wraps ``socket.socket.connect``/``connect_ex``/``bind``/``sendto``,
``socket.getaddrinfo`` for names other than localhost (a look-up would ask a name server), and
pyzmq's ``Socket.connect``/``bind``: any other address raises PermissionError before the
system call, so a test that expects hilrig to refuse a remote address can never send a packet
there, even if the refusal regresses.
"""
from __future__ import annotations

import builtins as _builtins
import ipaddress
import socket as _socket
import sys as _sys

_LOCAL_NAMES = {"localhost", "localhost.localdomain", "ip6-localhost", "ip6-loopback"}


def _host_ok(host) -> bool:
    if host is None:
        return True
    if isinstance(host, bytes):
        host = host.decode("ascii", "replace")
    host = str(host).strip("[]")
    if host.lower() in _LOCAL_NAMES:
        return True
    try:
        return ipaddress.ip_address(host.split("%", 1)[0]).is_loopback
    except ValueError:
        return False


def _refuse(what: str, where) -> None:
    raise PermissionError(f"test network guard: {what} {where!r} refused (tests use loopback, "
                          f"ipc:// or inproc:// only)")


def _check_sockaddr(sock, address, what: str) -> None:
    if sock.family in (_socket.AF_INET, _socket.AF_INET6) and isinstance(address, tuple):
        if not _host_ok(address[0]):
            _refuse(what, address)


def _wrap(name: str) -> None:
    orig = getattr(_socket.socket, name)

    def guarded(self, *args):
        address = args[-1] if name == "sendto" else args[0]
        _check_sockaddr(self, address, f"socket.{name}")
        return orig(self, *args)

    guarded.__name__ = name
    setattr(_socket.socket, name, guarded)


for _name in ("connect", "connect_ex", "bind", "sendto"):
    _wrap(_name)

_getaddrinfo = _socket.getaddrinfo


def _guarded_getaddrinfo(host, *args, **kwargs):
    if host not in (None, "", b"") and not _host_ok(host):
        try:
            ipaddress.ip_address(str(host).strip("[]").split("%", 1)[0])  # numeric: no look-up
        except ValueError:
            _refuse("name look-up of", host)
    return _getaddrinfo(host, *args, **kwargs)


_socket.getaddrinfo = _guarded_getaddrinfo


def _endpoint_ok(endpoint) -> bool:
    if isinstance(endpoint, bytes):
        endpoint = endpoint.decode("utf-8", "replace")
    scheme, _, rest = str(endpoint).partition("://")
    if scheme in ("ipc", "inproc"):
        return True
    if scheme not in ("tcp", "udp", "ws", "wss"):
        return False
    host = rest.rsplit(":", 1)[0] if ":" in rest else rest
    if ";" in host:  # tcp://source;destination: both must be local
        return all(_endpoint_ok(f"{scheme}://{part}:0") for part in host.split(";"))
    return _host_ok(host)


def _zmq_socket_class():
    """pyzmq's Python socket class once it is defined (its methods can be wrapped; the compiled
    base class's cannot), else None."""
    cls = getattr(_sys.modules.get("zmq.sugar.socket"), "Socket", None)
    return cls if cls is not None and "connect" in cls.__dict__ and "bind" in cls.__dict__ else None


def _guard_zmq() -> None:
    cls = _zmq_socket_class()
    for name in ("connect", "bind"):
        orig = getattr(cls, name)

        def guarded(self, addr, *args, _orig=orig, _name=name, **kwargs):
            if not _endpoint_ok(addr):
                _refuse(f"zmq {_name}", addr)
            return _orig(self, addr, *args, **kwargs)

        guarded.__name__ = name
        setattr(cls, name, guarded)


def _install_zmq_hook() -> None:
    """Wrap pyzmq's socket now, or at the first import statement after pyzmq has loaded."""
    builtins = _builtins
    if _zmq_socket_class() is not None:
        _guard_zmq()
        return
    real_import = builtins.__import__
    state = {"done": False}

    def hooked(name, *args, **kwargs):
        module = real_import(name, *args, **kwargs)
        if not state["done"] and _zmq_socket_class() is not None:
            state["done"] = True
            builtins.__import__ = real_import
            _guard_zmq()
        return module

    builtins.__import__ = hooked


_install_zmq_hook()
