"""The bridge's per-tick path in compiled code: the SAMPLE/ACTUATION codec and the socket calls.

A lockstep tick is one actuation out and one sample back. Done in Python, each tick paid for
decoding, checks, a call into the compiled tick with some fifty arguments and encoding: 50-90 us,
more than the transport itself. Here the common case runs inside numba, a block of ticks per
call (``bridge_chunk`` and ``sim_serve`` in the generated loop module):

- the two per-tick frames are written and read directly as msgpack bytes (docs/protocol.md);
  the readers take only the encodings our encoders write and every check of
  :func:`hilrig.bridge.protocol.decode` for them. Anything else (another frame type, another
  but valid msgpack encoding, a malformed frame) is handed back to the Python path, which
  decodes it fully, so the wire's rules have one authority;
- the socket calls go straight to the C functions: ``send``/``recv``/``sendto``/``recvfrom``/
  ``poll`` of the C library for datagrams, ``zmq_send``/``zmq_recv`` of the libzmq that pyzmq has
  loaded for ZeroMQ (on the socket's own handle, so pyzmq and the compiled code share one
  socket).

The external functions are declared by name in the compiled code and resolved when it is loaded
(libzmq's through :func:`llvmlite.binding.add_symbol`, registered when this module is imported),
so the compiled code still caches across processes.

:func:`available` says whether the fast path can be used (x86-64 for the cycle counter, libzmq
found for ZeroMQ, compiled code: not under ``NUMBA_DISABLE_JIT``).
"""
from __future__ import annotations

import ctypes
import os
import platform
import sys

import numba
import numpy as np
from llvmlite import binding as llvm
from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.core.extending import intrinsic

# frame type codes and msgpack markers (docs/protocol.md; msgpack specification)
SAMPLE, ACTUATION = 3, 4
_FIXARRAY4, _FIXARRAY5 = 0x94, 0x95
_UINT8, _UINT16, _UINT32, _UINT64 = 0xCC, 0xCD, 0xCE, 0xCF
_FLOAT64 = 0xCB
_BIN8, _BIN16, _BIN32 = 0xC4, 0xC5, 0xC6
_FALSE, _TRUE = 0xC2, 0xC3

#: transport kinds in io[IO_KIND]
KIND_ZMQ, KIND_UDP = 1, 2

# io (int64 array) slots shared by the runtime's and the stand-in's compiled loops
IO_KIND, IO_HANDLE, IO_WAIT_MS, IO_STATUS, IO_NRECV, IO_NSENT, IO_SEQ, IO_ERRNO = range(8)
IO_ADDRLEN = 8   # stand-in over UDP: length of the peer address in ``addr``
IO_MSGLEN = 9    # the true length of the last message received (it may exceed rbuf)
IO_SIZE = 10
# fio (float64 array) slots
F_INV_F, F_TOOK, F_TSIM, F_WAITED = range(4)
F_SIZE = 4

#: why a compiled block stopped (io[IO_STATUS])
ST_OK = 0        # every tick asked for ran
ST_END = 1       # the run ends after the last tick (collapse)
ST_RETRY = 2     # sent; no reply within one try (datagrams: resend) / a socket error
ST_PENDING = 3   # sent; the wait was interrupted (a signal): keep waiting, do not resend
ST_TIMEOUT = 4   # sent; no reply within the transport's whole timeout (ZeroMQ)
ST_FRAME = 5     # a frame arrived that the compiled path does not take: rbuf[:io[IO_NRECV]]
ST_SENDFAIL = 6  # the frame could not be handed to the transport
ST_NONFINITE = 7  # stand-in: the plant state became non-finite on this actuation
ST_IDLE = 8      # stand-in: nothing arrived within io[IO_WAIT_MS]

EAGAIN, EINTR = 11, 4
POLLIN = 1

# ---------------------------------------------------------------------------------------------
# External functions

_I32, _I64 = ir.IntType(32), ir.IntType(64)
_P8 = ir.IntType(8).as_pointer()


def _libzmq_path() -> str | None:
    """The libzmq shared library that pyzmq has loaded into this process."""
    import zmq  # noqa: F401  (loads libzmq)
    try:
        with open("/proc/self/maps") as fh:
            for line in fh:
                path = line.rsplit(None, 1)[-1]
                if os.path.basename(path).startswith("libzmq") and ".so" in path:
                    return path
    except OSError:
        return None
    return None


