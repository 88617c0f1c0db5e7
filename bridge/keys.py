"""CurveZMQ keys for bridge sessions with peers that are not on this machine.

``hilrig keys DIR`` writes two certificate pairs with pyzmq's certificate helper: one for the
simulator and one for the runtime (``simulator.key`` / ``simulator.key_secret``,
``runtime.key`` / ``runtime.key_secret``). Give the simulator side the folder with its secret
and the runtime's public certificate; the runtime side its secret and the simulator's public
certificate. The simulator accepts only runtimes whose public key is in the folder; the runtime
accepts only a simulator holding the secret that matches ``simulator.key``.

References
----------
CurveZMQ, ZeroMQ RFC 26 (authentication and encryption); ZAP, ZeroMQ RFC 27.
"""
from __future__ import annotations

from pathlib import Path

import zmq
import zmq.auth

from .errors import BridgeError

SIM, RUNTIME = "simulator", "runtime"


def generate(folder: Path) -> list[Path]:
    """Write both certificate pairs into ``folder``; refuse to overwrite existing keys."""
    if not zmq.has("curve"):
        raise BridgeError("this libzmq has no CurveZMQ support; install pyzmq from PyPI (it ships one)")
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    existing = [folder / f"{n}.key{s}" for n in (SIM, RUNTIME) for s in ("", "_secret")
                if (folder / f"{n}.key{s}").exists()]
    if existing:
        raise FileExistsError(f"{existing[0]} exists; choose another folder (no key was overwritten)")
    out = []
    for name in (SIM, RUNTIME):
        pub, sec = zmq.auth.create_certificates(str(folder), name)
        Path(sec).chmod(0o600)
        out += [Path(pub), Path(sec)]
    return out


def _load(path: Path, secret: bool):
    if not path.exists():
        raise BridgeError(f"CurveZMQ key file {path} is missing (make keys with 'hilrig keys DIR')")
    try:
        pub, sec = zmq.auth.load_certificate(str(path))
    except (ValueError, OSError) as exc:
        raise BridgeError(f"CurveZMQ key file {path} is not readable: {exc}") from None
    if secret and sec is None:
        raise BridgeError(f"{path} holds no secret key")
    return pub, sec


def client_keys(folder: Path) -> tuple[bytes, bytes, bytes]:
    """(runtime public, runtime secret, simulator public) from a keys folder."""
    folder = Path(folder)
    pub, sec = _load(folder / f"{RUNTIME}.key_secret", secret=True)
    server_pub, _ = _load(folder / f"{SIM}.key", secret=False)
    return pub, sec, server_pub


def server_keys(folder: Path) -> tuple[bytes, bytes]:
    """(simulator public, simulator secret) from a keys folder."""
    return _load(Path(folder) / f"{SIM}.key_secret", secret=True)


def start_authenticator(ctx: zmq.Context, folder: Path):
    """Allow CurveZMQ clients whose public certificates (``*.key``) are in ``folder``."""
    from zmq.auth.thread import ThreadAuthenticator
    auth = ThreadAuthenticator(ctx)
    auth.start()
    auth.configure_curve(domain="*", location=str(folder))
    return auth
