"""A cycle counter for compiled code: the paced loop waits for its deadlines inside numba.

numba has no clock in compiled code, and calling back into Python for the time costs
microseconds per tick. ``cycles()`` is LLVM's ``readcyclecounter`` (the time-stamp counter on
x86-64: constant-rate on current processors and virtual machines), cacheable like any other
compiled code. :func:`cycle_rate` calibrates it against ``time.perf_counter``; the paced runner
re-anchors the counter to the monotonic clock at every chunk, so a rate error of a few ppm never
accumulates.
"""
from __future__ import annotations

import platform
import time

from llvmlite import ir
from numba import njit, types
from numba.core.extending import intrinsic


@intrinsic
def cycles(typingctx):
    """The processor's cycle counter (uint64), read inline."""
    sig = types.uint64()

    def codegen(context, builder, signature, args):
        fnty = ir.FunctionType(ir.IntType(64), [])
        fn = builder.module.declare_intrinsic("llvm.readcyclecounter", fnty=fnty)
        return builder.call(fn, [])
    return sig, codegen


@intrinsic
def store_fence(typingctx):
    """Order every store before it ahead of every store after it (compiler and processor): the
    paced loop's rows are complete in shared memory before it publishes their count."""
    sig = types.void()

    def codegen(context, builder, signature, args):
        builder.fence("release")
        return context.get_dummy_value()
    return sig, codegen


@njit(cache=True)
def now_cycles():
    return cycles()


def supported() -> bool:
    """The counter is the time-stamp counter on x86-64; elsewhere it may be absent or trap."""
    return platform.machine().lower() in ("x86_64", "amd64")


def cycle_rate(seconds: float = 0.1) -> float:
    """Counter ticks per second, measured against perf_counter over ``seconds``."""
    now_cycles()  # compile or load first
    c0, t0 = now_cycles(), time.perf_counter()
    time.sleep(seconds)
    c1, t1 = now_cycles(), time.perf_counter()
    return (int(c1) - int(c0)) / (t1 - t0)


def anchor() -> tuple[float, float]:
    """A (cycles, perf_counter) pair read back to back (the narrower of three tries)."""
    best = None
    for _ in range(3):
        t0 = time.perf_counter()
        c = float(now_cycles())
        t1 = time.perf_counter()
        if best is None or t1 - t0 < best[2]:
            best = (c, 0.5 * (t0 + t1), t1 - t0)
    return best[0], best[1]