def _register_libzmq() -> bool:
    path = _libzmq_path()
    if path is None:
        return False
    try:
        lib = ctypes.CDLL(path)
        for name in ("zmq_send", "zmq_recv", "zmq_errno"):
            llvm.add_symbol("hilrig_" + name, ctypes.cast(getattr(lib, name), ctypes.c_void_p).value)
    except (OSError, AttributeError):
        return False
    return True


HAVE_ZMQ = sys.platform.startswith("linux") and _register_libzmq()


def available(kind: int) -> bool:
    """True when the compiled per-tick path can serve this transport kind here."""
    if numba.config.DISABLE_JIT or os.environ.get("HILRIG_BRIDGE_PYTHON"):
        return False
    if platform.machine().lower() not in ("x86_64", "amd64") or not sys.platform.startswith("linux"):
        return False
    return kind == KIND_UDP or (kind == KIND_ZMQ and HAVE_ZMQ)


def _ptr(context, builder, aryty, ary, offset=None):
    data = context.make_array(aryty)(context, builder, ary).data
    p = builder.bitcast(data, _P8)
    return p if offset is None else builder.gep(p, [offset])


def _call(builder, name, ret, argtys, args):
    fn = cgutils.get_or_insert_function(builder.module, ir.FunctionType(ret, argtys), name)
    return builder.call(fn, args)


def _buffer_call(c_name: str, ret, handle_is_pointer: bool, doc: str):
    """An intrinsic f(handle, buf, n) -> int64 that calls the C function
    ``c_name(handle, buf, n, 0)``: the handle an int (a file descriptor, passed as C int) or an
    address (a libzmq socket, passed as void *), buf an array."""

    @intrinsic
    def call(typingctx, handle, buf, n):
        sig = types.int64(types.int64, buf, types.int64)

        def codegen(context, builder, signature, args):
            h = builder.inttoptr(args[0], _P8) if handle_is_pointer else builder.trunc(args[0], _I32)
            r = _call(builder, c_name, ret, [h.type, _P8, _I64, _I32],
                      [h, _ptr(context, builder, signature.args[1], args[1]), args[2],
                       ir.Constant(_I32, 0)])
            return builder.sext(r, _I64) if ret is _I32 else r
        return sig, codegen
    call.__doc__ = doc
    return call


zmq_send = _buffer_call("hilrig_zmq_send", _I32, True,
                        "zmq_send(socket, buf, n, 0): bytes queued, or -1.")
zmq_recv = _buffer_call("hilrig_zmq_recv", _I32, True,
                        "zmq_recv(socket, buf, cap, 0): the message's size (may exceed cap: "
                        "truncated), or -1.")
c_send = _buffer_call("send", _I64, False,
                      "send(fd, buf, n, 0) on a connected socket: bytes sent, or -1.")
c_recv = _buffer_call("recv", _I64, False, "recv(fd, buf, cap, 0): bytes received, or -1.")


@intrinsic
def zmq_errno(typingctx):
    sig = types.int64()

    def codegen(context, builder, signature, args):
        return builder.sext(_call(builder, "hilrig_zmq_errno", _I32, [], []), _I64)
    return sig, codegen


@intrinsic
def c_sendto(typingctx, fd, buf, n, addr, addrlen):
    """sendto(fd, buf, n, 0, addr, addrlen): bytes sent, or -1."""
    sig = types.int64(types.int64, buf, types.int64, addr, types.int64)

    def codegen(context, builder, signature, args):
        return _call(builder, "sendto", _I64, [_I32, _P8, _I64, _I32, _P8, _I32],
                     [builder.trunc(args[0], _I32), _ptr(context, builder, signature.args[1], args[1]),
                      args[2], ir.Constant(_I32, 0), _ptr(context, builder, signature.args[3], args[3]),
                      builder.trunc(args[4], _I32)])
    return sig, codegen


@intrinsic
def c_recvfrom(typingctx, fd, buf, cap, addr, lens):
    """recvfrom(fd, buf, cap, 0, addr, &len): bytes received, or -1. ``lens`` is an int32
    array whose element 0 holds the address buffer's size in and the address's length out."""
    sig = types.int64(types.int64, buf, types.int64, addr, lens)

    def codegen(context, builder, signature, args):
        return _call(builder, "recvfrom", _I64, [_I32, _P8, _I64, _I32, _P8, _P8],
                     [builder.trunc(args[0], _I32), _ptr(context, builder, signature.args[1], args[1]),
                      args[2], ir.Constant(_I32, 0), _ptr(context, builder, signature.args[3], args[3]),
                      _ptr(context, builder, signature.args[4], args[4])])
    return sig, codegen


