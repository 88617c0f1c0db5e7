"""Wire protocol of the soft-HIL bridge: frames, codec, stream reader, sequence and reject counters.

docs/protocol.md is the authority for the wire format; this module implements it and is kept
transport-independent (the same bytes go over ZeroMQ messages, datagrams or a byte stream).

Every frame is one msgpack array ``[type, field, ...]``. Hot-path vectors (measurements,
actuations) travel as msgpack bin holding little-endian IEEE-754 float64 values, never as
per-signal maps, because a map per signal costs several times more to pack and unpack.

The decoder checks every field of every frame and raises only :class:`ProtocolError` for any input
bytes, with ``.reason`` set to a short code that the session counts (:class:`RejectCounter`) and
turns into the code of an ERROR frame (:func:`error_code`). The encoder applies the same checks
(except the protocol-version equality, so a tool can produce a frame of another version), so
this end never sends what a conforming peer must reject.

Limits of validity
------------------
The protocol carries no authentication or encryption of its own; that is the transport's job
(CurveZMQ on ZeroMQ, loopback-only by default). Sequence numbers detect loss, duplication and
reordering but do not repair them: what to do about a gap is the session's decision.
"""
from __future__ import annotations

import hashlib
import math
import sys
import numbers
from collections import deque
from dataclasses import dataclass, fields
from typing import ClassVar, Union

import msgpack
import numpy as np

from hilrig.bridge.errors import ProtocolError

__all__ = [
    "PROTOCOL_VERSION", "HELLO", "WELCOME", "SAMPLE", "ACTUATION", "HEARTBEAT", "STOP", "ERROR",
    "FRAME_NAMES", "MODES", "MAX_FRAME_BYTES", "MAX_SIGNALS", "MAX_NAME", "MAX_TEXT", "MAX_SEQ",
    "MAX_TICK_PERIOD_S", "MAP_HASH_BYTES", "PERIOD_RTOL", "ERR_VERSION", "ERR_MODE", "ERR_MAP",
    "ERR_PERIOD", "ERR_MALFORMED", "ERR_UNEXPECTED", "ERROR_NAMES", "ProtocolError",
    "Hello", "Welcome", "Sample", "Actuation", "Heartbeat", "Stop", "Error", "Frame",
    "encode", "encode_sample", "encode_actuation", "decode", "map_hash", "handshake_check",
    "error_code", "error_frame",
    "FrameReader", "SequenceTracker", "RejectCounter",
]

# ---------------------------------------------------------------------------------------------
# Constants (docs/protocol.md states each of them; a test checks the doc against these)

#: The one protocol-version constant. Bump it for any change a peer of the old version would
#: misread; the doc's "Protocol version:" line must say the same number.
PROTOCOL_VERSION = 1

HELLO, WELCOME, SAMPLE, ACTUATION, HEARTBEAT, STOP, ERROR = 1, 2, 3, 4, 5, 6, 7
FRAME_NAMES = {HELLO: "HELLO", WELCOME: "WELCOME", SAMPLE: "SAMPLE", ACTUATION: "ACTUATION",
               HEARTBEAT: "HEARTBEAT", STOP: "STOP", ERROR: "ERROR"}

MODES = ("lockstep", "free-running")

MAX_FRAME_BYTES = 65536      # whole encoded frame [bytes]
MAX_SIGNALS = 256            # entries per signal map and float64 values per vector [-]
MAX_NAME = 64                # UTF-8 bytes of a signal name or unit [bytes]
MAX_TEXT = 1024              # UTF-8 bytes of a reason text or simulator name [bytes]
MAX_SEQ = 2 ** 63            # sequence numbers are in [0, MAX_SEQ) so they fit a signed int64
MAX_TICK_PERIOD_S = 10.0     # tick period must be in (0, MAX_TICK_PERIOD_S] s
MAP_HASH_BYTES = 8           # length of the map hash [bytes]
PERIOD_RTOL = 1e-12          # relative tolerance of the tick-period agreement [-]
_UINT_LIMIT = 2 ** 64        # msgpack's largest unsigned integer + 1

# ERROR frame codes
ERR_VERSION, ERR_MODE, ERR_MAP, ERR_PERIOD, ERR_MALFORMED, ERR_UNEXPECTED = 1, 2, 3, 4, 5, 6
ERROR_NAMES = {ERR_VERSION: "version", ERR_MODE: "mode", ERR_MAP: "map", ERR_PERIOD: "period",
               ERR_MALFORMED: "malformed", ERR_UNEXPECTED: "unexpected frame"}
_REASON_TO_CODE = {"version": ERR_VERSION, "mode": ERR_MODE, "map": ERR_MAP,
                   "period": ERR_PERIOD, "unexpected": ERR_UNEXPECTED}

# Outer limits for the msgpack decoder itself. They bound the memory a hostile frame can make it
# allocate before our field checks run (an array header claiming 2**32 elements would otherwise
# be allocated up front); they sit above every field's own cap so that an over-cap field is
# reported by its precise reason ("too-many-signals", "too-long") rather than as "malformed".
_DECODER_LIMITS = dict(max_str_len=MAX_FRAME_BYTES, max_bin_len=MAX_FRAME_BYTES,
                       max_array_len=2 * MAX_SIGNALS, max_map_len=32, max_ext_len=MAX_FRAME_BYTES)
