"""Checks of the switching-level plant (:mod:`hilrig.plugins.plants.switched_two_stage`) against
closed forms from outside the project.

* Peak-to-peak inductor ripple of a buck phase, delta_i = (V_dc - v) D T_sw / L (Erickson and
  Maksimovic, *Fundamentals of Power Electronics*, 2nd ed., ch. 2, sec. 2.3, from memory).
* Ripple of the summed current of N interleaved phases with carriers shifted by T_sw / N:
  (V_dc T_sw / L) N (D - m/N) ((m+1)/N - D), m = floor(N D), zero at D = k/N (common practice of
  multiphase buck design, from memory; re-derived in the test from the slopes of the sum).
* Freewheeling of an inductor into a fixed voltage: t = L i0 / v (Erickson and Maksimovic,
  ch. 2, from memory), and the diode blocking at zero current (common practice, no source).
* Dead-time voltage error: the switch node's mean moves by -t_dead f_sw V_dc for a positive
  phase current and +t_dead f_sw V_dc for a negative one (common practice, no source).
* Conservation of energy over a switching period (Tellegen's theorem, textbook circuit theory),
  the dissipation and the load's energy by the trapezoidal rule on a fine grid of the plant's
  own states.

The kernels are called directly (no loop is generated); the kernel's second-stage capacitor
C1 is made huge where a check needs v_C1 held, and R_phase = 0 where the closed form is lossless.
"""
import math

import numpy as np
import pytest

from hilrig.plugins.base import BuildContext
from hilrig.plugins.plants import switched_two_stage as sw

TS = 50e-6
F_SW = 20e3
T_SW = 1.0 / F_SW
V_DC = 800.0
L_PH = 450e-6
NO_LOAD = np.zeros(3)
I1, VC1, D_PREV, DUTY1, P_DC = sw.I1, sw.VC1, sw.D_PREV, sw.DUTY1, sw.P_DC


def _plant(**over):
    values = sw.DECLARATION.defaults()
    values.update(over)
    return values, sw.DECLARATION.pack(values, BuildContext(Ts=TS))


def _held(values, duty):
    """A state with v_C1 = v_out = duty V_dc, every used phase at zero current, the duty of the
    previous period equal to this one (so no command change at t = 0)."""
    x = np.zeros(12)
    x[VC1] = x[sw.VOUT] = duty * V_DC
    x[D_PREV] = duty
    return tuple(x)


def _windows(p, s, duty, t0, t1, m, d=NO_LOAD):
    """States at m + 1 equally spaced instants from t0 to t1, the command held."""
    u = np.array([duty * V_DC])
    h = (t1 - t0) / m
    out = [s]
    for k in range(m):
        s = sw.advance_period(t0 + k * h, h, p, s, u, d)
        out.append(s)
    return np.array(out)


@pytest.mark.parametrize("duty", [0.3, 0.5, 0.7])
def test_phase_ripple_is_the_buck_formula(duty):
    # one phase, v_C1 held by a huge C1, no resistance, no dead time: the current is a
    # triangle of peak-to-peak (V_dc - v) D T_sw / L (Erickson and Maksimovic, ch. 2, from
    # memory). Windows of T_sw / 400 land on the switching instants D/2 and 1 - D/2.
    values, p = _plant(phases=1.0, t_dead=0.0, R_phase=0.0, C1=1e3, L2=1.0, C2=1.0)
    xs = _windows(p, _held(values, duty), duty, 0.0, 3 * T_SW, 1200)
    last = xs[800:, I1]
    expected = (V_DC - duty * V_DC) * duty * T_SW / L_PH
    assert np.ptp(last) == pytest.approx(expected, rel=1e-6)


def _sum_ripple(n, duty):
    """Closed form of the summed current's peak-to-peak ripple of n interleaved phases: in each
    slot of T_sw / n, m + 1 phases conduct for (D - m/n) T_sw and the sum rises at
    ((m + 1) V_dc - n D V_dc) / L (each phase sees V_dc - v when on, -v when off, v = D V_dc)."""
    m = math.floor(n * duty)
    return V_DC * T_SW / L_PH * n * (duty - m / n) * ((m + 1) / n - duty)


@pytest.mark.parametrize("n, duty", [(2, 0.5), (3, 1 / 3), (3, 2 / 3), (4, 0.25), (4, 0.5),
                                     (3, 0.5), (3, 0.2), (2, 0.3), (4, 0.4)])
def test_interleaved_ripple_cancels_at_multiples_of_one_over_n(n, duty):
    # multiphase buck practice (from memory): the summed ripple vanishes at D = k/N and is
    # smaller than one phase's elsewhere; the closed form is re-derived in _sum_ripple
    values, p = _plant(phases=float(n), t_dead=0.0, R_phase=0.0, C1=1e3, L2=1.0, C2=1.0)
    # windows of T_sw / 2400 land on every switching instant of these duties and phase shifts
    xs = _windows(p, _held(values, duty), duty, 0.0, 2 * T_SW, 4800)
    last = xs[2400:]
    total = last[:, 0] + last[:, 1] + last[:, 2] + last[:, 3]
    one = (V_DC - duty * V_DC) * duty * T_SW / L_PH
    assert np.ptp(last[:, 0]) == pytest.approx(one, rel=1e-9)  # each phase keeps its ripple
    expected = _sum_ripple(n, duty)
    if expected == 0.0 or abs(n * duty - round(n * duty)) < 1e-12:
        assert np.ptp(total) < 1e-6 * one
    else:
        assert np.ptp(total) == pytest.approx(expected, rel=1e-9)
        assert np.ptp(total) < one
    for k in range(n, 4):
        assert not np.any(last[:, k])  # unused phases carry no current