@intrinsic
def c_poll(typingctx, pfd, timeout_ms):
    """poll(pfd, 1, timeout_ms) on one struct pollfd held in an int32 array of 2 (fd; events
    in the low half of element 1, revents in its high half): >0 ready, 0 timed out, -1 error."""
    sig = types.int64(pfd, types.int64)

    def codegen(context, builder, signature, args):
        r = _call(builder, "poll", _I32, [_P8, _I64, _I32],
                  [_ptr(context, builder, signature.args[0], args[0]), ir.Constant(_I64, 1),
                   builder.trunc(args[1], _I32)])
        return builder.sext(r, _I64)
    return sig, codegen


# ---------------------------------------------------------------------------------------------
# msgpack writers and readers for the two per-tick frames

@njit(inline="always")
def _put_be(buf, pos, v, nbytes):
    for j in range(nbytes):
        buf[pos + j] = (v >> (8 * (nbytes - 1 - j))) & 0xFF
    return pos + nbytes


@njit(inline="always")
def put_uint(buf, pos, v):
    """A non-negative int64 in msgpack's shortest unsigned form (as msgpack-python writes it)."""
    if v < 128:
        buf[pos] = v
        return pos + 1
    if v < 256:
        buf[pos] = _UINT8
        return _put_be(buf, pos + 1, v, 1)
    if v < 65536:
        buf[pos] = _UINT16
        return _put_be(buf, pos + 1, v, 2)
    if v < 4294967296:
        buf[pos] = _UINT32
        return _put_be(buf, pos + 1, v, 4)
    buf[pos] = _UINT64
    return _put_be(buf, pos + 1, v, 8)


@njit(inline="always")
def _put_vector(buf, pos, v):
    """A bin of the vector's float64 values, little-endian (native order on x86-64)."""
    nb = 8 * v.shape[0]
    if nb < 256:
        buf[pos] = _BIN8
        pos = _put_be(buf, pos + 1, nb, 1)
    else:
        buf[pos] = _BIN16
        pos = _put_be(buf, pos + 1, nb, 2)
    raw = v.view(np.uint8)
    for j in range(nb):
        buf[pos + j] = raw[j]
    return pos + nb


@njit
def put_actuation(buf, seq, u, word, enable):
    """Write ACTUATION [4, seq, u, interlock_word, output_enable] at buf[0:]; return its size."""
    buf[0] = _FIXARRAY5
    buf[1] = ACTUATION
    pos = put_uint(buf, 2, seq)
    pos = _put_vector(buf, pos, u)
    pos = put_uint(buf, pos, word)
    buf[pos] = _TRUE if enable else _FALSE
    return pos + 1


@njit
def put_sample(buf, seq, t, meas):
    """Write SAMPLE [3, seq, t_sim_s, meas] at buf[0:]; return its size."""
    buf[0] = _FIXARRAY4
    buf[1] = SAMPLE
    pos = put_uint(buf, 2, seq)
    buf[pos] = _FLOAT64
    bits = np.empty(1, np.float64)
    bits[0] = t
    pos = _put_be(buf, pos + 1, bits.view(np.int64)[0], 8)
    return _put_vector(buf, pos, meas)


@njit(inline="always")
def _get_be(buf, pos, nbytes):
    v = np.int64(0)
    for j in range(nbytes):
        v = (v << 8) | np.int64(buf[pos + j])
    return v


@njit(inline="always")
def get_uint(buf, pos, n):
    """(value, next position) of a msgpack unsigned int at pos in the shortest-form encodings
    our writers use, as long as it is below 2**63; (-1, pos) for anything else."""
    if pos >= n:
        return -1, pos
    b = np.int64(buf[pos])
    if b < 128:
        return b, pos + 1
    w = 0
    if b == _UINT8:
        w = 1
    elif b == _UINT16:
        w = 2
    elif b == _UINT32:
        w = 4
    elif b == _UINT64:
        w = 8
    else:
        return -1, pos
    if pos + 1 + w > n or (w == 8 and buf[pos + 1] >= 128):
        return -1, pos
    return _get_be(buf, pos + 1, w), pos + 1 + w