_UNPACK_OPTIONS = dict(raw=False, use_list=True, strict_map_key=True, **_DECODER_LIMITS)

_F8 = np.dtype("<f8")  # wire layout of vector elements: little-endian IEEE-754 binary64
_BIG_ENDIAN_HOST = sys.byteorder != "little"


# ---------------------------------------------------------------------------------------------
# Normalisation used by the frame constructors (so numpy scalars and lists are accepted)

def _set(obj, name, value):
    object.__setattr__(obj, name, value)


def _as_uint(v):
    """numpy and other integral scalars become int; bool and everything else are left for the
    field check to reject."""
    if type(v) is int or isinstance(v, bool) or not isinstance(v, numbers.Integral):
        return v
    return int(v)


def _as_float(v):
    """numpy floats and Python ints become float; bool and non-numbers are left for the check."""
    if type(v) is float or isinstance(v, bool) or not isinstance(v, numbers.Real):
        return v
    return float(v)


def _as_vector(v, where):
    """A read-only 1-D float64 array from any sequence of real numbers."""
    if type(v) is np.ndarray and v.ndim == 1 and v.dtype.kind in "fiu":
        if v.dtype == np.float64 and not v.flags.writeable:
            return v  # already a frame's vector (immutable): share it
        a = v.astype(np.float64)  # own copy: the frame is immutable
        a.flags.writeable = False
        return a
    try:
        a = np.asarray(v)
    except (TypeError, ValueError) as e:  # ragged nesting and the like
        raise ProtocolError("bad-type", f"{where}: expected a sequence of floats ({e})") from None
    if a.dtype.kind not in "fiu":
        raise ProtocolError("bad-type", f"{where}: expected a sequence of floats, got elements of "
                                        f"dtype {a.dtype}")
    if a.ndim != 1:
        raise ProtocolError("bad-type", f"{where}: expected a 1-D sequence of floats, got an "
                                        f"array of shape {a.shape}")
    a = np.array(a, dtype=np.float64)  # own copy: the frame is immutable
    a.flags.writeable = False
    return a


def _as_map(m):
    if isinstance(m, (list, tuple)):
        return tuple(tuple(e) if isinstance(e, (list, tuple)) else e for e in m)
    return m


def _as_bytes(b):
    return bytes(b) if isinstance(b, (bytearray, memoryview)) else b


def _vector_bytes(v) -> bytes:
    return np.ascontiguousarray(v, dtype=_F8).tobytes()


def _vector_wire(v, where) -> bytes:
    """Wire bytes of a vector given as any float sequence (no copy kept)."""
    if not (type(v) is np.ndarray and v.ndim == 1 and v.dtype.kind in "fiu"):
        v = _as_vector(v, where)
    return v.astype(_F8, copy=False).tobytes()


# ---------------------------------------------------------------------------------------------
# Frames

@dataclass(frozen=True)
class Hello:
    """Runtime -> simulator: opens a session (docs/protocol.md, "HELLO").

    Parameters
    ----------
    version : int
        Protocol version the runtime speaks.
    tick_period_s : float
        Tick period [s], in (0, 10].
    mode : str
        ``"lockstep"`` or ``"free-running"``.
    meas_map, act_map : sequence of (name, unit)
        Measurement (simulator -> runtime) and actuation (runtime -> simulator) signals, in
        vector order. Stored as tuples of tuples.
    map_hash : bytes
        :func:`map_hash` of the two maps (8 bytes).
    """

    version: int
    tick_period_s: float
    mode: str
    meas_map: tuple
    act_map: tuple
    map_hash: bytes
    TYPE: ClassVar[int] = HELLO

    def __post_init__(self):
        _set(self, "version", _as_uint(self.version))
        _set(self, "tick_period_s", _as_float(self.tick_period_s))
        _set(self, "meas_map", _as_map(self.meas_map))
        _set(self, "act_map", _as_map(self.act_map))
        _set(self, "map_hash", _as_bytes(self.map_hash))

    @classmethod
    def build(cls, tick_period_s: float, mode: str, meas_map, act_map) -> "Hello":
        """A HELLO of this protocol version, with the map hash computed from the maps."""
        return cls(PROTOCOL_VERSION, tick_period_s, mode, meas_map, act_map,
                   map_hash(meas_map, act_map))


@dataclass(frozen=True)
class Welcome:
    """Simulator -> runtime: accepts a HELLO, stating the simulator's own settings.

    Same fields as :class:`Hello` plus ``simulator_name`` (free text, at most 1024 bytes).
    """

    version: int
    tick_period_s: float
    mode: str
    meas_map: tuple
    act_map: tuple
    map_hash: bytes
    simulator_name: str
    TYPE: ClassVar[int] = WELCOME

    def __post_init__(self):
        Hello.__post_init__(self)

    @classmethod
    def build(cls, tick_period_s: float, mode: str, meas_map, act_map,
              simulator_name: str) -> "Welcome":
        """A WELCOME of this protocol version, with the map hash computed from the maps."""
        return cls(PROTOCOL_VERSION, tick_period_s, mode, meas_map, act_map,
                   map_hash(meas_map, act_map), simulator_name)


