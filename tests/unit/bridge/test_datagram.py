"""Fixed-layout datagrams (hilrig.bridge.datagram): the frames' bytes against Python's struct
module (the reference: its format characters '<' / '>' little / big-endian with no padding,
'I' uint32, 'd' IEEE-754 binary64, 'f' binary32), hand-written hex examples, rejection of
malformed frames, and the layout's validation."""
import math
import struct

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from hilrig.bridge import protocol as P
from hilrig.bridge.datagram import (END, START, Direction, FixedCodec, Layout, LayoutError,
                                    SimCodec, layout_from_table)
from hilrig.bridge.errors import ProtocolError

MEAS = ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc"]
ACT = ["u"]


def _layout(sample: dict | None = None, actuation: dict | None = None, **top) -> Layout:
    table = {"sample": {"signals": ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc"],
                        **(sample or {})},
             "actuation": {"signals": ["u"], **(actuation or {})}, **top}
    return layout_from_table(table, MEAS, ACT, "test.toml")


def test_sample_bytes_little_endian_float64_by_hand_and_by_struct():
    d = Direction(signals=("v_out", "i_out"), type="float64", byte_order="little", counter=True,
                  time=True)
    data = d.pack(1, 0.25, [1.0, -2.0])
    # by hand (IEEE 754 binary64: 0.25 = 0x3FD0000000000000, 1.0 = 0x3FF0..., -2.0 = 0xC000...),
    # least significant byte first
    assert data.hex(" ") == ("01 00 00 00 " "00 00 00 00 00 00 d0 3f "
                             "00 00 00 00 00 00 f0 3f " "00 00 00 00 00 00 00 c0")
    assert data == struct.pack("<Iddd", 1, 0.25, 1.0, -2.0)   # reference: struct
    assert d.format == "<Id2d" and d.size == struct.calcsize("<Id2d") == 28
    counter, t, values = d.unpack(data)
    assert counter == 1 and t == 0.25 and values.tolist() == [1.0, -2.0]


def test_actuation_bytes_big_endian_float32_by_hand_and_by_struct():
    d = Direction(signals=("u", "output_enable"), type="float32", byte_order="big",
                  counter=True, time=False)
    data = d.pack(7, None, [0.5, 1.0])
    # by hand (IEEE 754 binary32: 0.5 = 0x3F000000, 1.0 = 0x3F800000), most significant first
    assert data.hex(" ") == "00 00 00 07 3f 00 00 00 3f 80 00 00"
    assert data == struct.pack(">Iff", 7, 0.5, 1.0)
    assert d.unpack(data)[0] == 7 and d.unpack(data)[2].tolist() == [0.5, 1.0]


def test_no_counter_no_time_is_the_values_alone():
    d = Direction(signals=("v_out",), counter=False, time=False)
    assert d.pack(None, None, [3.0]) == struct.pack("<d", 3.0)
    assert d.unpack(struct.pack("<d", 3.0))[:2] == (None, None)


@settings(max_examples=200, deadline=None)
@given(counter=st.integers(0, 2**32 - 1), t=st.floats(allow_nan=False),
       values=st.lists(st.floats(allow_nan=False), min_size=1, max_size=8),
       typ=st.sampled_from(["float32", "float64"]), order=st.sampled_from(["little", "big"]),
       time_field=st.booleans())
def test_round_trip_against_struct(counter, t, values, typ, order, time_field):
    d = Direction(signals=tuple(f"s{i}" for i in range(len(values))), type=typ,
                  byte_order=order, counter=True, time=time_field)
    data = d.pack(counter, t, values)
    fmt = {"little": "<", "big": ">"}[order] + "I" + ("d" if time_field else "") + \
        {"float32": "f", "float64": "d"}[typ] * len(values)
    ref = struct.unpack(fmt, data)  # the struct module reads what we wrote
    assert ref[0] == counter and len(data) == struct.calcsize(fmt)
    got_counter, got_t, got = d.unpack(data)
    assert got_counter == counter and (got_t == t if time_field else got_t is None)
    if typ == "float64":
        assert got.tolist() == list(values) == list(ref[1 + time_field:])
    else:
        # float32: each value rounded to nearest binary32 (numpy's cast; beyond the range: inf)
        with np.errstate(over="ignore"):
            want = np.asarray(values, dtype=np.float64).astype(np.float32).astype(np.float64)
        assert got.tobytes() == want.tobytes()
        assert [float(x) for x in ref[1 + time_field:]] == want.tolist()


