"""The bridge's wire protocol (hilrig.bridge.protocol) against outside references.

- Golden bytes: format bytes from the MessagePack specification (msgpack.org, "spec.md"), derived
  by hand for the small frames and cross-checked with the msgpack reference library's
  ``msgpack.packb`` of the equivalent plain Python list (never with our encoder).
- Map hash: ``hashlib.sha256`` over ``msgpack.packb`` (reference libraries), as docs/protocol.md
  defines it.
- Semantics (sequence verdicts, handshake rules, rejection reasons, the version number): the
  tables of docs/protocol.md, which is the authority; the doc itself is parsed and compared.
- The doc's simulator example is run as a separate process and driven over ZeroMQ on loopback;
  its first-order plant is checked against the closed-form solution of dv/dt = (u - v)/tau.
"""
import hashlib
import math
import pickle
import re
import select
import subprocess
import sys
from pathlib import Path

import msgpack
import numpy as np
import pytest
import zmq
from hypothesis import given, settings
from hypothesis import strategies as st

from hilrig.bridge import protocol as P
from hilrig.bridge.errors import ProtocolError
from hilrig.bridge.protocol import (MAX_FRAME_BYTES, MAX_NAME, MAX_SIGNALS, MAX_TEXT,
                                    PROTOCOL_VERSION, Actuation, Error, FrameReader, Heartbeat,
                                    Hello, RejectCounter, Sample, SequenceTracker, Stop, Welcome,
                                    decode, encode, encode_actuation, encode_sample,
                                    handshake_check, map_hash)

DOC = Path(__file__).resolve().parents[3] / "docs" / "protocol.md"

# demo data: a small session configuration used throughout
MEAS = [["v", "V"]]
ACT = [["u", "V"]]
TS = 1e-4

# Every reason code decode() and FrameReader may give (docs/protocol.md, section 12)
DECODE_REASONS = {"oversize", "truncated", "malformed", "trailing-bytes", "not-array",
                  "unknown-type", "arity", "bad-type", "bad-value", "out-of-range", "not-finite",
                  "too-long", "too-many-signals", "vector-bytes", "vector-length", "version",
                  "mode", "map", "period"}
ALL_FRAME_TYPES = (Hello, Welcome, Sample, Actuation, Heartbeat, Stop, Error)


def pk(obj) -> bytes:
    """The msgpack reference library's encoding of a plain Python value (the outside reference)."""
    return msgpack.packb(obj, use_bin_type=True)


def le(*values) -> bytes:
    """Little-endian float64 bytes, as docs/protocol.md section 2 lays out vectors."""
    return np.array(values, dtype="<f8").tobytes()


def reason_of(data, **kw) -> str:
    with pytest.raises(ProtocolError) as info:
        decode(data, **kw)
    return info.value.reason


# ---------------------------------------------------------------------------------------------
# Golden bytes

# Hand-derived from the MessagePack specification (msgpack.org):
#   0x93 = fixarray (0x90 | n) of 3 elements; 0x05 = positive fixint 5 (HEARTBEAT); 0x07 = seq 7;
#   0xcb = float 64 followed by the big-endian IEEE-754 binary64 of 0.5, which is
#   sign 0, biased exponent 1022 = 0x3fe, fraction 0 -> 3f e0 00 00 00 00 00 00.
GOLDEN_HEARTBEAT = bytes.fromhex("93 05 07 cb 3f e0 00 00 00 00 00 00")

# Hand-derived from the MessagePack specification (msgpack.org):
#   0x94 fixarray of 4; 0x03 SAMPLE; 0x01 seq 1;
#   0xcb float 64, 0.25 = 2**-2: biased exponent 1021 = 0x3fd -> 3f d0 00 00 00 00 00 00;
#   0xc4 = bin 8, length byte 0x10 = 16 bytes = two float64 values, each LITTLE-endian per
#   docs/protocol.md: 1.0 = 0x3ff0000000000000 -> 00 00 00 00 00 00 f0 3f,
#                    -2.0 = 0xc000000000000000 -> 00 00 00 00 00 00 00 c0.
GOLDEN_SAMPLE = bytes.fromhex("94 03 01 cb 3f d0 00 00 00 00 00 00 c4 10"
                              "00 00 00 00 00 00 f0 3f 00 00 00 00 00 00 00 c0")

# Hand-derived from the MessagePack specification (msgpack.org):
#   0x95 fixarray of 5; 0x04 ACTUATION; 0x01 seq 1; 0xc4 0x08 bin 8 of 8 bytes holding 0.5
#   little-endian (00 00 00 00 00 00 e0 3f); 0x00 interlock word 0; 0xc3 = true.
GOLDEN_ACTUATION = bytes.fromhex("95 04 01 c4 08 00 00 00 00 00 00 e0 3f 00 c3")

# Hand-derived from the MessagePack specification (msgpack.org): 0x92 fixarray of 2; 0x06 STOP;
# 0xa4 = fixstr (0xa0 | 4) followed by the UTF-8 bytes of "done".
GOLDEN_STOP = bytes.fromhex("92 06 a4 64 6f 6e 65")