@dataclass(frozen=True, eq=False)
class Sample:
    """Simulator -> runtime: the measurements of one tick.

    Parameters
    ----------
    seq : int
        Sample sequence number, 0 for the first sample, +1 per tick.
    t_sim_s : float
        Simulator time of the sample [s].
    meas : array of float64
        Measurements in ``meas_map`` order (read-only; any float sequence is accepted).

    Equality compares the vector bit for bit, so NaN equals the same NaN.
    """

    seq: int
    t_sim_s: float
    meas: np.ndarray
    TYPE: ClassVar[int] = SAMPLE

    def __post_init__(self):
        _set(self, "seq", _as_uint(self.seq))
        _set(self, "t_sim_s", _as_float(self.t_sim_s))
        _set(self, "meas", _as_vector(self.meas, "SAMPLE.meas"))

    def __eq__(self, other):
        if other.__class__ is not self.__class__:
            return NotImplemented
        return (self.seq == other.seq and self.t_sim_s == other.t_sim_s
                and _vector_bytes(self.meas) == _vector_bytes(other.meas))

    def __hash__(self):
        return hash((self.seq, self.t_sim_s, _vector_bytes(self.meas)))


@dataclass(frozen=True, eq=False)
class Actuation:
    """Runtime -> simulator: the answer to one sample.

    Parameters
    ----------
    seq : int
        The ``seq`` of the SAMPLE this actuation answers.
    u : array of float64
        Actuation values in ``act_map`` order; every value finite (read-only).
    interlock_word : int
        The runtime's interlock word (0 = nothing tripped), for the simulator's record.
    output_enable : bool
        False when the runtime commands the power stage off.
    """

    seq: int
    u: np.ndarray
    interlock_word: int
    output_enable: bool
    TYPE: ClassVar[int] = ACTUATION

    def __post_init__(self):
        _set(self, "seq", _as_uint(self.seq))
        _set(self, "u", _as_vector(self.u, "ACTUATION.u"))
        _set(self, "interlock_word", _as_uint(self.interlock_word))
        if isinstance(self.output_enable, np.bool_):
            _set(self, "output_enable", bool(self.output_enable))

    def __eq__(self, other):
        if other.__class__ is not self.__class__:
            return NotImplemented
        return (self.seq == other.seq and self.interlock_word == other.interlock_word
                and self.output_enable is other.output_enable
                and _vector_bytes(self.u) == _vector_bytes(other.u))

    def __hash__(self):
        return hash((self.seq, _vector_bytes(self.u), self.interlock_word, self.output_enable))


@dataclass(frozen=True)
class Heartbeat:
    """Either way: liveness (and, from the runtime right after WELCOME, "ready")."""

    seq: int
    t_sender_s: float
    TYPE: ClassVar[int] = HEARTBEAT

    def __post_init__(self):
        _set(self, "seq", _as_uint(self.seq))
        _set(self, "t_sender_s", _as_float(self.t_sender_s))


@dataclass(frozen=True)
class Stop:
    """Either way: orderly end of the session, with a reason text."""

    reason: str
    TYPE: ClassVar[int] = STOP


@dataclass(frozen=True)
class Error:
    """Either way: the session ends because of an error (code, reason text)."""

    code: int
    reason: str
    TYPE: ClassVar[int] = ERROR

    def __post_init__(self):
        _set(self, "code", _as_uint(self.code))


Frame = Union[Hello, Welcome, Sample, Actuation, Heartbeat, Stop, Error]


# ---------------------------------------------------------------------------------------------
# Field checks, shared by the decoder and the encoder

def _wire_name(v) -> str:
    """The msgpack family a decoded value came from, for messages."""
    if v is None:
        return "nil"
    if isinstance(v, bool):
        return "bool"
    if isinstance(v, int):
        return "int"
    if isinstance(v, float):
        return "float"
    if isinstance(v, str):
        return "str"
    if isinstance(v, (bytes, bytearray)):
        return "bin"
    if isinstance(v, (list, tuple)):
        return "array"
    if isinstance(v, dict):
        return "map"
    if isinstance(v, (msgpack.ExtType, msgpack.Timestamp)):
        return "ext"
    return type(v).__name__


def _show(v) -> str:
    text = repr(v)
    return text if len(text) <= 48 else text[:45] + "..."


def _uint(v, where, limit=_UINT_LIMIT):
    if type(v) is not int:
        raise ProtocolError("bad-type", f"{where}: expected an unsigned int, got "
                                        f"{_wire_name(v)} {_show(v)}")
    if not 0 <= v < limit:
        raise ProtocolError("out-of-range", f"{where} = {v} is outside [0, {limit - 1}]")
    return v


def _float(v, where):
    if type(v) is not float:
        hint = "; send it as a float 64 (e.g. 0.0, not 0)" if type(v) is int else ""
        raise ProtocolError("bad-type", f"{where}: expected a float, got "
                                        f"{_wire_name(v)} {_show(v)}{hint}")
    if not math.isfinite(v):
        raise ProtocolError("not-finite", f"{where} = {v!r} s is not finite")
    return v


