"""call_native: a C function called by address from compiled code returns what the same function
returns through ctypes (the system C compiler builds the library at test time)."""
import ctypes
import shutil
import subprocess

import numpy as np
import pytest
from numba import njit

from hilrig.runtime.native import call_native, function_address

C_SOURCE = r"""
int scale_into(double t, const double *p, double *x, int n) {
    for (int i = 0; i < n; i++) x[i] = p[i] * t;
    return n + 1;
}
double mixed(double a, long b, int c) { return a * (double)b - (double)c; }
"""


@pytest.fixture(scope="module")
def lib(tmp_path_factory):
    cc = shutil.which("cc") or shutil.which("gcc")
    if cc is None:
        pytest.skip("no C compiler on this machine")
    d = tmp_path_factory.mktemp("native")
    (d / "t.c").write_text(C_SOURCE)
    subprocess.run([cc, "-shared", "-fPIC", "-O2", "-o", str(d / "t.so"), str(d / "t.c")],
                   check=True)
    return ctypes.CDLL(str(d / "t.so"))


@njit(cache=True)
def _kernel(a_scale, a_mixed, p, x):
    status = call_native(a_scale, np.int32(0), (2.5, p.ctypes.data, x.ctypes.data, np.int32(3)))
    value = call_native(a_mixed, np.float64(0.0), (1.5, np.int64(4), np.int32(7)))
    return status, value


def test_call_by_address_equals_ctypes(lib):
    lib.mixed.restype = ctypes.c_double
    lib.mixed.argtypes = (ctypes.c_double, ctypes.c_long, ctypes.c_int)
    p = np.array([1.0, -2.0, 3.25])
    x = np.zeros(3)
    # the address travels as a float64 (as in a plugin's parameter array): exact below 2**53
    a_scale = function_address(lib.scale_into)
    a_mixed = function_address(lib.mixed)
    assert float(a_scale) == a_scale and a_scale < 2 ** 53
    status, value = _kernel(np.int64(np.float64(a_scale)), a_mixed, p, x)
    assert status == 4
    np.testing.assert_array_equal(x, p * 2.5)
    assert value == lib.mixed(1.5, 4, 7) == -1.0


def test_address_of_a_non_function_is_refused():
    with pytest.raises(TypeError):
        function_address("not a function")
