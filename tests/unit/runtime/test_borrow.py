"""Borrowed array views in the compiled loop: same memory, no owner, every array argument."""
import numpy as np
from numba import njit

from hilrig.runtime import loop as L
from hilrig.runtime import run as R
from hilrig.runtime.borrow import borrowed
from hilrig.runtime.scenario import load_scenario


@njit
def _write_through(a, b, k):
    a = borrowed(a)
    b = borrowed(b)
    k = borrowed(k)
    for i in range(a.shape[0]):
        a[i] = b[i, 1] * k
    return a.shape[0] + b.shape[0] * 10 + b.strides[0]


def test_a_borrowed_view_reads_and_writes_the_callers_memory():
    a = np.zeros(4)
    b = np.arange(12.0).reshape(4, 3)
    got = _write_through(a, b, 2.0)
    assert got == 4 + 40 + 24  # shape and strides kept (3 float64 per row)
    assert a.tolist() == [2.0, 8.0, 14.0, 20.0]
    # an array passed through twice keeps working (no reference was given away)
    _write_through(a, b, 1.0)
    assert a.tolist() == [1.0, 4.0, 7.0, 10.0]


def test_every_array_argument_of_the_chunk_is_borrowed_and_no_scalar(demo_path):
    # the chunk's parameters between n and rec are what run.chunk_args passes, in order
    names = [p.strip() for p in L._chunk_params(False).split(",") if p.strip()]
    assert names[:2] == ["k0", "n"] and names[-2:] == ["rec", "ev"]
    prep = R.prepare(load_scenario(demo_path))
    values = R.chunk_args(prep.args)
    assert len(values) == len(names) - 4
    borrowed_lines = L._borrow_text(L._chunk_params(False))
    for name, v in zip(names[2:-2], values):
        is_array = isinstance(v, np.ndarray)
        assert (f"    {name} = borrowed({name})\n" in borrowed_lines) == is_array, name
    for name in ("rec", "ev"):
        assert f"    {name} = borrowed({name})\n" in borrowed_lines