@pytest.mark.parametrize("cut", [-1, 1, 29, 100])  # the frame has 28 bytes
def test_a_frame_of_the_wrong_length_is_rejected(cut):
    d = Direction(signals=("v_out", "i_out"), time=True)
    good = d.pack(3, 0.1, [1.0, 2.0])
    bad = good[:cut] if cut < len(good) else good + bytes(cut - len(good))
    with pytest.raises(ProtocolError) as e:
        d.unpack(bad)
    assert e.value.reason == "frame-length" and f"{len(bad)} bytes" in str(e.value)


def test_codec_decodes_samples_reorders_and_counts_rejections():
    lay = _layout(sample={"signals": list(reversed(MEAS)), "time": True})
    c = FixedCodec(lay, ACT)
    c.set_meas_names(MEAS)
    vals = [6.0, 5.0, 4.0, 3.0, 2.0, 1.0]  # v_dc first ... v_out last
    s = c.decode(struct.pack("<Id6d", 4, 0.5, *vals))
    assert isinstance(s, P.Sample) and s.seq == 4 and s.t_sim_s == 0.5
    assert s.meas.tolist() == [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]  # in the plant's order
    rejects = P.RejectCounter()
    for bad in (b"", struct.pack("<Id6d", 5, 0.5, *vals)[:-1],
                struct.pack("<Id6d", 5, math.nan, *vals),          # time: not finite
                struct.pack("<Id6d", START, 0.5, *vals)):          # a reserved counter
        with pytest.raises(ProtocolError) as e:
            c.decode(bad)
        rejects.add(e.value.reason, str(e.value))
    assert rejects.counts == {"frame-length": 2, "not-finite": 1, "out-of-range": 1}
    # a NaN measurement is passed on, as on the msgpack path: the non-finite interlock trips
    s = c.decode(struct.pack("<Id6d", 6, 0.6, math.nan, *vals[1:]))
    assert math.isnan(s.meas[-1])


def test_sequence_gap_of_fixed_frames_is_counted():
    c = FixedCodec(_layout(), ACT)
    seq = P.SequenceTracker()
    for k in (0, 1, 2, 5, 6, 6, 4):
        seq.check(c.decode(struct.pack("<I6d", k, *range(6))).seq)
    assert (seq.lost, seq.gaps, seq.duplicates, seq.out_of_order) == (2, 1, 1, 1)


def test_without_a_counter_samples_are_numbered_by_arrival():
    c = FixedCodec(_layout(sample={"counter": False}), ACT)
    assert [c.decode(struct.pack("<6d", *range(6))).seq for _ in range(3)] == [0, 1, 2]


def test_actuation_frame_and_requests():
    lay = _layout(actuation={"signals": ["interlock_word", "u", "output_enable"], "time": True})
    c = FixedCodec(lay, ACT)
    c.ts, c.safe_u = 1e-4, np.array([0.0])
    word = (1 << 50) | (1 << 3)
    got = c.encode_actuation(3, np.array([412.5]), word, True)
    assert got == struct.pack("<Idddd", 3, 3 * 1e-4, float(word), 412.5, 1.0)  # time: counter * Ts
    assert c.encode_actuation(3, np.array([1.0]), 0, False)[-8:] == struct.pack("<d", 0.0)
    assert c.encode(P.Heartbeat(seq=0, t_sender_s=0.0))[:4] == struct.pack("<I", START)
    assert c.encode(P.Stop(reason="x"))[:4] == struct.pack("<I", END)
    # the simulator's side reads it back
    sim = SimCodec(lay, MEAS, ACT)
    assert sim.actuation(got)[0] == 3 and sim.actuation(got)[1].tolist() == [412.5]
    assert sim.actuation(got)[2] is True
    with pytest.raises(ProtocolError) as e:
        sim.actuation(struct.pack("<Idddd", 4, 0.0, 0.0, math.inf, 1.0))
    assert e.value.reason == "not-finite"
    assert sim.sample(2, 2e-4, np.arange(6.0)) == struct.pack("<I6d", 2, *range(6))


