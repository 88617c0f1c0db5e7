"""Checks of the summed load model (:mod:`hilrig.plugins.plants.loads`).

Outside references: the negative incremental resistance of a constant-power load,
r = -V^2/P (Kollman, "Power Tip #3", EE Times, 2008), P = V I and Ohm's law (textbook).
The replacement of the constant-power part below ``v_min`` by the resistance it has at ``v_min``
is the project's own modelling choice (documented in loads.py); for it we check only what any
such model must satisfy: continuity at ``v_min`` and finite values down to 0 V and below.

``load_current`` is always called with (float, float64 array, float), so numba compiles it once.
"""
import numpy as np
import pytest

from hilrig.plugins.plants.loads import load_current

V_MIN = 10.0  # plugin default v_load_min [V]


def _d(P=0.0, G=0.0, I=0.0):
    return np.array([P, G, I], dtype=np.float64)


def _didv(v, d, h=1e-3):
    """Central-difference incremental conductance [S]; h = 1 mV: truncation h^2/6 * 6P/v^4
    ~ 1e-12 S at 400 V, 100 kW; rounding ~ eps * 250 A / 1 mV ~ 3e-11 S."""
    return (load_current(v + h, d, V_MIN) - load_current(v - h, d, V_MIN)) / (2.0 * h)


def test_constant_power_current_at_400v():
    # P = V I: 100 kW at 400 V draws 250 A (textbook; CHECKS.md worked example)
    assert load_current(400.0, _d(P=100e3), V_MIN) == pytest.approx(250.0, rel=1e-15)


@pytest.mark.parametrize("v, P, r_expected", [
    # 400 V, 100 kW -> -1.6 ohm (Kollman, "Power Tip #3", EE Times, 2008: r = -V^2/P)
    (400.0, 100e3, -1.6),
    # regeneration, 350 V, -50 kW -> +2.45 ohm (derived from the same r = -V^2/P)
    (350.0, -50e3, 2.45),
])
def test_cpl_incremental_resistance(v, P, r_expected):
    g = _didv(v, _d(P=P))
    assert g == pytest.approx(-P / v ** 2, rel=1e-7)
    assert 1.0 / g == pytest.approx(r_expected, rel=1e-7)


def test_resistive_and_constant_current_increments():
    # Ohm's law: a conductance G adds G to di/dv; a constant current adds nothing (textbook)
    assert _didv(400.0, _d(G=0.25)) == pytest.approx(0.25, rel=1e-9)
    assert _didv(400.0, _d(I=30.0)) == pytest.approx(0.0, abs=1e-9)
    assert _didv(400.0, _d(P=100e3, G=0.25, I=30.0)) == pytest.approx(-0.625 + 0.25, rel=1e-7)


@pytest.mark.parametrize("P", [100e3, -50e3])  # demo data: demand and regeneration
def test_continuous_at_v_min(P):
    d = _d(P=P, G=0.25, I=10.0)  # demo data
    at = load_current(V_MIN, d, V_MIN)
    # at v_min the constant-power branch holds: P/v_min + G v_min + I (P = V I)
    assert at == pytest.approx(P / V_MIN + 0.25 * V_MIN + 10.0, rel=1e-15)
    # one ulp on either side: a jump between the branches would show as O(P/v_min) amperes
    below = load_current(np.nextafter(V_MIN, 0.0), d, V_MIN)
    above = load_current(np.nextafter(V_MIN, np.inf), d, V_MIN)
    assert below == pytest.approx(at, rel=1e-12)
    assert above == pytest.approx(at, rel=1e-12)
    # and over a 1 mV step the change is the slope times 1 mV, not a jump
    assert abs(load_current(V_MIN - 1e-3, d, V_MIN) - at) < 1e-3 * (abs(P) / V_MIN ** 2 + 0.25) * 1.01


@pytest.mark.parametrize("v", [V_MIN * 0.5, 1e-3, 5e-324, 0.0, -0.0, -1.0, -400.0])
@pytest.mark.parametrize("P", [100e3, -50e3, 0.0])
def test_finite_at_and_below_zero_volts(v, P):
    d = _d(P=P, G=0.25, I=10.0)  # demo data
    i = load_current(v, d, V_MIN)
    assert np.isfinite(i)
    # below v_min the constant-power part is the resistance v_min^2/P (project's documented
    # model, no outside source): it vanishes at 0 V instead of diverging like P/v
    assert i == pytest.approx(P * v / V_MIN ** 2 + 0.25 * v + 10.0, rel=1e-14, abs=1e-14)


@pytest.mark.parametrize("v", [400.0, 37.5, V_MIN, 3.0, 0.0, -20.0])
def test_summed_load_is_sum_of_single_loads(v):
    # superposition of parallel loads (Kirchhoff's current law); each part also against its
    # textbook law: P/v above v_min, G v (Ohm), I
    P, G, I = 60e3, 0.25, 10.0  # demo data
    i_p = load_current(v, _d(P=P), V_MIN)
    i_g = load_current(v, _d(G=G), V_MIN)
    i_i = load_current(v, _d(I=I), V_MIN)
    if v >= V_MIN:
        assert i_p == pytest.approx(P / v, rel=1e-15)
    assert i_g == pytest.approx(G * v, rel=1e-15, abs=0.0)
    assert i_i == I
    assert load_current(v, _d(P, G, I), V_MIN) == pytest.approx(i_p + i_g + i_i, rel=1e-14, abs=1e-12)
