#!/usr/bin/env python3
"""Coverage-guided fuzzing of the bridge's frame decoder (optional; needs the atheris package).

    .venv/bin/pip install atheris
    .venv/bin/python tools/fuzz_decoder.py -runs=200000          # bounded: a smoke check
    .venv/bin/python tools/fuzz_decoder.py -max_total_time=600   # ten minutes
    .venv/bin/python tools/fuzz_decoder.py CORPUS_DIR [libFuzzer flags ...]

Every input goes through :func:`check_input`, which needs no atheris (the unit tests call it
with hypothesis, so this harness cannot drift from the decoder unnoticed). For any bytes:

- ``decode`` raises nothing but ``ProtocolError``, with and without the vector lengths of a
  handshake;
- a frame that decodes re-encodes, and the re-encoding decodes to an equal frame whose
  encoding is the same bytes again;
- a SAMPLE or ACTUATION that decodes also decodes with its own vector length and is rejected
  as ``vector-length`` with another;
- ``FrameReader`` fed the same bytes in pieces (split where the input's own bytes say) raises
  nothing but ``ProtocolError``, yields frames that round-trip, yields the same frames as when
  fed the bytes at once, and yields exactly the one frame ``decode`` found when it found one.

Arguments go to libFuzzer through atheris (``-runs=N``, ``-max_total_time=S``, ``-max_len=N``,
corpus folders; ``-help=1`` lists them). Valid frames of every type are written to a temporary
seed folder that is read with the corpus (and removed afterwards); new inputs go to the first
corpus folder given, or to the seed folder when none is. A failing input is saved by libFuzzer
as ``crash-<sha1>`` in the working folder; rerun it with ``tools/fuzz_decoder.py crash-<sha1>``.

Exit status: libFuzzer's (0: no failure found), or 2 when atheris is not installed.
"""
from __future__ import annotations

import os
import shutil
import sys
import tempfile

P = None  # hilrig.bridge.protocol, imported on first use (under atheris' instrumentation)


def _protocol():
    global P
    if P is None:
        from hilrig.bridge import protocol
        P = protocol
    return P


def _round_trip(frame, n_meas, n_act) -> None:
    """A decoded frame re-encodes; the re-encoding decodes to an equal frame, and encodes to the
    same bytes again."""
    again = P.encode(frame)
    back = P.decode(again, n_meas=n_meas, n_act=n_act)
    if type(back) is not type(frame) or back != frame:
        raise AssertionError(f"round trip changed the frame: {frame!r} -> {back!r}")
    if P.encode(back) != again:
        raise AssertionError(f"re-encoding is not stable for {frame!r}")


def _pieces(data: bytes):
    """Split ``data`` into pieces of 1-16 bytes, the length of each taken from its first byte."""
    pos = 0
    while pos < len(data):
        step = 1 + (data[pos] & 15)
        yield data[pos:pos + step]
        pos += step


def _read(data: bytes, pieces, n_meas, n_act):
    """Frames a FrameReader yields from ``pieces``, and the ProtocolError reason that stopped
    it (None if none did)."""
    reader = P.FrameReader(n_meas=n_meas, n_act=n_act)
    frames = []
    try:
        for piece in pieces:
            frames += reader.feed(piece)
    except P.ProtocolError as exc:
        return frames, exc.reason, reader.pending
    except Exception as exc:  # noqa: BLE001 -- the property under test
        raise AssertionError(f"FrameReader.feed raised {type(exc).__name__}: {exc} "
                             f"(only ProtocolError is allowed) for {data[:64]!r}") from exc
    return frames, None, reader.pending


def _decode(data: bytes, n_meas=None, n_act=None):
    """The frame ``decode`` finds, or None when it rejects the bytes (with ProtocolError)."""
    try:
        return _decode_or_raise(data, n_meas, n_act)
    except P.ProtocolError:
        return None


def _reason(data: bytes, n_meas=None, n_act=None):
    """The ProtocolError reason ``decode`` rejects ``data`` with, or None if it accepts it."""
    try:
        _decode_or_raise(data, n_meas, n_act)
    except P.ProtocolError as exc:
        return exc.reason
    return None


def _decode_or_raise(data: bytes, n_meas, n_act):
    try:
        return P.decode(data, n_meas=n_meas, n_act=n_act)
    except P.ProtocolError:
        raise
    except Exception as exc:  # noqa: BLE001 -- the property under test
        raise AssertionError(f"decode raised {type(exc).__name__}: {exc} (only ProtocolError is "
                             f"allowed) for {data[:64]!r} (n_meas={n_meas}, n_act={n_act})") from exc