@njit(inline="always")
def _get_bin(buf, pos, n, nbytes):
    """Position of the payload of a bin of exactly nbytes at pos, or -1."""
    if pos >= n:
        return -1
    b = buf[pos]
    if b == _BIN8:
        w = 1
    elif b == _BIN16:
        w = 2
    elif b == _BIN32:
        w = 4
    else:
        return -1
    if pos + 1 + w > n or _get_be(buf, pos + 1, w) != nbytes:
        return -1
    return pos + 1 + w


@njit
def get_sample(buf, n, n_meas):
    """Read a SAMPLE frame of n bytes: (seq, t_sim_s, payload position), seq = -1 when the
    bytes are not a SAMPLE the compiled path takes (the caller then hands them to the full
    decoder). The measurements are the n_meas little-endian float64 at the payload position."""
    if n < 2 or buf[0] != _FIXARRAY4 or buf[1] != SAMPLE:
        return -1, 0.0, 0
    seq, pos = get_uint(buf, 2, n)
    if seq < 0 or pos + 9 > n or buf[pos] != _FLOAT64:
        return -1, 0.0, 0
    bits = np.empty(1, np.int64)
    bits[0] = _get_be(buf, pos + 1, 8)
    t = bits.view(np.float64)[0]
    if not (t - t == 0.0):
        return -1, 0.0, 0  # not finite: the full decoder rejects it with its reason
    p = _get_bin(buf, pos + 9, n, 8 * n_meas)
    if p < 0 or p + 8 * n_meas != n:
        return -1, 0.0, 0
    return seq, t, p


@njit
def read_vector(buf, p, out):
    """Copy the little-endian float64 values at buf[p:] into out."""
    raw = out.view(np.uint8)
    for j in range(8 * out.shape[0]):
        raw[j] = buf[p + j]


@njit
def get_actuation(buf, n, u):
    """Read an ACTUATION frame of n bytes into u: (seq, interlock_word, output_enable), seq = -1
    when the bytes are not an ACTUATION the compiled path takes (u is then left alone)."""
    n_act = u.shape[0]
    if n < 2 or buf[0] != _FIXARRAY5 or buf[1] != ACTUATION:
        return -1, 0, False
    seq, pos = get_uint(buf, 2, n)
    if seq < 0:
        return -1, 0, False
    p = _get_bin(buf, pos, n, 8 * n_act)
    if p < 0:
        return -1, 0, False
    q = p + 8 * n_act
    word, q = get_uint(buf, q, n)
    if word < 0 or q + 1 != n or not (buf[q] == _TRUE or buf[q] == _FALSE):
        return -1, 0, False
    tmp = np.empty(n_act, np.float64)
    read_vector(buf, p, tmp)
    for j in range(n_act):
        if not (tmp[j] - tmp[j] == 0.0):
            return -1, 0, False  # a non-finite actuation: the full decoder rejects it
    for j in range(n_act):
        u[j] = tmp[j]
    return seq, word, buf[q] == _TRUE


# ---------------------------------------------------------------------------------------------
# One exchange: the runtime's request and its reply

@njit
def exchange(io, sbuf, ns, rbuf, pfd):
    """Send sbuf[:ns] and wait for one reply into rbuf. Returns the reply's size, or -status
    (ST_RETRY, ST_PENDING, ST_TIMEOUT, ST_SENDFAIL) when there is none."""
    h = io[IO_HANDLE]
    cap = rbuf.shape[0]
    if io[IO_KIND] == KIND_ZMQ:
        if zmq_send(h, sbuf, ns) < 0:
            return -ST_SENDFAIL
        m = zmq_recv(h, rbuf, cap)
        if m < 0:
            e = zmq_errno()
            io[IO_ERRNO] = e
            return -ST_PENDING if e == EINTR else -ST_TIMEOUT
        # a message longer than rbuf (one byte over the protocol's frame limit) comes back
        # cut to rbuf; its true length stays in io[IO_MSGLEN], for the oversize report
        io[IO_MSGLEN] = m
        return min(m, cap)
    if c_send(h, sbuf, ns) < 0:
        return -ST_RETRY  # e.g. ICMP port unreachable reported on the connected socket
    r = c_poll(pfd, io[IO_WAIT_MS])
    if r == 0:
        return -ST_RETRY
    if r < 0:
        return -ST_PENDING
    m = c_recv(h, rbuf, cap)
    if m < 0:
        return -ST_RETRY
    io[IO_MSGLEN] = m
    return m