def _period(v, where):
    v = _float(v, where)
    if not 0.0 < v <= MAX_TICK_PERIOD_S:
        raise ProtocolError("out-of-range", f"{where} = {v!r} s is outside (0, "
                                            f"{MAX_TICK_PERIOD_S:g}] s")
    return v


def _bool(v, where):
    if type(v) is not bool:
        raise ProtocolError("bad-type", f"{where}: expected a bool (true/false), got "
                                        f"{_wire_name(v)} {_show(v)}")
    return v


def _text(v, where, cap, nonempty=False):
    if type(v) is not str:
        raise ProtocolError("bad-type", f"{where}: expected a str, got {_wire_name(v)} {_show(v)}")
    try:
        size = len(v.encode("utf-8"))
    except UnicodeEncodeError:  # lone surrogates cannot be sent as UTF-8
        raise ProtocolError("bad-value", f"{where} = {_show(v)} is not valid UTF-8 text") from None
    if size > cap:
        raise ProtocolError("too-long", f"{where} is {size} bytes of UTF-8, at most {cap} allowed")
    if nonempty and not v:
        raise ProtocolError("bad-value", f"{where} is empty")
    return v


def _mode(v, where):
    _text(v, where, MAX_NAME)
    if v not in MODES:
        raise ProtocolError("mode", f"{where} = {v!r} is not one of {', '.join(MODES)}")
    return v


def _sigmap(v, where):
    if not isinstance(v, (list, tuple)):
        raise ProtocolError("bad-type", f"{where}: expected an array of [name, unit], got "
                                        f"{_wire_name(v)} {_show(v)}")
    if len(v) > MAX_SIGNALS:
        raise ProtocolError("too-many-signals", f"{where} lists {len(v)} signals, at most "
                                                f"{MAX_SIGNALS} allowed")
    out, seen = [], set()
    for i, entry in enumerate(v):
        if not isinstance(entry, (list, tuple)):
            raise ProtocolError("bad-type", f"{where}[{i}]: expected an array [name, unit], got "
                                            f"{_wire_name(entry)} {_show(entry)}")
        if len(entry) != 2:
            raise ProtocolError("arity", f"{where}[{i}] has {len(entry)} elements, expected 2 "
                                         f"[name, unit]")
        name = _text(entry[0], f"{where}[{i}].name", MAX_NAME, nonempty=True)
        unit = _text(entry[1], f"{where}[{i}].unit", MAX_NAME)
        if name in seen:
            raise ProtocolError("bad-value", f"{where}[{i}]: signal name {name!r} appears twice")
        seen.add(name)
        out.append((name, unit))
    return tuple(out)


def _vector(v, where, n, n_label, finite):
    if type(v) is not bytes:
        raise ProtocolError("bad-type", f"{where}: expected a bin of float64 values, got "
                                        f"{_wire_name(v)} {_show(v)}")
    size = len(v)
    if size % 8:
        raise ProtocolError("vector-bytes", f"{where} is {size} bytes, not a multiple of 8 "
                                            f"(8 bytes per float64)")
    count = size // 8
    if count > MAX_SIGNALS:
        raise ProtocolError("too-many-signals", f"{where} holds {count} values, at most "
                                                f"{MAX_SIGNALS} allowed")
    if n is not None and count != n:
        raise ProtocolError("vector-length", f"{where} holds {count} values, the signal map "
                                             f"agreed in the handshake has {n_label} = {n}")
    a = np.frombuffer(v, dtype=_F8)
    if _BIG_ENDIAN_HOST:  # convert to native order once, so kernels get plain float64
        a = a.astype(np.float64)
        a.flags.writeable = False
    # math.isfinite over a list is several times faster than np.isfinite for the few values
    # of a typical frame, and this runs every tick
    if finite and not all(map(math.isfinite, a.tolist())):
        bad = next(i for i, x in enumerate(a.tolist()) if not math.isfinite(x))
        raise ProtocolError("not-finite", f"{where}[{bad}] = {a[bad]!r} is not finite")
    return a


def _hash_field(v, where, meas, act):
    if type(v) is not bytes:
        raise ProtocolError("bad-type", f"{where}: expected a bin of {MAP_HASH_BYTES} bytes, got "
                                        f"{_wire_name(v)} {_show(v)}")
    if len(v) != MAP_HASH_BYTES:
        raise ProtocolError("bad-value", f"{where} is {len(v)} bytes, expected {MAP_HASH_BYTES}")
    own = map_hash(meas, act)
    if v != own:
        raise ProtocolError("map", f"{where} = 0x{v.hex()} does not match the hash of the frame's "
                                   f"own maps, 0x{own.hex()}; compute it as docs/protocol.md "
                                   f"'Map hash' says")
    return v


def _p_hello(o, n_meas, n_act):
    meas = _sigmap(o[4], "HELLO.meas_map")
    act = _sigmap(o[5], "HELLO.act_map")
    return (_uint(o[1], "HELLO.version"), _period(o[2], "HELLO.tick_period_s"),
            _mode(o[3], "HELLO.mode"), meas, act, _hash_field(o[6], "HELLO.map_hash", meas, act))