def test_energy_balance_over_a_switching_period():
    # default plant (3 phases, 0.5 us dead time, resistances) at the demo's operating point
    # with a constant-power and a resistive load: energy from the DC link over one period =
    # change of stored energy + dissipation in R_phase and R2 + energy to the load (Tellegen)
    values, p = _plant()
    d = np.array([50e3, 0.01, 0.0])
    s = tuple(sw._equilibrium(values, 400.0, d))
    duty = s[D_PREV]
    m = 4000
    xs = _windows(p, s, duty, 0.0, T_SW, m, d)
    h = T_SW / m
    e_in = float(np.sum(xs[1:, P_DC]) * h)
    stored = sw.energy(p, tuple(xs[-1])) - sw.energy(p, tuple(xs[0]))
    i_ph = xs[:, 0:4]
    v_out = xs[:, sw.VOUT]
    i_load = d[0] / v_out + d[1] * v_out + d[2]
    power = values["R_phase"] * np.sum(i_ph ** 2, axis=1) + values["R2"] * xs[:, sw.IL2] ** 2 \
        + v_out * i_load
    spent = float(np.sum(0.5 * (power[1:] + power[:-1])) * h)
    assert e_in == pytest.approx(50e3 * T_SW, rel=0.05)  # sanity: about the load's demand
    assert abs(e_in - stored - spent) < 1e-9 * e_in  # seen: 2.3e-12
    # one call over the whole period (the loop's way) agrees with the fine grid
    one = sw.advance_period(0.0, T_SW, p, s, np.array([duty * V_DC]), d)
    assert one[P_DC] * T_SW == pytest.approx(e_in, rel=1e-9)
    assert np.allclose(one[:7], xs[-1, :7], rtol=0, atol=1e-8 * 400.0)


def test_dead_time_current_that_reaches_zero_stays_zero():
    # one phase, v_C1 held at 400 V, a long dead time of 5 us. From the carrier's valley the
    # high side conducts until D T_sw / 2, then the low-side diode carries the current, which
    # falls at v / L and reaches zero after L i / v (freewheeling time, Erickson and
    # Maksimovic, ch. 2, from memory); the diode then blocks: zero until the low side turns on.
    duty, td = 0.5, 5e-6
    values, p = _plant(phases=1.0, t_dead=td, R_phase=0.0, C1=1e3, L2=1.0, C2=1.0)
    v = duty * V_DC
    i_fall = 1.0
    t_fall = 0.5 * duty * T_SW
    slope_on = (V_DC - v) / L_PH
    x = list(_held(values, duty))
    x[I1] = i_fall - slope_on * t_fall  # so that the current is 1 A at the high side's turn-off
    m = 1000
    t_end = t_fall + td + 2e-6
    xs = _windows(p, tuple(x), duty, 0.0, t_end, m)
    t = np.linspace(0.0, t_end, m + 1)
    t_zero = t_fall + L_PH * i_fall / v
    i = xs[:, I1]
    before = t < t_zero - 1e-12
    # on the way down: the closed-form ramps (on, then the diode's freewheeling)
    ramp = np.where(t <= t_fall, i_fall - slope_on * (t_fall - t), i_fall - v / L_PH * (t - t_fall))
    assert np.allclose(i[before], ramp[before], rtol=0, atol=1e-8)  # C1 is large, not infinite
    held = (t >= t_zero) & (t <= t_fall + td)
    assert held.sum() > 100
    assert np.all(i[held] == 0.0)  # exactly zero: located, never overshot
    assert np.all(i[(t >= t_fall) & (t <= t_fall + td)] >= 0.0)
    after = t > t_fall + td + 1e-12  # the low side conducts: the current goes negative
    assert np.allclose(i[after], -v / L_PH * (t[after] - (t_fall + td)), rtol=0, atol=1e-8)
    # the same from one call over the whole span (no window on the crossing)
    one = sw.advance_period(0.0, t_fall + td, p, tuple(x), np.array([duty * V_DC]), NO_LOAD)
    assert one[I1] == 0.0


