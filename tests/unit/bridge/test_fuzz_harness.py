"""The optional fuzzing harness tools/fuzz_decoder.py: its per-input check runs here without
atheris, so the harness cannot rot unnoticed.

- Golden frames: the hand-derived MessagePack bytes of test_protocol.py (MessagePack
  specification, cross-checked with the msgpack reference library); the check must accept
  each and find the same frame.
- Random bytes, golden frames with bytes changed, and random MessagePack values packed by the
  reference library (hypothesis): the check must raise nothing, since the decoder's contract
  (docs/protocol.md section 12, bridge/protocol.py) is ProtocolError and nothing else for any
  bytes.
- The check must fail when the decoder breaks its contract (a decoder made to raise another
  exception type, an encoder made to lose a field).
"""
import importlib.util
import subprocess
import sys
from pathlib import Path

import msgpack
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from hilrig.bridge import protocol as P
from tests.unit.bridge.test_protocol import GOLDEN, GOLDEN_IDS

ROOT = Path(__file__).resolve().parents[3]
TOOL = ROOT / "tools" / "fuzz_decoder.py"


def _load():
    spec = importlib.util.spec_from_file_location("fuzz_decoder", TOOL)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


FUZZ = _load()
GOLDEN_BYTES = [g[1] for g in GOLDEN]
QUICK = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@pytest.mark.parametrize("frame, golden, as_list", GOLDEN, ids=GOLDEN_IDS)
def test_golden_frames_pass_the_check_and_decode_to_their_frame(frame, golden, as_list):
    assert FUZZ.check_input(golden) == frame


def test_the_seed_frames_are_valid_frames_and_streams():
    seeds = FUZZ.seed_frames()
    single = [s for s in seeds if FUZZ.check_input(s) is not None]
    # every frame type is among the seeds that decode alone
    assert {type(P.decode(s)) for s in single} == {P.Hello, P.Welcome, P.Sample, P.Actuation,
                                                    P.Heartbeat, P.Stop, P.Error}
    # the rest are streams: several frames, or one cut short, which a FrameReader takes
    for s in seeds:
        if s not in single:
            reader = P.FrameReader()
            assert reader.feed(s) or reader.pending


@QUICK
@given(st.binary(max_size=400))
def test_random_bytes_raise_nothing(data):
    FUZZ.check_input(data)


@QUICK
@given(st.sampled_from(GOLDEN_BYTES), st.lists(st.tuples(st.integers(0, 200), st.integers(0, 255)),
                                               max_size=4), st.integers(0, 60))
def test_golden_frames_with_bytes_changed_raise_nothing(golden, edits, cut):
    b = bytearray(golden)
    for pos, val in edits:
        b[pos % len(b)] = val
    FUZZ.check_input(bytes(b[:len(b) - cut % len(b)]))
    FUZZ.check_input(bytes(b) + golden)  # two frames in one message: a stream for the reader


_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-2**64, 2**64 - 1) | st.floats()
    | st.text(max_size=12) | st.binary(max_size=24),
    lambda inner: st.lists(inner, max_size=9) | st.dictionaries(st.text(max_size=4), inner, max_size=3),
    max_leaves=20)


@QUICK
@given(st.integers(0, 9), _VALUES)
def test_random_msgpack_frames_raise_nothing(ftype, rest):
    # [type, ...] arrays packed by the reference library reach the field checks
    body = rest if isinstance(rest, list) else [rest]
    try:
        data = msgpack.packb([ftype, *body], use_bin_type=True)
    except (OverflowError, ValueError):  # out of msgpack's own range: not a wire input
        return
    FUZZ.check_input(data)


def test_the_check_fails_when_the_decoder_breaks_its_contract(monkeypatch):
    """A check that cannot fail guards nothing: break the decoder two ways and see it fail."""
    real_decode, real_encode = P.decode, P.encode

    def decode_raising(data, **kw):
        if memoryview(data).nbytes and bytes(data)[0] == 0x92:  # STOP frames
            raise KeyError("not a ProtocolError")
        return real_decode(data, **kw)

    monkeypatch.setattr(P, "decode", decode_raising)
    with pytest.raises(AssertionError, match="only ProtocolError is allowed"):
        FUZZ.check_input(GOLDEN_BYTES[3])
    monkeypatch.setattr(P, "decode", real_decode)

    def encode_losing_the_reason(frame):
        if isinstance(frame, P.Stop):
            return real_encode(P.Stop(reason=""))
        return real_encode(frame)

    monkeypatch.setattr(P, "encode", encode_losing_the_reason)
    with pytest.raises(AssertionError, match="round trip changed the frame"):
        FUZZ.check_input(GOLDEN_BYTES[3])


def test_without_atheris_it_says_how_to_install_it_and_exits_2(monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "atheris", None)  # import atheris -> ImportError
    assert FUZZ.main(["fuzz_decoder.py", "-runs=10"]) == 2
    err = capsys.readouterr().err
    assert "pip install atheris" in err and "not require" in err


def test_a_bounded_fuzz_run_passes_when_atheris_is_installed(tmp_path):
    pytest.importorskip("atheris")
    p = subprocess.run([sys.executable, str(TOOL), "-runs=3000", "-seed=1"], cwd=tmp_path,
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stderr[-3000:]
    assert "Done 3000 runs" in p.stderr
    assert not list(tmp_path.glob("crash-*"))