def _p_welcome(o, n_meas, n_act):
    meas = _sigmap(o[4], "WELCOME.meas_map")
    act = _sigmap(o[5], "WELCOME.act_map")
    return (_uint(o[1], "WELCOME.version"), _period(o[2], "WELCOME.tick_period_s"),
            _mode(o[3], "WELCOME.mode"), meas, act,
            _hash_field(o[6], "WELCOME.map_hash", meas, act),
            _text(o[7], "WELCOME.simulator_name", MAX_TEXT))


def _p_sample(o, n_meas, n_act):
    # measurements may be NaN or infinite (a failed sensor channel): the runtime's non-finite
    # interlock acts on them per signal, which it could not do if the frame were dropped here
    return (_uint(o[1], "SAMPLE.seq", MAX_SEQ), _float(o[2], "SAMPLE.t_sim_s"),
            _vector(o[3], "SAMPLE.meas", n_meas, "n_meas", finite=False))


def _p_actuation(o, n_meas, n_act):
    # a simulator must never apply a non-finite actuation to its plant
    return (_uint(o[1], "ACTUATION.seq", MAX_SEQ),
            _vector(o[2], "ACTUATION.u", n_act, "n_act", finite=True),
            _uint(o[3], "ACTUATION.interlock_word"), _bool(o[4], "ACTUATION.output_enable"))


def _p_heartbeat(o, n_meas, n_act):
    return _uint(o[1], "HEARTBEAT.seq", MAX_SEQ), _float(o[2], "HEARTBEAT.t_sender_s")


def _p_stop(o, n_meas, n_act):
    return (_text(o[1], "STOP.reason", MAX_TEXT),)


def _p_error(o, n_meas, n_act):
    return _uint(o[1], "ERROR.code"), _text(o[2], "ERROR.reason", MAX_TEXT)


_LAYOUT = {  # type -> (frame class, field checks)
    HELLO: (Hello, _p_hello),
    WELCOME: (Welcome, _p_welcome),
    SAMPLE: (Sample, _p_sample),
    ACTUATION: (Actuation, _p_actuation),
    HEARTBEAT: (Heartbeat, _p_heartbeat),
    STOP: (Stop, _p_stop),
    ERROR: (Error, _p_error),
}
_FIELDS = {t: tuple(f.name for f in fields(cls)) for t, (cls, _) in _LAYOUT.items()}


def _parse(obj, n_meas, n_act, decoding):
    """Check one unpacked object against the frame layouts; return its frame when decoding
    (the checked values when encoding, where no frame is needed)."""
    if not isinstance(obj, (list, tuple)):
        raise ProtocolError("not-array", f"a frame is a msgpack array [type, ...], got a "
                                         f"{_wire_name(obj)} {_show(obj)}")
    if not obj:
        raise ProtocolError("arity", "empty array: a frame starts with its type number")
    ftype = obj[0]
    if type(ftype) is not int:
        raise ProtocolError("bad-type", f"frame type: expected an unsigned int, got "
                                        f"{_wire_name(ftype)} {_show(ftype)}")
    layout = _LAYOUT.get(ftype)
    if layout is None:
        raise ProtocolError("unknown-type", f"frame type {ftype} is unknown; protocol version "
                                            f"{PROTOCOL_VERSION} has types 1-7")
    cls, parser = layout
    names = _FIELDS[ftype]
    name = FRAME_NAMES[ftype]
    if decoding and ftype in (HELLO, WELCOME) and len(obj) >= 2:
        # [type, version] keep their place in every version, so a peer of another version is
        # told so, rather than about a field layout it does not share
        version = _uint(obj[1], f"{name}.version")
        if version != PROTOCOL_VERSION:
            raise ProtocolError("version", f"{name}.version = {version}, this end speaks protocol "
                                           f"version {PROTOCOL_VERSION}; use matching versions")
    if len(obj) != len(names) + 1:
        raise ProtocolError("arity", f"{name} has {len(obj)} elements, expected "
                                     f"{len(names) + 1}: [type, {', '.join(names)}]")
    values = parser(obj, n_meas, n_act)
    if not decoding:
        return values
    # the values are checked and of their final types: set them directly, which skips the
    # normalisation in __post_init__ (this is the per-tick path)
    frame = cls.__new__(cls)
    frame.__dict__.update(zip(names, values))
    return frame


def _to_wire(frame) -> list:
    t = type(frame)
    if t is Sample:
        return [SAMPLE, frame.seq, frame.t_sim_s, _vector_bytes(frame.meas)]
    if t is Actuation:
        return [ACTUATION, frame.seq, _vector_bytes(frame.u), frame.interlock_word,
                frame.output_enable]
    if t is Heartbeat:
        return [HEARTBEAT, frame.seq, frame.t_sender_s]
    if t is Hello:
        return [HELLO, frame.version, frame.tick_period_s, frame.mode, frame.meas_map,
                frame.act_map, frame.map_hash]
    if t is Welcome:
        return [WELCOME, frame.version, frame.tick_period_s, frame.mode, frame.meas_map,
                frame.act_map, frame.map_hash, frame.simulator_name]
    if t is Stop:
        return [STOP, frame.reason]
    if t is Error:
        return [ERROR, frame.code, frame.reason]
    raise TypeError(f"encode() takes a Hello, Welcome, Sample, Actuation, Heartbeat, Stop or "
                    f"Error frame, got {type(frame).__name__}")


