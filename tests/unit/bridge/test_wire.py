"""The compiled per-tick codec (hilrig.bridge.wire) against msgpack-python, the reference
implementation of the msgpack specification (github.com/msgpack/msgpack: spec.md), and against
the project's full decoder, which stays the one authority on what the wire accepts."""
import socket
import struct

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from hilrig.bridge import protocol as P
from hilrig.bridge import wire as W
from hilrig.bridge.standin import _sockaddr

BUF = np.zeros(P.MAX_FRAME_BYTES + 1, dtype=np.uint8)

# msgpack-python's shortest-form integer boundaries (spec.md, "int format family")
SEQS = [0, 1, 127, 128, 255, 256, 65535, 65536, 2**32 - 1, 2**32, 2**63 - 1]


def _put(fn, *args) -> bytes:
    n = fn(BUF, *args)
    return BUF[:n].tobytes()


@pytest.mark.parametrize("seq", SEQS)
@pytest.mark.parametrize("n", [1, 6, 40])
def test_actuation_bytes_equal_msgpack_python(seq, n):
    rng = np.random.default_rng(seq % 1000 + n)
    u = rng.normal(scale=300.0, size=n)
    for word in (0, 9, 300, 2**40):
        for enable in (True, False):
            ours = _put(W.put_actuation, seq, u, word, enable)
            ref = msgpack.packb([4, seq, u.astype("<f8").tobytes(), word, enable],
                                use_bin_type=True)
            assert ours == ref
            got = np.zeros(n)
            assert W.get_actuation(BUF, len(ours), got) == (seq, word, enable)
            assert got.tobytes() == u.tobytes()


@pytest.mark.parametrize("seq", SEQS)
@pytest.mark.parametrize("n", [1, 6, 40])
def test_sample_bytes_equal_msgpack_python(seq, n):
    rng = np.random.default_rng(seq % 997 + n)
    y = rng.normal(scale=400.0, size=n)
    y[0] = np.nan  # a failed sensor channel travels as it is
    t = float(rng.uniform(0, 1e4))
    ours = _put(W.put_sample, seq, t, y)
    assert ours == msgpack.packb([3, seq, t, y.astype("<f8").tobytes()], use_bin_type=True)
    s, tt, p = W.get_sample(BUF, len(ours), n)
    got = np.zeros(n)
    W.read_vector(BUF, p, got)
    assert (s, tt) == (seq, t) and got.tobytes() == y.tobytes()


def test_a_bin16_vector_is_written_as_msgpack_python_writes_it():
    y = np.arange(40.0)  # 320 bytes: bin 16 (spec.md, "bin format family")
    ours = _put(W.put_sample, 5, 0.25, y)
    assert ours[12] == 0xC5 and ours == P.encode_sample(5, 0.25, y)


def _fast_sample(data: bytes, n_meas: int):
    BUF[:len(data)] = np.frombuffer(data, dtype=np.uint8)
    seq, t, p = W.get_sample(BUF, len(data), n_meas)
    if seq < 0:
        return None
    y = np.zeros(n_meas)
    W.read_vector(BUF, p, y)
    return seq, t, y


def _fast_actuation(data: bytes, n_act: int):
    BUF[:len(data)] = np.frombuffer(data, dtype=np.uint8)
    u = np.zeros(n_act)
    seq, word, enable = W.get_actuation(BUF, len(data), u)
    return None if seq < 0 else (seq, u, word, enable)


def _agrees_with_full_decoder(data: bytes, n_meas: int, n_act: int):
    """Whatever the compiled readers take, the full decoder takes with the same values."""
    data = data[:P.MAX_FRAME_BYTES]
    fs, fa = _fast_sample(data, n_meas), _fast_actuation(data, n_act)
    if fs is None and fa is None:
        return
    frame = P.decode(data, n_meas=n_meas, n_act=n_act)  # must not raise
    if fs is not None:
        assert isinstance(frame, P.Sample)
        assert (frame.seq, frame.t_sim_s) == fs[:2] and frame.meas.tobytes() == fs[2].tobytes()
    else:
        assert isinstance(frame, P.Actuation)
        assert (frame.seq, frame.interlock_word, frame.output_enable) == (fa[0], fa[2], fa[3])
        assert frame.u.tobytes() == fa[1].tobytes()