@pytest.mark.parametrize("sign", [1.0, -1.0])
@pytest.mark.parametrize("duty", [0.25, 0.6])
def test_recorded_duty_is_the_command_with_the_dead_time_error(duty, sign):
    # the period's fraction with phase 1's node at V_dc: the command u / V_dc without dead time;
    # with dead time, minus t_dead f_sw for a positive current and plus it for a negative one
    # (dead-time voltage error, common practice, no source). The current is kept far from zero
    # (50 A, ripple 5 A) so that the diodes' side never changes.
    for td in (0.0, 0.5e-6, 2e-6):
        values, p = _plant(phases=1.0, t_dead=td, C1=1e3, L2=1.0, C2=1.0)
        x = list(_held(values, duty))
        x[I1] = sign * 50.0
        u = np.array([duty * V_DC])
        s = tuple(x)
        for k in range(3):  # periods of the loop's Ts = T_sw, and one of 1.7 T_sw
            s = sw.advance_period(k * TS, TS, p, s, u, NO_LOAD)
            assert s[DUTY1] == pytest.approx(duty - sign * td * F_SW, abs=1e-12)
        s = sw.advance_period(3 * TS, 1.7 * T_SW, p, s, u, NO_LOAD)
        # a period of 1.7 T_sw from a valley: the command is on for D (the first carrier
        # period), then for [1, 1 + D/2] and [2 - D/2, 2] cut at 1.7; the turn-ons inside
        # (at 1 - D/2; the one at 2 - D/2 is not before 1.7) lose t_dead with a positive
        # current, the turn-offs (D/2 and 1 + D/2) gain t_dead with a negative one
        on = duty + min(0.7, 0.5 * duty) + max(0.0, 1.7 - (2.0 - 0.5 * duty))
        shift = -td * F_SW if sign > 0 else 2.0 * td * F_SW
        assert s[DUTY1] == pytest.approx((on + shift) / 1.7, abs=1e-9)
        assert s[D_PREV] == duty


def test_command_change_takes_effect_at_the_period_start():
    # one phase, no dead time: a period whose command changes from 0.2 to 0.6 has its node at
    # V_dc for the new command's fraction (the carrier is compared with the new duty from the
    # period's start on); the state records the new duty for the next period
    values, p = _plant(phases=1.0, t_dead=0.0, C1=1e3, L2=1.0, C2=1.0)
    x = list(_held(values, 0.2))
    x[I1] = 50.0
    s = sw.advance_period(0.0, TS, p, tuple(x), np.array([0.6 * V_DC]), NO_LOAD)
    assert s[DUTY1] == pytest.approx(0.6, abs=1e-12)
    assert s[D_PREV] == 0.6


def test_reruns_are_bit_identical():
    values, p = _plant()
    d = np.array([50e3, 0.0, 0.0])
    s0 = tuple(sw._equilibrium(values, 400.0, d))
    runs = []
    for _ in range(2):
        s = s0
        for k in range(200):
            u = np.array([400.0 + 50.0 * math.sin(k * 0.05)])
            s = sw.advance_period(k * TS, TS, p, s, u, d)
        runs.append(np.array(s).tobytes())
    assert runs[0] == runs[1]


def test_energy_limit_bounds_a_hard_driven_period():
    # full command from a discharged filter into a regenerating load: the stored energy after
    # a period never exceeds the kernel's bound
    values, p = _plant()
    d = np.array([-80e3, 0.0, 0.0])
    x = np.zeros(12)
    x[VC1] = x[sw.VOUT] = 100.0
    s = tuple(x)
    for k in range(40):
        e0 = sw.energy(p, s)
        s = sw.advance_period(k * TS, TS, p, s, np.array([V_DC]), d)
        assert sw.energy(p, s) <= sw.energy_limit(TS, p, e0, d)


@pytest.mark.parametrize("over, words", [(dict(phases=2.5), "whole number"),
                                         (dict(t_dead=60e-6), "shorter than the control period")])
def test_bad_parameters_are_named(over, words):
    values = sw.DECLARATION.defaults()
    values.update(over)
    with pytest.raises(ValueError, match=words):
        sw.DECLARATION.pack(values, BuildContext(Ts=TS))


def test_blocked_gates_let_every_phase_freewheel_and_stop_at_zero():
    # a trip's gate block reaches the plant as a NaN command: all switches off, each phase's
    # current freewheels through its low-side diode against v_C1 (held by a huge C1, R = 0) and
    # stops at zero after L i0 / v (Erickson and Maksimovic, ch. 2, from memory), then stays
    values, p = _plant(phases=3.0, t_dead=0.0, R_phase=0.0, C1=1e3, L2=1.0, C2=1.0)
    x = np.array(_held(values, 0.5))
    i0 = (40.0, 80.0, 120.0)
    x[sw.I1:sw.I1 + 3] = i0
    v = x[VC1]
    s = tuple(x)
    blocked = np.array([np.nan])
    h = T_SW / 100
    out = [s]
    for k in range(200):
        s = sw.advance_period(k * h, h, p, s, blocked, NO_LOAD)
        out.append(s)
    xs = np.array(out)
    t = np.arange(xs.shape[0]) * h
    for j, i_start in enumerate(i0):
        cur = xs[:, sw.I1 + j]
        t_zero = L_PH * i_start / v
        assert np.all(cur >= 0.0)
        before = t < t_zero - 1e-12
        assert np.allclose(cur[before], i_start - v / L_PH * t[before], rtol=0, atol=1e-5 * i_start)  # v_C1 drifts by ~1e-5 V
        assert np.all(cur[t >= t_zero - 1e-12] == 0.0)