def _check_sizes(n_meas, n_act):
    if ((n_meas is None or (type(n_meas) is int and 0 <= n_meas <= MAX_SIGNALS))
            and (n_act is None or (type(n_act) is int and 0 <= n_act <= MAX_SIGNALS))):
        return  # the common case, checked inline because decode() runs every tick
    for label, n in (("n_meas", n_meas), ("n_act", n_act)):
        if n is not None and (type(n) is not int or not 0 <= n <= MAX_SIGNALS):
            raise ValueError(f"{label} = {n!r}: expected None or an int in [0, {MAX_SIGNALS}]")


# ---------------------------------------------------------------------------------------------
# Codec

def encode(frame: Frame) -> bytes:
    """Encode one frame to its msgpack bytes.

    Parameters
    ----------
    frame : Hello, Welcome, Sample, Actuation, Heartbeat, Stop or Error

    Returns
    -------
    bytes
        One msgpack array, at most :data:`MAX_FRAME_BYTES` long.

    Raises
    ------
    ProtocolError
        If a field breaks the protocol (the same checks as :func:`decode`, except that any
        version number may be sent), or the frame would exceed :data:`MAX_FRAME_BYTES`.
    TypeError
        If ``frame`` is not a frame object.
    """
    wire = _to_wire(frame)
    _parse(wire, None, None, decoding=False)
    data = msgpack.packb(wire, use_bin_type=True)
    if len(data) > MAX_FRAME_BYTES:
        raise ProtocolError("oversize", f"{FRAME_NAMES[wire[0]]} encodes to {len(data)} bytes, "
                                        f"at most {MAX_FRAME_BYTES} allowed; shorten the names "
                                        f"or use fewer signals")
    return data


def encode_sample(seq: int, t_sim_s: float, meas) -> bytes:
    """``encode(Sample(seq, t_sim_s, meas))`` without building the frame: the per-tick path.

    Same checks and same bytes as :func:`encode`; ``meas`` is any float sequence.
    """
    wire = [SAMPLE, _as_uint(seq), _as_float(t_sim_s), _vector_wire(meas, "SAMPLE.meas")]
    _p_sample(wire, None, None)
    return msgpack.packb(wire, use_bin_type=True)  # at most ~2.1 kB: cannot be oversize


def encode_actuation(seq: int, u, interlock_word: int, output_enable: bool) -> bytes:
    """``encode(Actuation(...))`` without building the frame: the per-tick path.

    Same checks and same bytes as :func:`encode`; ``u`` is any float sequence.
    """
    wire = [ACTUATION, _as_uint(seq), _vector_wire(u, "ACTUATION.u"), _as_uint(interlock_word),
            bool(output_enable) if isinstance(output_enable, np.bool_) else output_enable]
    _p_actuation(wire, None, None)
    return msgpack.packb(wire, use_bin_type=True)  # at most ~2.1 kB: cannot be oversize


def decode(data: bytes, *, n_meas: int | None = None, n_act: int | None = None) -> Frame:
    """Decode exactly one frame from ``data`` and check every field.

    Parameters
    ----------
    data : bytes-like
        One encoded frame, nothing before or after it.
    n_meas, n_act : int, optional
        Vector lengths agreed in the handshake; when given, a SAMPLE or ACTUATION vector of
        another length is rejected with reason ``"vector-length"``.

    Returns
    -------
    Frame
        Vectors come back as read-only float64 arrays.

    Raises
    ------
    ProtocolError
        For any bytes that are not one valid frame; ``.reason`` says why (docs/protocol.md,
        "Rejection reasons"). No other exception is raised for any input bytes.
    TypeError
        If ``data`` is not bytes-like (a programming error, not a wire error).
    """
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise TypeError(f"decode() takes bytes, got {type(data).__name__}")
    _check_sizes(n_meas, n_act)
    size = memoryview(data).nbytes
    if size > MAX_FRAME_BYTES:
        raise ProtocolError("oversize", f"frame of {size} bytes, at most {MAX_FRAME_BYTES} allowed")
    try:
        obj = msgpack.unpackb(data, **_UNPACK_OPTIONS)
    except msgpack.ExtraData as e:
        raise ProtocolError("trailing-bytes", f"{len(e.extra)} bytes follow the frame; exactly one "
                                              f"frame per message or datagram") from None
    except Exception as e:  # noqa: BLE001 -- msgpack raises several unrelated types for bad input
        raise _classify(data, e) from None
    return _parse(obj, n_meas, n_act, decoding=True)


def _classify(data, first: Exception) -> ProtocolError:
    """Tell a frame cut short from one that is not msgpack at all (rare path: errors only)."""
    size = memoryview(data).nbytes
    unpacker = msgpack.Unpacker(max_buffer_size=max(size, 1), **_UNPACK_OPTIONS)
    try:
        unpacker.feed(data)
        unpacker.unpack()
    except msgpack.OutOfData:
        return ProtocolError("truncated", f"the frame ends after {size} bytes, inside an "
                                          f"unfinished msgpack object")
    except Exception:  # noqa: BLE001 -- any failure here means malformed, reported below
        pass
    return ProtocolError("malformed", f"not a valid msgpack frame ({size} bytes): "
                                      f"{_show(str(first) or type(first).__name__)}")


