"""The free-running ZeroMQ pair (bridge/transport.py PairTransport) with CurveZMQ keys: the same
rules as lockstep's request/reply. Loopback ports only; every wait is bounded.

Sources: CurveZMQ, ZeroMQ RFC 26 (a CURVE connection is authenticated and its messages are
encrypted, so no message payload travels in clear); ZAP, ZeroMQ RFC 27 (the server's handler
admits or refuses a client by its public key)."""
import select
import shutil
import socket
import threading

import pytest

from hilrig.bridge.errors import BridgeError
from hilrig.bridge.keys import generate
from hilrig.bridge.transport import PairTransport, free_running_link

MARKER = b"free-running-marker-0123456789"


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def keys(tmp_path_factory):
    """A good keys folder, and two folders that each hold one wrong key."""
    tmp = tmp_path_factory.mktemp("pair_keys")
    good, other = tmp / "good", tmp / "other"
    generate(good)
    generate(other)
    wrong_runtime, wrong_sim = tmp / "wrong_runtime", tmp / "wrong_sim"
    for folder, rt, sim in ((wrong_runtime, other, good), (wrong_sim, good, other)):
        folder.mkdir()
        for f in ("runtime.key", "runtime.key_secret"):
            shutil.copy(rt / f, folder / f)
        shutil.copy(sim / "simulator.key", folder / "simulator.key")
    return {"good": good, "wrong_runtime": wrong_runtime, "wrong_sim": wrong_sim}


class _Relay:
    """A loopback TCP relay that keeps a copy of every byte it passes on (both directions)."""

    def __init__(self, target_port: int):
        self.lsock = socket.socket()
        self.lsock.bind(("127.0.0.1", 0))
        self.lsock.listen(1)
        self.port = self.lsock.getsockname()[1]
        self.target = target_port
        self.seen = bytearray()
        self.done = threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        ready, _, _ = select.select([self.lsock], [], [], 10.0)
        if not ready:
            return
        a, _ = self.lsock.accept()
        b = socket.create_connection(("127.0.0.1", self.target), timeout=10.0)
        peer = {a: b, b: a}
        try:
            while not self.done.is_set():
                ready, _, _ = select.select([a, b], [], [], 0.05)
                for s in ready:
                    data = s.recv(65536)
                    if not data:
                        return
                    self.seen += data
                    peer[s].sendall(data)
        except OSError:
            return
        finally:
            a.close()
            b.close()

    def close(self):
        self.done.set()
        self.thread.join(timeout=10.0)
        self.lsock.close()


def _exchange_through_relay(server_keys, client_keys) -> bytes:
    """One frame each way between a bound and a connected pair through the relay; the bytes
    that crossed the wire."""
    port = _port()
    server = PairTransport(f"tcp://127.0.0.1:{port}", bind=True, curve_keys=server_keys)
    relay = _Relay(port)
    client = PairTransport(f"tcp://127.0.0.1:{relay.port}", bind=False, curve_keys=client_keys)
    try:
        client.send(b"to the simulator: " + MARKER)
        assert server.recv(10.0) == b"to the simulator: " + MARKER
        server.send(b"to the runtime: " + MARKER)
        assert client.recv(10.0) == b"to the runtime: " + MARKER
    finally:
        client.close()
        server.close()
        relay.close()
    return bytes(relay.seen)


def test_without_keys_the_relay_sees_the_frames_in_clear():
    # the control for the test below: the relay does capture the traffic
    wire = _exchange_through_relay(None, None)
    assert wire.count(MARKER) == 2


def test_with_keys_the_pair_works_and_nothing_crosses_in_clear(keys):
    """RFC 26: after the CURVE handshake every message is a MESSAGE command whose payload is
    encrypted; the marker must not appear anywhere on the wire."""
    wire = _exchange_through_relay(keys["good"], keys["good"])
    assert len(wire) > 2 * len(MARKER)  # the frames did cross this relay
    assert MARKER not in wire
    assert b"CURVE" in wire  # the ZMTP greeting names the security mechanism (RFC 23, RFC 26)


@pytest.mark.parametrize("which, says", [
    ("wrong_runtime", "does not accept this runtime's key"),
    ("wrong_sim", "simulator's key is not the simulator.key"),
])
def test_a_wrong_key_is_refused_with_a_clear_message_not_a_timeout(keys, which, says):
    """A runtime whose key the simulator does not hold (ZAP refuses it, RFC 27), or that holds
    the wrong simulator key: the wait for the first frame ends with a BridgeError naming the
    failed CurveZMQ handshake. The wait allowed (60 s) is far longer than any test here: a
    timeout would return None instead of raising."""
    port = _port()
    server = PairTransport(f"tcp://127.0.0.1:{port}", bind=True, curve_keys=keys["good"])
    client = PairTransport(f"tcp://127.0.0.1:{port}", bind=False, curve_keys=keys[which])
    try:
        client.send(b"hello")
        with pytest.raises(BridgeError, match="refused the CurveZMQ handshake") as err:
            client.recv(60.0)
        assert says in str(err.value)
        assert client.closed
        # nothing got through to the simulator, and the refused runtime did not take the
        # pair's one connection: the right runtime gets in afterwards
        assert server.recv(0.2) is None
        good = PairTransport(f"tcp://127.0.0.1:{port}", bind=False, curve_keys=keys["good"])
        try:
            good.send(b"hello")
            assert server.recv(10.0) == b"hello"
            server.send(b"welcome")
            assert good.recv(10.0) == b"welcome"
            assert good.monitor is None  # the handshake watch ends with the first frame
        finally:
            good.close()
    finally:
        client.close()
        server.close()