# Hand-derived from the MessagePack specification (msgpack.org): 0x93 fixarray of 3; 0x07 ERROR;
# 0x03 code 3; 0xa3 fixstr of 3 bytes "map".
GOLDEN_ERROR = bytes.fromhex("93 07 03 a3 6d 61 70")

# The map hash of MEAS/ACT: first 8 bytes of SHA-256 (hashlib) over msgpack.packb([MEAS, ACT]),
# hex literal written down from hashlib + msgpack (reference libraries), not from our code.
GOLDEN_MAP_HASH = bytes.fromhex("efa044d37b14f773")

# HELLO and WELCOME: literals written down from msgpack.packb (reference library) of the lists
# in the test below; the test re-derives them with msgpack.packb and hashlib.
GOLDEN_HELLO = bytes.fromhex(
    "97 01 01 cb 3f 1a 36 e2 eb 1c 43 2d a8 6c 6f 63 6b 73 74 65 70"
    "91 92 a1 76 a1 56 91 92 a1 75 a1 56 c4 08 ef a0 44 d3 7b 14 f7 73")
GOLDEN_WELCOME = bytes.fromhex(
    "98 02 01 cb 3f 1a 36 e2 eb 1c 43 2d a8 6c 6f 63 6b 73 74 65 70"
    "91 92 a1 76 a1 56 91 92 a1 75 a1 56 c4 08 ef a0 44 d3 7b 14 f7 73 a4 64 65 6d 6f")

GOLDEN = [
    # (frame, golden bytes, the same frame as a plain list for msgpack.packb)
    (Heartbeat(7, 0.5), GOLDEN_HEARTBEAT, [5, 7, 0.5]),
    (Sample(1, 0.25, [1.0, -2.0]), GOLDEN_SAMPLE, [3, 1, 0.25, le(1.0, -2.0)]),
    (Actuation(1, [0.5], 0, True), GOLDEN_ACTUATION, [4, 1, le(0.5), 0, True]),
    (Stop("done"), GOLDEN_STOP, [6, "done"]),
    (Error(3, "map"), GOLDEN_ERROR, [7, 3, "map"]),
    (Hello(1, TS, "lockstep", MEAS, ACT, GOLDEN_MAP_HASH), GOLDEN_HELLO,
     [1, 1, TS, "lockstep", MEAS, ACT, GOLDEN_MAP_HASH]),
    (Welcome(1, TS, "lockstep", MEAS, ACT, GOLDEN_MAP_HASH, "demo"), GOLDEN_WELCOME,
     [2, 1, TS, "lockstep", MEAS, ACT, GOLDEN_MAP_HASH, "demo"]),
]
GOLDEN_IDS = ["heartbeat", "sample", "actuation", "stop", "error", "hello", "welcome"]


@pytest.mark.parametrize("frame, golden, as_list", GOLDEN, ids=GOLDEN_IDS)
def test_golden_bytes(frame, golden, as_list):
    # the reference library agrees with the literal (checks the hand derivation, too)
    assert pk(as_list) == golden
    assert encode(frame) == golden
    back = decode(golden)
    assert type(back) is type(frame) and back == frame


def test_fast_encoders_give_the_golden_bytes():
    assert encode_sample(1, 0.25, [1.0, -2.0]) == GOLDEN_SAMPLE
    assert encode_sample(np.int64(1), np.float64(0.25), np.array([1.0, -2.0])) == GOLDEN_SAMPLE
    assert encode_actuation(1, np.array([0.5]), 0, np.True_) == GOLDEN_ACTUATION
    with pytest.raises(ProtocolError) as info:
        encode_actuation(1, [math.inf], 0, True)
    assert info.value.reason == "not-finite"


def test_map_hash_golden():
    # MessagePack specification: 0x92 fixarray 2 [meas, act]; 0x91 fixarray 1; 0x92 [name, unit];
    # 0xa1 fixstr of 1 byte: "v" = 0x76, "V" = 0x56, "u" = 0x75
    layout = bytes.fromhex("92 91 92 a1 76 a1 56 91 92 a1 75 a1 56")
    assert pk([MEAS, ACT]) == layout
    reference = hashlib.sha256(layout).digest()[:8]   # hashlib: SHA-256 (FIPS 180-4)
    assert reference == GOLDEN_MAP_HASH
    assert map_hash(MEAS, ACT) == GOLDEN_MAP_HASH
    assert map_hash([("v", "V")], (("u", "V"),)) == GOLDEN_MAP_HASH  # tuples hash the same
    # order, units and direction all matter (docs/protocol.md section 6)
    two = [["v_out", "V"], ["i_out", "A"]]
    assert map_hash(two, ACT) == hashlib.sha256(pk([two, ACT])).digest()[:8]
    assert map_hash(two[::-1], ACT) != map_hash(two, ACT)
    assert map_hash(ACT, MEAS) != GOLDEN_MAP_HASH
    assert map_hash([["v", "kV"]], ACT) != GOLDEN_MAP_HASH