def map_hash(meas_map, act_map) -> bytes:
    """First 8 bytes of SHA-256 over the msgpack encoding of ``[meas_map, act_map]``.

    Each map is encoded as an array of ``[name, unit]`` arrays of str, in the shortest msgpack
    forms (docs/protocol.md, "Map hash").

    Raises
    ------
    ProtocolError
        If a map breaks the signal-map rules (type, count, name length, duplicate names).
    """
    meas = _sigmap(_as_map(meas_map), "meas_map")
    act = _sigmap(_as_map(act_map), "act_map")
    wire = [[list(e) for e in meas], [list(e) for e in act]]
    return hashlib.sha256(msgpack.packb(wire, use_bin_type=True)).digest()[:MAP_HASH_BYTES]


# ---------------------------------------------------------------------------------------------
# Handshake and errors

def _map_difference(label, ours, theirs) -> str | None:
    for i in range(max(len(ours), len(theirs))):
        a = ours[i] if i < len(ours) else None
        b = theirs[i] if i < len(theirs) else None
        if a != b:
            show = (lambda e: "nothing" if e is None else f"{e[0]} [{e[1]}]")
            return (f"{label} entry {i}: runtime has {show(a)}, simulator has {show(b)} "
                    f"(runtime lists {len(ours)} signals, simulator {len(theirs)})")
    return None


def handshake_check(hello: Hello, welcome: Welcome) -> None:
    """Check that a WELCOME agrees with the HELLO it answers.

    Checked in this order: protocol version, mode, signal maps (names, units, order) and map
    hash, tick period (to :data:`PERIOD_RTOL` relative).

    Raises
    ------
    ProtocolError
        Reason ``"version"``, ``"mode"``, ``"map"`` or ``"period"``, with a message naming
        both values.
    """
    if hello.version != welcome.version:
        raise ProtocolError("version", f"protocol version: runtime sent {hello.version}, simulator "
                                       f"answered {welcome.version}; use matching versions")
    if hello.mode != welcome.mode:
        raise ProtocolError("mode", f"mode: runtime asked for {hello.mode!r}, simulator runs "
                                    f"{welcome.mode!r}; start both in the same mode")
    for label, ours, theirs in (("measurement map", hello.meas_map, welcome.meas_map),
                                ("actuation map", hello.act_map, welcome.act_map)):
        diff = _map_difference(label, tuple(ours), tuple(theirs))
        if diff:
            raise ProtocolError("map", f"{diff}; configure both ends with the same signals")
    if hello.map_hash != welcome.map_hash:
        raise ProtocolError("map", f"map hash: runtime sent 0x{bytes(hello.map_hash).hex()}, "
                                   f"simulator answered 0x{bytes(welcome.map_hash).hex()} for the "
                                   f"same maps; one end computes the hash wrongly")
    a, b = hello.tick_period_s, welcome.tick_period_s
    if not abs(a - b) <= PERIOD_RTOL * max(abs(a), abs(b)):
        raise ProtocolError("period", f"tick period: runtime sent {a!r} s, simulator answered "
                                      f"{b!r} s (must agree to {PERIOD_RTOL:g} relative)")


def error_code(reason: str) -> int:
    """ERROR frame code for a rejection reason: 1 version, 2 mode, 3 map, 4 period,
    6 unexpected frame, 5 (malformed) for every other reason."""
    return _REASON_TO_CODE.get(reason, ERR_MALFORMED)


def error_frame(exc: ProtocolError) -> Error:
    """The ERROR frame that answers a rejected frame or handshake (reason text clipped to
    :data:`MAX_TEXT` bytes)."""
    text = f"{exc.reason}: {exc.message}"
    text = text.encode("utf-8")[:MAX_TEXT].decode("utf-8", "ignore")
    return Error(error_code(exc.reason), text)


# ---------------------------------------------------------------------------------------------
# Stream reader

