"""Borrowed array views for the compiled loop: the same array with no reference count.

numba counts references to every array it holds. When a kernel is inlined into the loop, each
of its array parameters is a new variable: one atomic increment when the kernel starts and one
atomic decrement when it ends, for every array of every inlined call, on every tick. numba's
reference-count pruning removes such pairs only within simple control flow, and the kernels
branch. An atomic read-modify-write also orders memory, so those pairs held the processor back
from overlapping the stages of a tick as well.

``borrowed(a)`` is ``a`` with no owner (a null meminfo): increments and decrements of it are a
test of a null pointer, no atomic operation. It is only safe while something else keeps the
array alive; in the chunk functions the caller's arguments do, for the whole call, and the views
never leave the function. Data, shape and strides are the same, so every load and store, and
every result, is unchanged.

With ``NUMBA_DISABLE_JIT=1`` it is the identity.
"""
from __future__ import annotations

import numba
from numba.core import cgutils, types
from numba.extending import intrinsic


@intrinsic
def _borrowed(typingctx, a):
    if isinstance(a, types.Array):
        def codegen(context, builder, signature, args):
            src = context.make_array(a)(context, builder, value=args[0])
            dst = context.make_array(a)(context, builder)
            for field in ("nitems", "itemsize", "data", "shape", "strides"):
                setattr(dst, field, getattr(src, field))
            dst.meminfo = cgutils.get_null_value(dst.meminfo.type)
            dst.parent = cgutils.get_null_value(dst.parent.type)
            # a new value that owns nothing: no reference to take, and releasing it is a no-op
            return dst._getvalue()
        return a(a), codegen
    if isinstance(a, (types.Number, types.Boolean)):
        return a(a), lambda context, builder, signature, args: args[0]
    return None


def _identity(a):
    return a


#: in compiled code: ``a`` as an unowned view; in plain Python: ``a``
borrowed = _identity if numba.config.DISABLE_JIT else _borrowed