@pytest.mark.parametrize("change, words", [
    ({"sample": {"signals": ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc", "v_outt"]}},
     ["unknown signal 'v_outt'", "did you mean 'v_out'"]),
    ({"sample": {"signals": ["v_out", "v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc"]}},
     ["'v_out' is listed twice"]),
    ({"sample": {"signals": ["v_out"]}}, ["lacks 'i_out'"]),
    ({"type": "float16"}, ["type = 'float16'", "'float32', 'float64'"]),
    ({"actuation": {"signals": ["u"], "byte_order": "middle"}},
     ["actuation.byte_order = 'middle'", "'little', 'big'"]),
    ({"actuation": {"signals": ["u", "interlock_word"], "type": "float32"}},
     ["'interlock_word' needs type = 'float64'"]),
    ({"actuation": {"signals": ["u"], "counter": 1}}, ["actuation.counter = 1 is not true or false"]),
    ({"actuation": {"signal": ["u"]}}, ["unknown key 'actuation.signal'", "did you mean 'signals'"]),
    ({"sampel": {}}, ["unknown key 'sampel'", "did you mean 'sample'"]),
])
def test_bad_layouts_are_one_clear_error(change, words):
    table = {"sample": {"signals": MEAS}, "actuation": {"signals": ["u"]}}
    table.update(change)
    with pytest.raises(LayoutError) as e:
        layout_from_table(table, MEAS, ACT, "frames.toml")
    msg = str(e.value)
    assert msg.startswith("frames.toml: ") and "\n" not in msg
    for w in words:
        assert w in msg, msg


def test_lockstep_needs_both_counters():
    lay = _layout(sample={"counter": False})
    lay.require_counters("free-running")  # free-running numbers samples by arrival
    with pytest.raises(LayoutError, match="sample.counter = false, but lockstep"):
        lay.require_counters("lockstep")


def test_doc_byte_examples_are_struct_and_our_frames():
    """docs/protocol.md section 16.5: each hex dump is what Python's struct module packs for
    the format and values its marker states, and what Direction.pack sends."""
    import re
    from pathlib import Path
    doc = (Path(__file__).resolve().parents[3] / "docs" / "protocol.md").read_text()
    section = doc.split("## 16. Fixed-layout datagrams", 1)[1]
    found = re.findall(r"<!-- fixed-layout bytes: (\S+) ([^>]*?) -->\n```\n(.*?)```", section,
                       flags=re.S)
    assert len(found) == 4
    for fmt, values, dump in found:
        data = bytes.fromhex("".join(line[6:] for line in dump.splitlines()))
        offsets = [int(line[:4], 16) for line in dump.splitlines()]
        assert offsets == list(range(0, len(data), 16))
        nums = [float(x) for x in values.split()]
        assert data == struct.pack(fmt, int(nums[0]), *nums[1:]), fmt   # reference: struct
        order, counter, timed, count, kind = re.fullmatch(r"([<>])(I?)(d?)(\d*)([df])",
                                                          fmt).groups()
        d = Direction(signals=tuple(f"s{i}" for i in range(int(count or 1))),
                      type={"d": "float64", "f": "float32"}[kind],
                      byte_order={"<": "little", ">": "big"}[order], counter=bool(counter),
                      time=bool(timed))
        assert d.format == fmt and d.size == len(data)
        t = nums[1] if timed else None
        assert d.pack(int(nums[0]), t, nums[1 + bool(timed):]) == data


def test_simulator_side_takes_large_finite_values_and_refuses_non_finite_ones():
    lay = _layout(actuation={"signals": ["u", "output_enable"]})
    sim = SimCodec(lay, MEAS, ACT)
    big = struct.pack("<Idd", 1, 1.5e308, 1.0)  # finite, although u + enable overflows
    assert sim.actuation(big)[1].tolist() == [1.5e308]
    for bad in (math.nan, math.inf, -math.inf):
        with pytest.raises(ProtocolError):
            sim.actuation(struct.pack("<Idd", 1, bad, 1.0))