def test_remote_addresses_need_the_flag_and_keys(keys):
    """As lockstep's request/reply: a non-loopback tcp address needs --allow-remote, then
    CurveZMQ keys; nothing is bound or connected before those checks pass."""
    for bind in (False, True):
        addr = "tcp://0.0.0.0:47811" if bind else "tcp://192.0.2.1:47811"
        with pytest.raises(BridgeError, match="--allow-remote"):
            free_running_link(addr, bind=bind)
        with pytest.raises(BridgeError, match="needs CurveZMQ keys"):
            free_running_link(addr, bind=bind, allow_remote=True)
    # a connecting pair with keys and the flag passes every check and goes on to connect: the
    # suite's network guard (tests/netguard) stops that connect before a packet leaves (tests
    # use loopback only)
    with pytest.raises(PermissionError, match="test network guard: zmq connect"):
        free_running_link("tcp://192.0.2.1:47811", bind=False, allow_remote=True,
                          curve_keys=keys["good"])
    # loopback needs neither; CurveZMQ is a ZeroMQ mechanism, so udp:// refuses keys
    free_running_link(f"tcp://127.0.0.1:{_port()}", bind=False).close()
    with pytest.raises(BridgeError, match="not udp://"):
        free_running_link("udp://127.0.0.1:47811", bind=False, curve_keys=keys["good"])


def test_a_missing_key_file_is_a_clear_error_and_nothing_is_left_open(tmp_path, keys):
    empty = tmp_path / "empty"
    empty.mkdir()
    port = _port()
    with pytest.raises(BridgeError, match="simulator.key_secret is missing"):
        PairTransport(f"tcp://127.0.0.1:{port}", bind=True, curve_keys=empty)
    with pytest.raises(BridgeError, match="runtime.key_secret is missing"):
        PairTransport(f"tcp://127.0.0.1:{port}", bind=False, curve_keys=empty)
    # lockstep's sides, the same way
    from hilrig.bridge.transport import RepTransport, ReqTransport
    with pytest.raises(BridgeError, match="simulator.key_secret is missing"):
        RepTransport(f"tcp://127.0.0.1:{port}", curve_keys=empty)
    with pytest.raises(BridgeError, match="runtime.key_secret is missing"):
        ReqTransport(f"tcp://127.0.0.1:{port}", curve_keys=empty)
    # the port is still free: the failed attempt bound nothing
    PairTransport(f"tcp://127.0.0.1:{port}", bind=True).close()


def test_authenticated_servers_start_right_after_each_other_and_side_by_side(keys):
    """Seen in CI: a CurveZMQ server started right after another one closed failed with
    "Address already in use (addr='inproc://zeromq.zap.01')". The ZAP handler binds that fixed
    inproc name, and ZeroMQ frees an inproc name only some time after its socket closes, so a
    shared context held it. Before the fix about half of 300 start/stop pairs in a loop failed,
    and two authenticated servers in one process always did. Each CurveZMQ side now owns its
    context (also the connecting ones, whose handshake monitors bind inproc names), and closing
    it leaves nothing behind (a second close is harmless)."""
    from hilrig.bridge.transport import RepTransport, ReqTransport
    for _ in range(40):
        PairTransport(f"tcp://127.0.0.1:{_port()}", bind=True, curve_keys=keys["good"]).close()
        RepTransport(f"tcp://127.0.0.1:{_port()}", curve_keys=keys["good"]).close()
        # the connecting sides' handshake monitors bind inproc names too
        PairTransport(f"tcp://127.0.0.1:{_port()}", bind=False, curve_keys=keys["good"]).close()
        ReqTransport(f"tcp://127.0.0.1:{_port()}", curve_keys=keys["good"]).close()
    rep = RepTransport(f"tcp://127.0.0.1:{_port()}", curve_keys=keys["good"])
    pair = PairTransport(f"tcp://127.0.0.1:{_port()}", bind=True, curve_keys=keys["good"])
    try:
        assert rep.ctx is not pair.ctx and not rep.ctx.closed
    finally:
        pair.close()
        rep.close()
    assert rep.ctx.closed and pair.ctx.closed and rep.auth is None and pair.auth is None
    rep.close()
    pair.close()