def check_input(data: bytes):
    """Check the decoder's properties on one input (see the module's docstring).

    Returns the frame ``decode`` found (without handshake lengths), or None when the bytes
    are rejected. Raises AssertionError, chained to the offending exception if there is one,
    when a property fails.
    """
    _protocol()
    data = bytes(data)
    frame = _decode(data)
    if frame is not None:
        _round_trip(frame, None, None)
        vec = frame.meas if isinstance(frame, P.Sample) else (
            frame.u if isinstance(frame, P.Actuation) else None)
        if vec is not None:
            n = len(vec)
            key = "n_meas" if isinstance(frame, P.Sample) else "n_act"
            same = _decode(data, **{key: n})
            if same != frame:
                raise AssertionError(f"{frame!r} does not decode with its own {key} = {n}")
            other = (n + 1) % (P.MAX_SIGNALS + 1)
            why = _reason(data, **{key: other})
            if why != "vector-length":
                raise AssertionError(f"{frame!r} with {key} = {other}: "
                                     f"{'accepted' if why is None else f'rejected as {why!r}'}, "
                                     f"expected the reason 'vector-length'")
    # handshake lengths from the input itself, so every length gets tried
    n_meas = data[0] % 4 if data else 2
    n_act = data[-1] % 3 if data else 1
    _decode(data, n_meas=n_meas, n_act=n_act)
    for nm, na in ((None, None), (n_meas, n_act)):
        split, why, pending = _read(data, _pieces(data), nm, na)
        whole, why_whole, _ = _read(data, [data], nm, na)
        for f in split:
            _round_trip(f, nm, na)
        if why is None and why_whole is None and split != whole:
            raise AssertionError(f"FrameReader yields {split!r} fed in pieces, {whole!r} at once")
        if (why is None) != (why_whole is None):
            raise AssertionError(f"FrameReader fed in pieces stops with {why!r}, at once with "
                                 f"{why_whole!r}")
        one = frame if nm is None else _decode(data, nm, na)
        if one is not None and (why is not None or split != [one] or pending):
            raise AssertionError(f"decode found {one!r}, FrameReader in pieces found {split!r} "
                                 f"(stopped by {why!r}, {pending} bytes pending)")
    return frame


def seed_frames() -> list[bytes]:
    """Valid frames of every type, and a few streams of them, to start the fuzzer from."""
    _protocol()
    import numpy as np
    meas = [["v_out", "V"], ["i_out", "A"]]
    act = [["u", "V"]]
    frames = []
    for mode in P.MODES:
        frames.append(P.encode(P.Hello.build(1e-4, mode, meas, act)))
        frames.append(P.encode(P.Welcome.build(1e-4, mode, meas, act, "seed")))
    frames += [P.encode_sample(0, 0.0, [1.0, -2.0]), P.encode_sample(7, 0.5, []),
               P.encode_sample(3, 1e-3, np.array([np.nan, np.inf])),
               P.encode_actuation(1, [0.5], 0, True), P.encode_actuation(2**62, [], 2**64 - 1, False),
               P.encode(P.Heartbeat(7, 0.5)), P.encode(P.Stop("done")),
               P.encode(P.Error(3, "map: the maps differ"))]
    frames += [frames[0] + frames[4], frames[4][:-1], frames[4] + frames[5] + frames[6]]
    return frames


def _fuzz(argv: list[str]) -> int:
    try:
        import atheris
    except ImportError:
        print("tools/fuzz_decoder.py needs the optional 'atheris' package, which hilrig does not "
              "require: install it into this environment with\n"
              "    .venv/bin/pip install atheris\n"
              "(a prebuilt wheel where one exists, e.g. CPython 3.11 on Linux x86-64; else pip "
              "builds it from source, which needs clang with libFuzzer). The per-input check "
              "runs without it in the unit tests (tests/unit/bridge/test_fuzz_harness.py).",
              file=sys.stderr)
        return 2
    with atheris.instrument_imports(include=["hilrig.bridge", "msgpack"]):
        _protocol()

    parent = os.getpid()
    seeds = tempfile.mkdtemp(prefix="hilrig-fuzz-seeds-")
    try:
        for i, data in enumerate(seed_frames()):
            with open(os.path.join(seeds, f"seed-{i:02d}"), "wb") as fh:
                fh.write(data)
        args = list(argv[1:])
        given = [a for a in args if not a.startswith("-")]
        # new inputs go to the first corpus folder: the caller's, else the seed folder; a single
        # file given (e.g. a crash to rerun) is run alone, without the seeds
        if not (len(given) == 1 and os.path.isfile(given[0])):
            args.append(seeds)
        print(f"fuzz_decoder: seeds in {seeds} (removed at the end)", file=sys.stderr, flush=True)
        # libFuzzer ends the process when it is done (on a failure through its exit handler,
        # which writes the crash file): fuzz in a child process and clean up in this one
        pid = os.fork()
        if pid == 0:
            atheris.Setup([argv[0], *args], check_input)
            atheris.Fuzz()  # does not return
        _, status = os.waitpid(pid, 0)
        return os.waitstatus_to_exitcode(status)
    finally:
        if os.getpid() == parent:
            shutil.rmtree(seeds, ignore_errors=True)


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv if argv is None else argv)
    if any(a in ("-h", "--help") for a in argv[1:]):
        print(__doc__)
        return 0
    return _fuzz(argv)


if __name__ == "__main__":
    sys.exit(main())
