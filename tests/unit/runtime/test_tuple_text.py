"""Generated tuples of more than TUPLE_CHUNK items compile (runtime/loop.py ``tuple_text``): the bus
plant of 6 or more cabled paralleled units has more than 30 states, and numba cannot compile a
single tuple display of more than 30 items on Python 3.11+ (CPython builds it through a list). Checked on a small generated kernel of the
loop's shape (state tuple, an inlined step that rebuilds it from derivative tuples) against
the explicit midpoint method's amplification factor on s' = -s, R(h) = 1 - h + h^2/2 (the
method's stability polynomial; numerical-analysis textbooks, e.g. Hairer, Norsett & Wanner,
Solving ODE I, sec. II.1; from memory)."""
import numpy as np
import pytest
from numba import njit

from hilrig.runtime.loop import TUPLE_CHUNK, tuple_text


def _kernel(n: int):
    t = lambda f: tuple_text(f.format(i=i) for i in range(n))
    src = f'''
@njit
def derivs(s):
    return {t("-s[{i}]")}

@njit(inline="always")
def step(dt, s):
    k1 = derivs(s)
    k2 = derivs({t("s[{i}] + 0.5 * dt * k1[{i}]")})
    s = {t("s[{i}] + dt * k2[{i}]")}
    return s

@njit
def advance(x, dt, nsub):
    s = {t("x[{i}]")}
    for j in range(nsub):
        s = step(dt, s)
    return np.array(s)
'''
    ns = {"njit": njit, "np": np}
    exec(src, ns)
    return ns["advance"]


@pytest.mark.parametrize("n", [TUPLE_CHUNK, TUPLE_CHUNK + 1, 41, 66])
def test_long_state_tuples_compile_and_step_right(n):
    x = np.linspace(1.0, 2.0, n)
    h = 0.1
    got = _kernel(n)(x, h, 4)
    assert got.shape == (n,)
    np.testing.assert_allclose(got, x * (1.0 - h + h * h / 2.0) ** 4, rtol=1e-14)


def test_tuple_text_is_one_display_up_to_the_limit():
    assert tuple_text(["a", "b"]) == "(a, b,)"
    assert "+" not in tuple_text([f"x[{i}]" for i in range(TUPLE_CHUNK)])
    assert tuple_text([f"x[{i}]" for i in range(61)]).count(") + (") == 2