def test_receivers_accept_non_shortest_forms_but_not_other_types():
    # MessagePack specification: 0xcf = uint 64, 0xd3 = int 64, 0xca = float 32 (0.5 = 3f000000)
    seq7_uint64 = bytes.fromhex("93 05 cf 00 00 00 00 00 00 00 07 cb 3f e0 00 00 00 00 00 00")
    seq7_int64 = bytes.fromhex("93 05 d3 00 00 00 00 00 00 00 07 cb 3f e0 00 00 00 00 00 00")
    t_float32 = bytes.fromhex("93 05 07 ca 3f 00 00 00")
    for data in (seq7_uint64, seq7_int64, t_float32):
        assert decode(data) == Heartbeat(7, 0.5)
    # 0xc5 = bin 16: the same 8-byte vector with a 2-byte length
    u_bin16 = bytes.fromhex("95 04 01 c5 00 08 00 00 00 00 00 00 e0 3f 00 c3")
    assert decode(u_bin16) == Actuation(1, [0.5], 0, True)


# ---------------------------------------------------------------------------------------------
# Round trips and stream reading

ROUND_TRIP = [
    Hello.build(50e-6, "free-running", [["v_out", "V"], ["i_out", "A"], ["T_amb", "K"]],
                [["u", "V"]]),
    Welcome.build(10.0, "lockstep", [], [["u1", "V"], ["u2", "-"]], "sim \u00e9 \u2713"),
    Sample(0, 0.0, []),
    Sample(2 ** 63 - 1, -1e300, [math.nan, math.inf, -math.inf, -0.0, 5e-324]),
    Actuation(12345678901, np.linspace(-1, 1, MAX_SIGNALS), 2 ** 64 - 1, False),
    Heartbeat(0, 1e-9),
    Stop(""),
    Stop("x" * MAX_TEXT),
    Error(2 ** 64 - 1, "\u00e9" * (MAX_TEXT // 2)),
]


@pytest.mark.parametrize("frame", ROUND_TRIP, ids=lambda f: type(f).__name__)
def test_round_trip(frame):
    data = encode(frame)
    back = decode(data)
    assert type(back) is type(frame) and back == frame
    # the bytes are plain msgpack: the reference library reads the same element count
    assert len(msgpack.unpackb(data)) == 1 + len(P._FIELDS[frame.TYPE])


def test_decoded_vectors_are_read_only_float64():
    s = decode(GOLDEN_SAMPLE)
    assert s.meas.dtype == np.float64 and s.meas.tolist() == [1.0, -2.0]
    with pytest.raises(ValueError):
        s.meas[0] = 3.0
    a = Actuation(0, [1, 2], 0, True)          # ints are accepted on encode and become floats
    assert a.u.dtype == np.float64 and not a.u.flags.writeable


def test_frame_reader_byte_at_a_time_and_concatenated():
    frames = [g[0] for g in GOLDEN] + ROUND_TRIP
    stream = b"".join(encode(f) for f in frames)
    reader = FrameReader()
    got = []
    for i in range(len(stream)):
        got += reader.feed(stream[i:i + 1])
    assert got == frames and reader.pending == 0
    assert FrameReader().feed(stream) == frames
    assert FrameReader().feed(bytearray(stream)) == frames


def test_frame_reader_caps_one_frame_at_max_frame():
    # STOP with a fixstr reason: 1 (0x92) + 1 (0x06) + 1 (0xa0|n) + n bytes (MessagePack spec)
    exactly = pk([6, "a" * 29])
    over = pk([6, "a" * 30])
    assert len(exactly) == 32 and len(over) == 33
    assert FrameReader(max_frame=32).feed(exactly + exactly) == [Stop("a" * 29)] * 2
    for chunk in (1, 7, len(over)):
        reader = FrameReader(max_frame=32)
        with pytest.raises(ProtocolError) as info:
            for i in range(0, len(over), chunk):
                reader.feed(over[i:i + chunk])
        assert info.value.reason == "oversize"
        with pytest.raises(ProtocolError) as info:     # the reader is closed after an error
            reader.feed(exactly)
        assert info.value.reason == "reader-closed"


def test_frame_reader_stops_a_long_frame_at_max_frame_bytes():
    # MessagePack spec: 0xdb = str 32 with a 4-byte big-endian length, here 0xfffa = 65 530:
    # a STOP of 2 + 5 + 65 530 = 65 537 bytes, one more than MAX_FRAME_BYTES
    head = bytes.fromhex("92 06 db 00 00 ff fa")
    reader = FrameReader()
    assert reader.feed(head) == []
    with pytest.raises(ProtocolError) as info:
        for _ in range(9):
            reader.feed(b"a" * 8192)
    assert info.value.reason == "oversize"
    assert reader.pending <= MAX_FRAME_BYTES
    # the same declared length one byte shorter is a complete, valid frame of exactly the cap
    exact = bytes.fromhex("92 06 db 00 00 ff f9") + b"a" * 65529
    assert len(exact) == MAX_FRAME_BYTES
    with pytest.raises(ProtocolError) as info:    # a valid frame, but the reason is over MAX_TEXT
        FrameReader().feed(exact)
    assert info.value.reason == "too-long"
    # MessagePack spec: 0xc6 = bin 32, here declaring 100 000 bytes: the reader never holds
    # more than MAX_FRAME_BYTES of it
    reader = FrameReader()
    reader.feed(bytes.fromhex("94 03 01 cb 00 00 00 00 00 00 00 00 c6 00 01 86 a0"))
    with pytest.raises(ProtocolError) as info:
        for _ in range(13):
            reader.feed(b"\0" * 8192)
    assert info.value.reason == "oversize"
    assert reader.pending <= MAX_FRAME_BYTES


@pytest.mark.parametrize("data, reason", [
    (b"\xc1", "malformed"),                               # 0xc1 is never used (MessagePack spec)
    (pk(5), "not-array"),
    (pk([5, 1]), "arity"),
    (GOLDEN_STOP + pk([3, 0, 0.0, le(1.0, 2.0)]), "vector-length"),  # reader has n_meas = 1
])
def test_frame_reader_rejections(data, reason):
    reader = FrameReader(n_meas=1)
    with pytest.raises(ProtocolError) as info:
        reader.feed(data)
    assert info.value.reason == reason


# ---------------------------------------------------------------------------------------------
# Rejections by decode()

HASH = GOLDEN_MAP_HASH
LONG_NAME = "n" * (MAX_NAME + 1)
LONG_UTF8 = "\u00e9" * (MAX_NAME // 2 + 1)      # 33 characters, 66 UTF-8 bytes
MANY = [[f"s{i}", "V"] for i in range(MAX_SIGNALS + 1)]


def hello_list(meas=MEAS, act=ACT, **over):
    """A HELLO as a plain list, hash computed with hashlib + msgpack (reference libraries)."""
    fields = dict(version=1, period=TS, mode="lockstep", meas=meas, act=act,
                  hash=hashlib.sha256(pk([meas, act])).digest()[:8])
    fields.update(over)
    return [1, fields["version"], fields["period"], fields["mode"], fields["meas"],
            fields["act"], fields["hash"]]


REJECTIONS = [
    ("oversize", pk([6, "x" * (MAX_FRAME_BYTES + 10)]), "oversize"),
    ("truncated", GOLDEN_SAMPLE[:-1], "truncated"),
    ("empty-input", b"", "truncated"),
    ("trailing-garbage", GOLDEN_HEARTBEAT + b"\x00", "trailing-bytes"),
    ("two-frames", GOLDEN_STOP + GOLDEN_STOP, "trailing-bytes"),
    ("reserved-byte", b"\xc1", "malformed"),
    ("invalid-utf8", bytes.fromhex("92 06 a2 ff fe"), "malformed"),
    ("top-level-int", pk(5), "not-array"),
    ("top-level-str", pk("HELLO"), "not-array"),
    ("map-not-array", pk({"type": 5, "seq": 1, "t": 0.5}), "not-array"),
    ("empty-array", pk([]), "arity"),
    ("unknown-type-8", pk([8, 0]), "unknown-type"),
    ("unknown-type-0", pk([0]), "unknown-type"),
    ("type-as-str", pk(["HEARTBEAT", 1, 0.5]), "bad-type"),
    ("arity-short", pk([5, 1]), "arity"),
    ("arity-long", pk([5, 1, 0.5, 0]), "arity"),
    ("bool-for-uint", pk([5, True, 0.5]), "bad-type"),
    ("float-for-uint", pk([5, 1.0, 0.5]), "bad-type"),
    ("int-for-float", pk([5, 1, 0]), "bad-type"),
    ("int-for-bool", pk([4, 0, le(1.0), 0, 1]), "bad-type"),
    ("bool-for-word", pk([4, 0, le(1.0), True, True]), "bad-type"),
    ("str-for-bin", pk([3, 0, 0.0, "abcdefgh"]), "bad-type"),
    ("list-for-bin", pk([3, 0, 0.0, [1.0]]), "bad-type"),
    ("nil-field", pk([6, None]), "bad-type"),
    ("ext-field", pk([6, msgpack.ExtType(5, b"x")]), "bad-type"),
    ("negative-seq", pk([5, -1, 0.5]), "out-of-range"),
    ("seq-2**63", pk([3, 2 ** 63, 0.0, b""]), "out-of-range"),
    ("nan-time", pk([5, 1, math.nan]), "not-finite"),
    ("inf-time", pk([3, 1, math.inf, b""]), "not-finite"),
    ("nan-u", pk([4, 0, le(1.0, math.nan), 0, True]), "not-finite"),
    ("bin-not-x8", pk([3, 0, 0.0, b"\0" * 12]), "vector-bytes"),
    ("too-many-values", pk([3, 0, 0.0, b"\0" * 8 * (MAX_SIGNALS + 1)]), "too-many-signals"),
    ("too-many-signals", pk(hello_list(meas=MANY)), "too-many-signals"),
    ("name-too-long", pk(hello_list(meas=[[LONG_NAME, "V"]])), "too-long"),
    ("name-too-long-utf8", pk(hello_list(act=[[LONG_UTF8, "V"]])), "too-long"),
    ("unit-too-long", pk(hello_list(meas=[["v", LONG_NAME]])), "too-long"),
    ("reason-too-long", pk([7, 5, "r" * (MAX_TEXT + 1)]), "too-long"),
    ("empty-name", pk(hello_list(meas=[["", "V"]])), "bad-value"),
    ("duplicate-name", pk(hello_list(meas=[["v", "V"], ["v", "A"]])), "bad-value"),
    ("map-entry-arity", pk(hello_list(meas=[["v", "V", "x"]])), "arity"),
    ("map-entry-not-array", pk(hello_list(meas=["v"])), "bad-type"),
    ("hash-wrong-length", pk(hello_list(hash=b"\0" * 7)), "bad-value"),
    ("hash-not-own-maps", pk(hello_list(hash=b"\0" * 8)), "map"),
    ("hello-version-2", pk(hello_list(version=2)), "version"),
    ("hello-version-2-new-layout", pk([1, 2, "some future field"]), "version"),
    ("unknown-mode", pk(hello_list(mode="turbo")), "mode"),
    ("period-zero", pk(hello_list(period=0.0)), "out-of-range"),
    ("period-over-10-s", pk(hello_list(period=10.5)), "out-of-range"),
    ("period-inf", pk(hello_list(period=math.inf)), "not-finite"),
]


@pytest.mark.parametrize("data, reason", [r[1:] for r in REJECTIONS], ids=[r[0] for r in REJECTIONS])
def test_decode_rejects(data, reason):
    assert reason_of(data) == reason


def test_vector_length_against_the_handshake():
    assert reason_of(GOLDEN_SAMPLE, n_meas=3) == "vector-length"
    assert reason_of(GOLDEN_ACTUATION, n_act=2) == "vector-length"
    assert decode(GOLDEN_SAMPLE, n_meas=2) == Sample(1, 0.25, [1.0, -2.0])
    assert decode(GOLDEN_ACTUATION, n_act=1, n_meas=7) == Actuation(1, [0.5], 0, True)


def test_boundaries_are_accepted():
    name = "n" * MAX_NAME
    assert decode(pk(hello_list(meas=[[name, "u" * MAX_NAME]]))).meas_map == ((name, "u" * 64),)
    full = [[f"s{i}", "V"] for i in range(MAX_SIGNALS)]
    assert len(decode(pk(hello_list(meas=full))).meas_map) == MAX_SIGNALS
    assert decode(pk([3, 2 ** 63 - 1, 0.0, b"\0" * 8 * MAX_SIGNALS])).seq == 2 ** 63 - 1
    assert decode(pk(hello_list(period=10.0))).tick_period_s == 10.0
    # measurements may be non-finite (docs/protocol.md, SAMPLE): the interlocks act on them
    assert np.isnan(decode(pk([3, 0, 0.0, le(math.nan)])).meas[0])


def test_error_messages_name_the_field_and_value():
    with pytest.raises(ProtocolError) as info:
        decode(pk([5, True, 0.5]))
    assert "HEARTBEAT.seq" in str(info.value) and "bool" in str(info.value)
    with pytest.raises(ProtocolError) as info:
        decode(pk(hello_list(period=0.0)))
    assert "HELLO.tick_period_s" in str(info.value) and " s" in str(info.value)
    e = info.value
    assert isinstance(e, ValueError)
    again = pickle.loads(pickle.dumps(e))
    assert (again.reason, str(again)) == (e.reason, str(e))


def test_encode_refuses_what_a_receiver_must_reject():
    cases = [
        (Stop("x" * (MAX_TEXT + 1)), "too-long"),
        (Actuation(0, [math.nan], 0, True), "not-finite"),
        (Actuation(0, [1.0], -1, True), "out-of-range"),
        (Actuation(0, [1.0], 0, 1), "bad-type"),
        (Sample(-1, 0.0, []), "out-of-range"),
        (Heartbeat(0, math.inf), "not-finite"),
        (Hello(1, TS, "lockstep", MEAS, ACT, b"\0" * 8), "map"),
        (Hello.build(20.0, "lockstep", MEAS, ACT), "out-of-range"),
        (Error(1, "\ud800"), "bad-value"),      # a lone surrogate cannot be UTF-8
    ]
    for frame, reason in cases:
        with pytest.raises(ProtocolError) as info:
            encode(frame)
        assert info.value.reason == reason, frame
    # every field within its cap, but the whole HELLO over MAX_FRAME_BYTES:
    # 2 maps x 256 entries x (1 + 2 x (2 + 64)) bytes = 68 096 bytes (MessagePack spec sizes)
    big = [[f"{i:03d}" + "x" * (MAX_NAME - 3), "u" * MAX_NAME] for i in range(MAX_SIGNALS)]
    with pytest.raises(ProtocolError) as info:
        encode(Hello.build(TS, "lockstep", big, big))
    assert info.value.reason == "oversize"
    with pytest.raises(ProtocolError) as info:
        Sample(0, 0.0, ["a", "b"])
    assert info.value.reason == "bad-type"


def test_decode_never_raises_for_huge_declared_lengths():
    # MessagePack spec: 0xdd = array 32, 0xdf = map 32, 0xdb = str 32, each claiming 2**32 - 1
    for head in ("dd ff ff ff ff", "df ff ff ff ff", "db ff ff ff ff", "91 dd ff ff ff ff"):
        assert reason_of(bytes.fromhex(head)) in {"malformed", "truncated"}
    assert reason_of(b"\x91" * 5000) == "malformed"          # nesting too deep


# ---------------------------------------------------------------------------------------------
# Handshake, error codes, counters

def test_handshake_check():
    meas = [["v_out", "V"], ["i_out", "A"]]
    hello = Hello.build(50e-6, "lockstep", meas, ACT)
    assert handshake_check(hello, Welcome.build(50e-6, "lockstep", meas, ACT, "sim")) is None
    # within the 1e-12 relative tolerance of docs/protocol.md section 7
    assert handshake_check(hello, Welcome.build(50e-6 * (1 + 1e-13), "lockstep", meas, ACT,
                                                "sim")) is None

    def reason(welcome, *words):
        with pytest.raises(ProtocolError) as info:
            handshake_check(hello, welcome)
        for w in words:       # the message names both values
            assert w in str(info.value), (w, str(info.value))
        return info.value.reason

    good = Welcome.build(50e-6, "lockstep", meas, ACT, "sim")
    assert reason(Welcome(2, *[getattr(good, f) for f in P._FIELDS[2][1:]]), "1", "2") == "version"
    assert reason(Welcome.build(50e-6, "free-running", meas, ACT, "s"),
                  "'lockstep'", "'free-running'") == "mode"
    assert reason(Welcome.build(50e-6, "lockstep", meas, [["u", "kV"]], "s"),
                  "u [V]", "u [kV]") == "map"
    assert reason(Welcome.build(50e-6, "lockstep", meas[::-1], ACT, "s"),
                  "v_out [V]", "i_out [A]") == "map"
    assert reason(Welcome.build(50e-6, "lockstep", meas[:1], ACT, "s"), "nothing") == "map"
    assert reason(Welcome(1, 50e-6, "lockstep", meas, ACT, b"\0" * 8, "s"),
                  "0x0000000000000000", "0x" + hello.map_hash.hex()) == "map"
    assert reason(Welcome.build(50e-6 * (1 + 1e-11), "lockstep", meas, ACT, "s"),
                  "5e-05 s", repr(50e-6 * (1 + 1e-11))) == "period"
    assert reason(Welcome.build(100e-6, "lockstep", meas, ACT, "s"), "5e-05", "0.0001") == "period"


def test_error_codes_follow_the_doc():
    # docs/protocol.md section 7: 1 version, 2 mode, 3 map, 4 period, 5 malformed, 6 unexpected
    expected = {"version": 1, "mode": 2, "map": 3, "period": 4, "unexpected": 6,
                "arity": 5, "oversize": 5, "not-finite": 5}
    assert {r: P.error_code(r) for r in expected} == expected
    frame = P.error_frame(ProtocolError("period", "tick period: runtime 5e-05 s, simulator 1e-4 s"))
    assert frame.code == 4 and "5e-05" in frame.reason
    long = P.error_frame(ProtocolError("bad-type", "\u00e9" * 2000))
    assert len(long.reason.encode("utf-8")) <= MAX_TEXT
    assert decode(encode(long)) == long


def test_sequence_tracker():
    # verdicts from the table of docs/protocol.md section 11, worked by hand
    tr = SequenceTracker()
    steps = [(0, "ok"), (1, "ok"), (1, "duplicate"), (0, "out-of-order"), (4, "gap"), (5, "ok"),
             (3, "out-of-order"), (5, "duplicate"), (9, "gap"), (10, "ok")]
    assert [(s, tr.check(s)) for s, _ in steps] == steps
    assert (tr.accepted, tr.duplicates, tr.out_of_order, tr.lost) == (6, 2, 2, 2 + 3)
    assert tr.last == 10 and tr.expected == 11
    late_start = SequenceTracker()
    assert late_start.check(3) == "gap" and late_start.lost == 3
    assert late_start.check(0) == "out-of-order" and late_start.lost == 3   # lost stays lost


def test_reject_counter_keeps_the_last_100():
    rc = RejectCounter()
    for i in range(150):
        rc.record("arity" if i % 3 else "oversize", f"frame {i}")
    rc.add(ProtocolError("version", "protocol version: runtime 1, simulator 2"))
    assert rc.total == 151 and rc["arity"] == 100 and rc["oversize"] == 50 and rc["version"] == 1
    assert rc["map"] == 0
    assert len(rc.log) == 100
    assert rc.log[0] == ("oversize", "frame 51") and rc.log[-1][0] == "version"
    assert rc.as_dict() == {"arity": 100, "oversize": 50, "version": 1}


# ---------------------------------------------------------------------------------------------
# Property-based tests (hypothesis)

names = st.text(min_size=1, max_size=MAX_NAME // 4)     # at most 4 UTF-8 bytes per character
units = st.text(max_size=MAX_NAME // 4)
sigmaps = st.lists(st.tuples(names, units), max_size=6, unique_by=lambda e: e[0])
seqs = st.integers(0, 2 ** 63 - 1)
finite = st.floats(allow_nan=False, allow_infinity=False)
texts = st.text(max_size=MAX_TEXT // 4)
periods = st.floats(min_value=1e-9, max_value=10.0)
modes = st.sampled_from(["lockstep", "free-running"])

frames = st.one_of(
    st.builds(Hello.build, periods, modes, sigmaps, sigmaps),
    st.builds(Welcome.build, periods, modes, sigmaps, sigmaps, texts),
    st.builds(Sample, seqs, finite, st.lists(st.floats(), max_size=12)),
    st.builds(Actuation, seqs, st.lists(finite, max_size=12), st.integers(0, 2 ** 64 - 1),
              st.booleans()),
    st.builds(Heartbeat, seqs, finite),
    st.builds(Stop, texts),
    st.builds(Error, st.integers(0, 2 ** 64 - 1), texts),
)


def decode_or_reason(data):
    try:
        frame = decode(data)
    except ProtocolError as e:
        assert e.reason in DECODE_REASONS, e.reason
        return e.reason
    assert isinstance(frame, ALL_FRAME_TYPES)
    return frame


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=2048))
def test_fuzz_decode_arbitrary_bytes(data):
    decode_or_reason(data)   # any exception other than ProtocolError fails the test


@settings(max_examples=300, deadline=None)
@given(frames, st.data())
def test_fuzz_decode_mutated_frames(frame, data):
    raw = bytearray(encode(frame))
    kind = data.draw(st.sampled_from(["flip", "cut", "insert"]))
    i = data.draw(st.integers(0, len(raw) - 1))
    if kind == "flip":
        raw[i] = data.draw(st.integers(0, 255))
    elif kind == "cut":
        del raw[i:]
    else:
        raw[i:i] = data.draw(st.binary(min_size=1, max_size=9))
    decode_or_reason(bytes(raw))


@settings(max_examples=300, deadline=None)
@given(frames)
def test_property_round_trip(frame):
    back = decode(encode(frame))
    assert type(back) is type(frame) and back == frame


@settings(max_examples=100, deadline=None)
@given(st.lists(frames, min_size=1, max_size=6), st.data())
def test_property_reader_random_chunks(frame_list, data):
    stream = b"".join(encode(f) for f in frame_list)
    cuts = sorted(data.draw(st.lists(st.integers(0, len(stream)), max_size=12)))
    reader, got, start = FrameReader(), [], 0
    for cut in cuts + [len(stream)]:
        got += reader.feed(stream[start:cut])
        start = cut
    assert got == frame_list and reader.pending == 0


# ---------------------------------------------------------------------------------------------
# docs/protocol.md is the authority: the code must say what it says

DOC_TEXT = DOC.read_text(encoding="utf-8")


def table_rows(pattern):
    return re.findall(pattern, DOC_TEXT, flags=re.MULTILINE)


def test_doc_states_the_protocol_version():
    versions = table_rows(r"^Protocol version: (\d+)\s*$")
    assert versions == [str(PROTOCOL_VERSION)]


def test_doc_tables_match_the_code():
    frame_rows = table_rows(r"^\| (\d) \| ([A-Z]+) \|")
    assert {int(t): n for t, n in frame_rows} == P.FRAME_NAMES
    handshake = DOC_TEXT.split("## 7. Handshake", 1)[1].split("\n## ", 1)[0]
    code_rows = re.findall(r"^\| (\d) \| ([a-z][a-z ]*[a-z]) \|", handshake, flags=re.MULTILINE)
    assert {int(c): n for c, n in code_rows} == P.ERROR_NAMES
    limits = table_rows(r"^\| `([A-Z_]+)` \| ([0-9.e-]+) \|")
    assert len(limits) == 8
    for name, value in limits:
        assert getattr(P, name) == float(value), name
    # every reason the decoder gives is documented, with the ERROR code the code uses
    reasons = dict(table_rows(r"^\| ([a-z-]+) \| [^|]+ \| (\d|- \(dropped\)) \|$"))
    assert DECODE_REASONS <= set(reasons)
    for reason, code in reasons.items():
        if code.isdigit():
            assert P.error_code(reason) == int(code), reason
    # each frame's field table lists the fields in the code's order
    for ftype, name in P.FRAME_NAMES.items():
        if ftype == 2:   # WELCOME's table lists only the field it adds to HELLO's
            continue
        section = re.split(r"\n##", DOC_TEXT.split(f"### {name} ({ftype})", 1)[1], 1)[0]
        listed = re.findall(r"^\| \d \| (\w+) \|", section, flags=re.MULTILINE)
        assert listed == ["type", *P._FIELDS[ftype]], name
    welcome = re.split(r"\n##", DOC_TEXT.split("### WELCOME (2)", 1)[1], 1)[0]
    assert re.findall(r"^\| (\d) \| (\w+) \|", welcome, flags=re.MULTILINE) == [
        ("7", "simulator_name")]


def test_doc_example_bytes_are_what_we_send():
    rows = table_rows(r"^\| [A-Z]+ [^|]* \| `([0-9a-f ]+)` \|$")
    assert len(rows) == 6
    for hex_text in rows:
        data = bytes.fromhex(hex_text)
        assert encode(decode(data)) == data
    assert bytes.fromhex(rows[0]) == GOLDEN_HEARTBEAT and bytes.fromhex(rows[1]) == GOLDEN_SAMPLE


def doc_example() -> str:
    block = DOC_TEXT.split("<!-- example: simulator.py -->", 1)[1]
    return block.split("```python\n", 1)[1].split("\n```", 1)[0] + "\n"


def test_doc_example_simulator_runs_a_lockstep_session(tmp_path):
    code = doc_example()
    assert not re.search(r"^\s*(import|from) hilrig", code, flags=re.MULTILINE)  # standalone
    ts = float(re.search(r"^TS = ([0-9.e-]+)", code, flags=re.MULTILINE).group(1))
    tau = float(re.search(r"^TAU = ([0-9.e-]+)", code, flags=re.MULTILINE).group(1))
    path = tmp_path / "simulator.py"
    path.write_text(code, encoding="utf-8")
    timeout_ms = 10_000   # generous bound on every socket operation; not a timing check
    with subprocess.Popen([sys.executable, str(path), "0"], stdout=subprocess.PIPE,
                          stderr=subprocess.PIPE, text=True) as proc:
        try:
            ready, _, _ = select.select([proc.stdout], [], [], timeout_ms / 1000)
            assert ready, "the example printed no address"
            address = re.search(r"tcp://127\.0\.0\.1:\d+", proc.stdout.readline()).group(0)
            run_lockstep_client(address, ts, tau, timeout_ms)
        finally:
            proc.terminate()
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10)


def run_lockstep_client(address, ts, tau, timeout_ms):
    """The runtime's side of docs/protocol.md section 13 (ZeroMQ lockstep), for 10 ticks."""
    ctx = zmq.Context()
    sock = ctx.socket(zmq.REQ)
    for option, value in ((zmq.RCVTIMEO, timeout_ms), (zmq.SNDTIMEO, timeout_ms),
                          (zmq.LINGER, 0)):
        sock.setsockopt(option, value)
    try:
        sock.connect(address)

        def ask(frame_bytes, **kw):
            sock.send(frame_bytes)
            return decode(sock.recv(), **kw)

        # a HELLO of another version is refused with ERROR code 1 (docs/protocol.md section 7)
        meas = [["v_out", "V"]]  # the example's measurement map
        wrong = Hello(2, ts, "lockstep", meas, ACT, map_hash(meas, ACT))
        refusal = ask(encode(wrong))
        assert type(refusal) is Error and refusal.code == 1, refusal
        hello = Hello.build(ts, "lockstep", meas, ACT)
        welcome = ask(encode(hello))
        assert type(welcome) is Welcome, welcome
        handshake_check(hello, welcome)
        first = ask(encode(Heartbeat(0, 0.0)), n_meas=1)
        assert first == Sample(0, 0.0, [0.0])
        u = 2.0   # demo data: a 2 V step
        for k in range(10):
            s = ask(encode_actuation(k, [u], 0, True), n_meas=1)
            assert s.seq == k + 1 and s.t_sim_s == (k + 1) * ts
            # closed form of dv/dt = (u - v)/tau from v(0) = 0 with u constant:
            # v(t) = u (1 - exp(-t/tau)) (exact solution of a linear first-order ODE, derived)
            assert s.meas[0] == pytest.approx(u * (1 - math.exp(-(k + 1) * ts / tau)),
                                              rel=1e-12)
        # output disabled: the example's stage delivers 0 V, so v decays by exp(-Ts/tau)
        s_off = ask(encode_actuation(10, [u], 0, False), n_meas=1)
        assert s_off.meas[0] == pytest.approx(s.meas[0] * math.exp(-ts / tau), rel=1e-12)
        # an actuation answering the wrong sample is an unexpected frame (code 6)
        bad = ask(encode_actuation(5, [u], 0, True))
        assert type(bad) is Error and bad.code == 6
        # a new session on the same socket, ended in order with STOP -> STOP
        assert type(ask(encode(hello))) is Welcome
        assert ask(encode(Heartbeat(0, 0.0))).seq == 0
        assert type(ask(encode(Stop("done")))) is Stop
    finally:
        sock.close()
        ctx.term()


def test_doc_states_the_sockets_read_limit(tmp_path):
    """One frame cap (MAX_FRAME_BYTES) everywhere; the sockets' read limit is the multiple of it
    the document states, set on every ZeroMQ socket hilrig opens."""
    import zmq
    from hilrig.bridge.transport import (READ_LIMIT_BYTES, PairTransport, RepTransport,
                                         ReqTransport)
    assert READ_LIMIT_BYTES == 16 * MAX_FRAME_BYTES == 1 << 20
    section = DOC_TEXT.split("### ZeroMQ, lockstep", 1)[1].split("\n### ", 1)[0]
    assert "up to 16 · `MAX_FRAME_BYTES` (1 MiB, `ZMQ_MAXMSGSIZE`)" in section
    assert f"`MAX_FRAME_BYTES` ({MAX_FRAME_BYTES})" in section
    socks = [RepTransport(f"ipc://{tmp_path}/a"), ReqTransport(f"ipc://{tmp_path}/a"),
             PairTransport(f"ipc://{tmp_path}/b", bind=True)]
    try:
        for t in socks:
            assert t.sock.getsockopt(zmq.MAXMSGSIZE) == READ_LIMIT_BYTES
    finally:
        for t in socks:
            t.close()
