"""Scaffolding shared by the bridge tests: the CLI command, the stand-in simulator started for
one session, a free UDP loopback address, and a context that always reaps the processes it is
given (also when an assertion inside it fails), so no test leaves a process behind."""
import socket
import subprocess
import sys
import threading
from contextlib import contextmanager

CLI = [sys.executable, "-m", "hilrig.runtime.cli"]


def serve(scen, address, *extra, env=None):
    """The stand-in simulator serving one session of ``scen`` on ``address`` (output piped)."""
    return subprocess.Popen(CLI + ["serve-sim", "--scenario", str(scen), "--bind", address,
                                   "--sessions", "1", "--idle-timeout", "120", *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def wait_listening(sim, timeout=120.0) -> str:
    """Read the stand-in's output up to its "listening on" line, which it prints once its
    socket is bound, so that a runtime started next finds it (a fixed sleep was not enough on a
    loaded machine: a free-running runtime's first frames went nowhere). Returns the lines
    read; fails after ``timeout`` seconds."""
    lines: list[str] = []

    def read():
        for line in sim.stdout:
            lines.append(line)
            if "listening on" in line:
                return

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    reader.join(timeout)
    assert lines and "listening on" in lines[-1], "".join(lines) or "the stand-in printed nothing"
    return "".join(lines)


@contextmanager
def reaped(*procs):
    """On the way out, kill whichever of ``procs`` still runs and collect its output."""
    try:
        yield
    finally:
        for pr in procs:
            if pr.poll() is None:
                pr.kill()
                pr.communicate(timeout=60)


def udp_address() -> str:
    """udp://127.0.0.1:<a port free now>."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as so:
        so.bind(("127.0.0.1", 0))
        return f"udp://127.0.0.1:{so.getsockname()[1]}"


def free_tcp_port() -> int:
    """A TCP port on 127.0.0.1 that is free now."""
    with socket.socket() as so:
        so.bind(("127.0.0.1", 0))
        return so.getsockname()[1]