frames = st.one_of(
    st.builds(lambda s, t, y: P.encode_sample(s, t, y), st.integers(0, 2**63 - 1),
              st.floats(allow_nan=False, allow_infinity=False),
              st.lists(st.floats(), min_size=2, max_size=2)),
    st.builds(lambda s, u, w, e: P.encode_actuation(s, u, w, e), st.integers(0, 2**63 - 1),
              st.lists(st.floats(allow_nan=False, allow_infinity=False), min_size=1, max_size=1),
              st.integers(0, 2**64 - 1), st.booleans()))


@settings(max_examples=400, deadline=None)
@given(frames, st.lists(st.tuples(st.integers(0, 80), st.integers(0, 255)), max_size=4),
       st.integers(-3, 3))
def test_mutated_frames_taken_by_the_compiled_readers_decode_the_same(frame, edits, cut):
    """Valid frames with bytes changed and cut short or lengthened (hypothesis)."""
    b = bytearray(frame)
    for pos, val in edits:
        if pos < len(b):
            b[pos] = val
    b = bytes(b[:len(b) + cut]) if cut < 0 else bytes(b) + b"\x00" * cut
    _agrees_with_full_decoder(b, n_meas=2, n_act=1)


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=64))
def test_random_bytes_taken_by_the_compiled_readers_decode_the_same(data):
    _agrees_with_full_decoder(data, n_meas=2, n_act=1)


@given(frames)
@settings(max_examples=200, deadline=None)
def test_every_frame_our_encoders_write_is_taken_by_the_compiled_readers(frame):
    obj = msgpack.unpackb(frame)
    if obj[0] == P.SAMPLE:
        assert _fast_sample(frame, 2) is not None
    elif obj[3] < 2**63:  # an interlock word of 2**63 or more goes to the full decoder
        assert _fast_actuation(frame, 1) is not None


def test_what_the_compiled_readers_leave_to_the_full_decoder():
    y = np.array([1.0, 2.0])
    good = P.encode_sample(7, 0.5, y)
    assert _fast_sample(good, 2) is not None
    # another valid encoding of the same frame (int 16 for seq, float 32 for time): decoded in
    # Python, not misread
    assert _fast_sample(msgpack.packb([3, 7, 0.5, y.tobytes()], use_single_float=True), 2) is None
    assert _fast_sample(b"\x94\x03\xd1\x00\x07" + good[3:], 2) is None
    # non-finite simulator time, a wrong vector length, trailing bytes, another frame type
    assert _fast_sample(msgpack.packb([3, 7, float("nan"), y.tobytes()]), 2) is None
    assert _fast_sample(good, 3) is None
    assert _fast_sample(good + b"\x00", 2) is None
    assert _fast_sample(P.encode(P.Heartbeat(seq=7, t_sender_s=0.5)), 2) is None
    # a non-finite actuation is never applied by the compiled path either
    bad = msgpack.packb([4, 3, np.array([np.inf]).tobytes(), 0, True])
    u = np.array([42.0])
    BUF[:len(bad)] = np.frombuffer(bad, dtype=np.uint8)
    assert W.get_actuation(BUF, len(bad), u)[0] == -1 and u[0] == 42.0
    with pytest.raises(P.ProtocolError):
        P.decode(bad, n_act=1)


def test_peer_addresses_read_back_from_the_c_struct():
    # struct sockaddr_in / sockaddr_in6 layouts: POSIX <netinet/in.h>; family in host order
    raw4 = struct.pack("=H", socket.AF_INET) + struct.pack(">H", 40123) + socket.inet_aton("127.0.0.1") + bytes(8)
    assert _sockaddr(raw4) == ("127.0.0.1", 40123)
    raw6 = (struct.pack("=H", socket.AF_INET6) + struct.pack(">H", 5555) + struct.pack("=I", 0)
            + socket.inet_pton(socket.AF_INET6, "::1") + struct.pack("=I", 0))
    assert _sockaddr(raw6) == ("::1", 5555, 0, 0)