class FrameReader:
    """Split a byte stream into frames; bytes may arrive in arbitrary pieces.

    msgpack is self-delimiting, so frames on a stream are simply concatenated. Memory is bounded
    by ``max_frame``: an incomplete frame that grows past it is rejected as ``"oversize"``.

    Parameters
    ----------
    max_frame : int
        Largest frame accepted [bytes].
    n_meas, n_act : int, optional
        Vector lengths passed to the frame checks (see :func:`decode`); may be set later as
        attributes once the handshake has fixed them.

    Notes
    -----
    After any :class:`ProtocolError` the reader is closed (the stream can no longer be trusted
    to be in step): every later :meth:`feed` raises again with reason ``"reader-closed"``.
    Discard it with its connection.
    """

    def __init__(self, max_frame: int = MAX_FRAME_BYTES, *, n_meas: int | None = None,
                 n_act: int | None = None):
        if type(max_frame) is not int or max_frame < 1:
            raise ValueError(f"max_frame = {max_frame!r}: expected a positive int [bytes]")
        _check_sizes(n_meas, n_act)
        self.max_frame = max_frame
        self.n_meas = n_meas
        self.n_act = n_act
        limits = {k: min(v, max_frame) for k, v in _DECODER_LIMITS.items()}
        self._unpacker = msgpack.Unpacker(max_buffer_size=max_frame, raw=False, use_list=True,
                                          strict_map_key=True, **limits)
        self._fed = 0           # bytes fed to the unpacker so far
        self._frame_start = 0   # stream offset where the current (incomplete) frame begins
        self._error: ProtocolError | None = None

    @property
    def pending(self) -> int:
        """Bytes of an incomplete frame held so far."""
        return self._fed - self._frame_start

    def feed(self, data: bytes) -> list:
        """Add bytes; return the frames completed by them, in order (possibly none).

        Raises
        ------
        ProtocolError
            Oversize, malformed or invalid frame; the reader is closed afterwards.
        """
        if self._error is not None:
            raise ProtocolError("reader-closed", f"this reader stopped at an earlier error "
                                                 f"({self._error.reason}); use a new reader on a "
                                                 f"new connection")
        try:
            return self._feed(data)
        except ProtocolError as e:
            self._error = e
            raise

    def _feed(self, data) -> list:
        view = memoryview(data).cast("B")
        out, pos, end = [], 0, len(view)
        while pos < end:
            # never hand the unpacker more than the current frame may still grow by: its buffer
            # stays within max_frame and an oversize frame is caught at exactly max_frame + 1
            room = self.max_frame - self.pending
            if room <= 0:
                raise self._oversize()
            piece = view[pos:pos + room]
            try:
                self._unpacker.feed(piece)
            except msgpack.BufferFull:
                raise self._oversize() from None
            self._fed += len(piece)
            pos += len(piece)
            while True:
                try:
                    obj = self._unpacker.unpack()
                except msgpack.OutOfData:
                    break
                except Exception as e:  # noqa: BLE001 -- msgpack raises several types
                    raise ProtocolError("malformed", f"not a valid msgpack frame at stream offset "
                                                     f"{self._frame_start}: "
                                                     f"{_show(str(e) or type(e).__name__)}"
                                        ) from None
                self._frame_start = self._unpacker.tell()
                out.append(_parse(obj, self.n_meas, self.n_act, decoding=True))
        return out

    def _oversize(self) -> ProtocolError:
        return ProtocolError("oversize", f"frame starting at stream offset {self._frame_start} is "
                                         f"longer than {self.max_frame} bytes")


# ---------------------------------------------------------------------------------------------
# Counters

class SequenceTracker:
    """Classify the sequence numbers of one stream of frames (samples, actuations, heartbeats).

    ``check(seq)`` returns

    - ``"ok"``: the expected next number (``first`` at the start, then last + 1);
    - ``"gap"``: larger than expected; accepted, and ``lost`` grows by the numbers skipped;
    - ``"duplicate"``: equal to the last accepted number;
    - ``"out-of-order"``: smaller than the last accepted number (or than ``first``).

    Duplicates and out-of-order frames must be rejected by the caller; they do not move the
    tracker. A frame counted lost that turns up later is out-of-order and stays counted lost.

    Parameters
    ----------
    first : int
        The sequence number expected first.
    """

    def __init__(self, first: int = 0):
        self.first = first
        self.last: int | None = None
        self.accepted = 0
        self.duplicates = 0
        self.out_of_order = 0
        self.lost = 0
        self.gaps = 0

    @property
    def expected(self) -> int:
        """The sequence number that would be "ok" now."""
        return self.first if self.last is None else self.last + 1

    def check(self, seq: int) -> str:
        expected = self.expected
        if seq == expected:
            verdict = "ok"
        elif seq > expected:
            verdict = "gap"
            self.gaps += 1
            self.lost += seq - expected
        elif self.last is not None and seq == self.last:
            self.duplicates += 1
            return "duplicate"
        else:
            self.out_of_order += 1
            return "out-of-order"
        self.accepted += 1
        self.last = seq
        return verdict


    def take_run(self, first: int, count: int) -> None:
        """``check`` each of first, first + 1, ..., first + count - 1 (a run of frames taken in
        order, as the compiled lockstep path does)."""
        if count <= 0:
            return
        self.check(first)
        if count > 1 and self.last == first:
            self.last = first + count - 1
            self.accepted += count - 1
        else:
            for q in range(first + 1, first + count):
                self.check(q)


class RejectCounter:
    """Count rejected frames by reason and keep a log of the last :attr:`LOG_LENGTH`.

    Attributes
    ----------
    counts : dict of str to int
        Rejections per reason code.
    total : int
        All rejections.
    log : collections.deque of (reason, message)
        The most recent rejections, oldest first.
    """

    LOG_LENGTH = 100

    def __init__(self):
        self.counts: dict[str, int] = {}
        self.total = 0
        self.log: deque = deque(maxlen=self.LOG_LENGTH)

    def record(self, reason: Union[str, ProtocolError], message: str = "") -> None:
        """Count one rejection, given a reason code and message or a :class:`ProtocolError`."""
        if isinstance(reason, ProtocolError):
            message = message or reason.message
            reason = reason.reason
        self.counts[reason] = self.counts.get(reason, 0) + 1
        self.total += 1
        self.log.append((reason, message))

    add = record  # the same method under a second name

    def __getitem__(self, reason: str) -> int:
        return self.counts.get(reason, 0)

    def as_dict(self) -> dict:
        """Counts sorted by reason, for summaries."""
        return dict(sorted(self.counts.items()))
