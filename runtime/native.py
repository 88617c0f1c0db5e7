"""Calling native (C) functions from compiled kernels by address.

A kernel that calls code in a shared library (a controller written in C, an FMU's binary) must
stay cacheable: numba refuses to cache a function that holds a ctypes or cffi function object,
since its address changes from process to process. Here the address is plain data that the
kernel receives at run time (an integer, e.g. stored in the plugin's parameter array ``p``, whose
float64 holds any user-space address of x86-64 and AArch64 exactly: below 2**53), and
``call_native`` turns it into a call in the compiled code:

    status = call_native(addr, np.int32(0), (p.ctypes.data, xc.ctypes.data, t))

- ``addr``: the function's address (any integer type), e.g. ``function_address(lib.step)``.
- the second argument gives the C return type by its numba type: ``np.int32(0)`` for ``int``,
  ``np.float64(0.0)`` for ``double``, ``np.int64(0)`` for ``long``/``size_t``/a pointer.
- the tuple holds the arguments, each passed as its own type: an integer as a 64-bit integer
  (pointers and ``size_t`` on the LP64 platforms hilrig runs on; give ``np.int32(n)`` for an
  ``int`` or ``unsigned int``), a float64 as ``double``. Pointers to arrays come from
  ``arr.ctypes.data``.

There is no check of the signature: the C prototype and the call must agree, as in C. The
callers in hilrig wrap this in one kernel per C function with the prototype written beside it.
"""
from __future__ import annotations

import ctypes

from llvmlite import ir
from numba import types
from numba.extending import intrinsic


def function_address(func, ffi=None) -> int:
    """The address of a ctypes function object, or of a cffi one given with its ``ffi``."""
    if ffi is not None:
        return int(ffi.cast("uintptr_t", func))
    if not isinstance(func, ctypes._CFuncPtr):
        raise TypeError(f"cannot take the address of {func!r}: not a ctypes function")
    value = ctypes.cast(func, ctypes.c_void_p).value
    if not value:
        raise TypeError(f"{func!r} has no address")
    return int(value)


def _ir_type(context, ty):
    if isinstance(ty, types.Float):
        return ir.DoubleType() if ty.bitwidth == 64 else ir.FloatType()
    if isinstance(ty, (types.Integer, types.Boolean)):
        return context.get_value_type(ty)
    raise TypeError(f"call_native: argument of type {ty} is neither an integer nor a float")


@intrinsic
def call_native(typingctx, addr, ret, args):
    """Call the C function at ``addr`` with the arguments of the tuple ``args``; its result has
    the numba type of ``ret``."""
    if not isinstance(addr, types.Integer):
        return None
    if not isinstance(args, types.BaseTuple):
        return None
    if not isinstance(ret, (types.Integer, types.Float)):
        return None
    sig = ret(addr, ret, args)

    def codegen(context, builder, signature, llargs):
        address, _, packed = llargs
        arg_types = list(signature.args[2])
        values = []
        ir_args = []
        for i, ty in enumerate(arg_types):
            v = builder.extract_value(packed, i)
            if isinstance(ty, types.Boolean):
                v = builder.zext(v, ir.IntType(32))
                ir_args.append(ir.IntType(32))
            else:
                ir_args.append(_ir_type(context, ty))
            values.append(v)
        fnty = ir.FunctionType(_ir_type(context, signature.return_type), ir_args)
        ptr = builder.inttoptr(address, fnty.as_pointer())
        return builder.call(ptr, values)

    return sig, codegen
