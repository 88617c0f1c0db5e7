"""Checks of the averaged plant models against outside references.

The plant kernels (:mod:`hilrig.plugins.plants.two_stage_lc`, :mod:`hilrig.plugins.plants.single_lc`)
are compared with

* the same circuit equations written out here and solved by ``scipy.integrate.solve_ivp``
  (Radau, rtol 1e-10, atol 1e-9) -- a general-purpose reference solver;
* the worked equilibria and eigenvalues of the project's reference sheet (CHECKS.md), which follow
  from the averaged buck model (Erickson & Maksimovic, *Fundamentals of Power Electronics*,
  2nd ed., ch. 3 and 7, from memory) and were re-derived here with numpy;
* the small-signal stability condition of an LC filter feeding a constant-power load
  (derived; agrees with Emadi, Khaligh, Rivetta, Williamson, IEEE Trans. Veh. Technol. 55(4),
  2006, from memory);
* conservation of energy (Tellegen's theorem, textbook circuit theory).

Every kernel is called with the same argument types throughout, so numba compiles each once.
"""
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from hilrig.plugins.base import BuildContext
from hilrig.plugins.plants import single_lc, two_stage_lc

#: control period [s] and RK4 substeps per period: the runtime's default timing
#: (runtime/scenario.py TIMING), with u and the load held over each period as the loop does.
TS = 50e-6
NSUB = 4

#: CHECKS.md worked-example filter (two stage): L1 200 uH, C1 500 uF, L2 50 uH, C2 100 uF,
#: R1 = R2 = 10 mohm. V_dc and v_load_min are the plugin defaults (800 V, 10 V); neither enters
#: the worked numbers (u stays inside [0, V_dc], v_out stays far above v_load_min).
TWO = dict(V_dc=800.0, L1=200e-6, R1=10e-3, C1=500e-6, L2=50e-6, R2=10e-3, C2=100e-6,
           v_load_min=10.0)
#: CHECKS.md worked-example filter (single stage): L 200 uH, C 500 uF, R 20 mohm.
ONE = dict(V_dc=800.0, L=200e-6, R=20e-3, C=500e-6, v_load_min=10.0)

V0 = 400.0        # output voltage of the worked examples [V] (CHECKS.md)
P_100K = 100e3    # constant-power load of the worked examples [W] (CHECKS.md)


def _pack(module, values):
    return module.DECLARATION.pack(values, BuildContext(Ts=TS))


def _vec(*values):
    return np.array(values, dtype=np.float64)


# --------------------------------------------------------------------------------------------
# The circuit equations, written out independently of the plugin code
# --------------------------------------------------------------------------------------------

def _i_load_ref(v, P, G, I, v_min):
    """Summed load current [A]: P/v + G v + I; below v_min the constant-power part is the
    resistance it has at v_min (the model documented for the project's load; its own choice)."""
    i_p = P / v if v >= v_min else P * v / v_min ** 2
    return i_p + G * v + I


def _two_stage_rhs(t, x, u, P, G, I, c):
    """Averaged buck with a two-stage LC filter (Erickson & Maksimovic ch. 3 and 7, from memory,
    as written in CHECKS.md), converter voltage clamped to [0, V_dc]."""
    i1, v1, i2, v2 = x
    uc = min(max(u, 0.0), c["V_dc"])
    return [(uc - c["R1"] * i1 - v1) / c["L1"],
            (i1 - i2) / c["C1"],
            (v1 - c["R2"] * i2 - v2) / c["L2"],
            (i2 - _i_load_ref(v2, P, G, I, c["v_load_min"])) / c["C2"]]


def _single_rhs(t, x, u, P, G, I, c):
    """Averaged buck with one LC filter, converter voltage clamped to [0, V_dc]."""
    i, v = x
    uc = min(max(u, 0.0), c["V_dc"])
    return [(uc - c["R"] * i - v) / c["L"],
            (i - _i_load_ref(v, P, G, I, c["v_load_min"])) / c["C"]]


def _two_stage_jac(c, v2, P, G):
    """Analytic Jacobian of the two-stage equations at output voltage v2 (above v_load_min).
    The load's incremental conductance is d(P/v + G v + I)/dv = -P/v^2 + G."""
    g = -P / v2 ** 2 + G
    return np.array([
        [-c["R1"] / c["L1"], -1.0 / c["L1"], 0.0, 0.0],
        [1.0 / c["C1"], 0.0, -1.0 / c["C1"], 0.0],
        [0.0, 1.0 / c["L2"], -c["R2"] / c["L2"], -1.0 / c["L2"]],
        [0.0, 0.0, 1.0 / c["C2"], -g / c["C2"]],
    ])


def _single_jac(c, v, P, G):
    g = -P / v ** 2 + G
    return np.array([[-c["R"] / c["L"], -1.0 / c["L"]], [1.0 / c["C"], -g / c["C"]]])


# --------------------------------------------------------------------------------------------
# Drivers
# --------------------------------------------------------------------------------------------

def _rk4_periods(derivs, p, x0, schedule, nsub=NSUB):
    """Fixed-step classic RK4 over control periods of length TS, nsub substeps each, u and the
    load d held over the period (zero-order hold, as the runtime's loop does).
    Returns the state at every period boundary, shape (len(schedule) + 1, nx)."""
    x = np.array(x0, dtype=np.float64)
    k1, k2, k3, k4 = (np.zeros_like(x) for _ in range(4))
    h = TS / nsub
    out = [x.copy()]
    t = 0.0
    for u_v, d in schedule:
        u = _vec(u_v)
        d = np.asarray(d, dtype=np.float64)
        for s in range(nsub):
            ta = t + s * h
            k1[:] = derivs(ta, p, x, u, d)
            k2[:] = derivs(ta + 0.5 * h, p, x + 0.5 * h * k1, u, d)
            k3[:] = derivs(ta + 0.5 * h, p, x + 0.5 * h * k2, u, d)
            k4[:] = derivs(ta + h, p, x + h * k3, u, d)
            x = x + h / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
        t += TS
        out.append(x.copy())
    return np.array(out)


def _own_step_periods(step, p, x0, schedule, nsub=NSUB):
    """As _rk4_periods, with the plant's own RK4 step (``rk4_step``) for each substep."""
    s = tuple(float(v) for v in x0)
    h = TS / nsub
    out = [np.array(s)]
    for u_v, d in schedule:
        u = _vec(u_v)
        d = np.asarray(d, dtype=np.float64)
        for _ in range(nsub):
            s = step(h, p, s, u, d)
        out.append(np.array(s))
    return np.array(out)


def _radau_periods(rhs, c, x0, schedule):
    """Reference: solve_ivp Radau period by period (restarted at each period boundary, where u
    or the load may jump, so that the solver never steps across a discontinuity)."""
    x = np.array(x0, dtype=np.float64)
    out = [x.copy()]
    t = 0.0
    for u_v, (P, G, I) in schedule:
        sol = solve_ivp(rhs, (t, t + TS), x, method="Radau", rtol=1e-10, atol=1e-9,
                        args=(u_v, P, G, I, c))
        assert sol.success, sol.message
        x = sol.y[:, -1].copy()
        t += TS
        out.append(x.copy())
    return np.array(out)


def _rk4_global_tolerance(eigs, n_steps, excursion):
    """Tolerance from the RK4 truncation error.

    For a linear mode exp(lambda t), one RK4 step of length h multiplies by
    R(z) = 1 + z + z^2/2 + z^3/6 + z^4/24 (z = lambda h) instead of exp(z); the local error is
    |exp(z) - R(z)| (~ |z|^5/120) times the mode amplitude, and over n steps it adds up at most
    about linearly (the modes here grow or decay by less than a factor 2 over the run). The mode
    amplitude is bounded by the state's peak-to-peak excursion, which overstates it, so this is
    a conservative bound (for the schedules below the observed error is 4x to 150x below it,
    depending on the state; a 0.5 % error in R2 or a missing clamp exceeds it several times).
    Radau's own error (rtol 1e-10) is far below it and is covered by the small absolute floor.
    """
    h = TS / NSUB
    z = np.asarray(eigs) * h
    local = np.max(np.abs(np.exp(z) - (1 + z + z ** 2 / 2 + z ** 3 / 6 + z ** 4 / 24)))
    return n_steps * local * excursion + 1e-6


def _upper_eigs(J):
    """Eigenvalues with positive imaginary part, sorted by imaginary part."""
    e = np.linalg.eigvals(J)
    return np.array(sorted((z for z in e if z.imag > 0), key=lambda z: z.imag))


def _fd_jacobian(derivs, p, x0, u, d):
    """Jacobian of the kernel's dx/dt with respect to x by central differences.

    Relative step 1e-4: the truncation error (h^2/6 times the third derivative of P/v) is
    ~1e-9 relative at 400 V, and the rounding error (eps * |dx terms| / h) ~1e-9 relative."""
    n = x0.size
    J = np.empty((n, n))
    fp, fm = np.empty(n), np.empty(n)
    for j in range(n):
        step = 1e-4 * max(abs(x0[j]), 1.0)
        xp, xm = x0.copy(), x0.copy()
        xp[j] += step
        xm[j] -= step
        fp[:] = derivs(0.0, p, xp, u, d)
        fm[:] = derivs(0.0, p, xm, u, d)
        J[:, j] = (fp - fm) / (xp[j] - xm[j])
    return J


# --------------------------------------------------------------------------------------------
# 1. Trajectories against solve_ivp
# --------------------------------------------------------------------------------------------

# Load and command schedule: demo data (test operating points, not published values).
# A mixed load (constant power + resistive + constant current) at 400 V, a +20 V step of u, a
# constant-power step 20 kW -> 60 kW, then u above V_dc (clamp to V_dc) and u < 0 (clamp to 0).
_D0 = (20e3, 0.25, 10.0)   # demo data: P [W], G [S], I [A]
_D1 = (60e3, 0.25, 10.0)   # demo data: load step


def _schedule(u0):
    return ([(u0, _D0)] * 4 + [(u0 + 20.0, _D0)] * 20 + [(u0 + 20.0, _D1)] * 20
            + [(1000.0, _D1)] * 4 + [(-50.0, _D1)] * 4 + [(u0 + 20.0, _D1)] * 8)


def _generic(p, x0, sched, nsub=NSUB):
    return _rk4_periods(two_stage_lc.derivs, p, x0, sched, nsub)


def _own(p, x0, sched, nsub=NSUB):
    return _own_step_periods(two_stage_lc.rk4_step, p, x0, sched, nsub)


@pytest.mark.parametrize("integrate", [_generic, _own], ids=["generic_rk4", "own_rk4_step"])
def test_two_stage_trajectory_matches_radau(integrate):
    """The generic RK4 over ``derivs``, and the plant's own ``rk4_step`` (the runtime
    integrates with it), against solve_ivp Radau."""
    c = TWO
    p = _pack(two_stage_lc, c)
    # equilibrium at 400 V written out (CHECKS.md: i1 = i2 = i_load, v1 = v2 + R2 i, u = v1 + R1 i)
    i0 = _i_load_ref(V0, *_D0, c["v_load_min"])
    x0 = [i0, V0 + c["R2"] * i0, i0, V0]
    u0 = V0 + (c["R1"] + c["R2"]) * i0
    sched = _schedule(u0)
    assert max(u for u, _ in sched) > c["V_dc"] and min(u for u, _ in sched) < 0.0

    ref = _radau_periods(_two_stage_rhs, c, x0, sched)
    got = integrate(p, x0, sched)

    eigs = np.concatenate([np.linalg.eigvals(_two_stage_jac(c, V0, P, G)) for P, G, _ in (_D0, _D1)])
    tol = _rk4_global_tolerance(eigs, len(sched) * NSUB, np.ptp(ref, axis=0))
    err = np.max(np.abs(got - ref), axis=0)
    assert np.all(err <= tol), f"max |error| per state {err} exceeds RK4 bound {tol}"
    # the first four periods sit at the written-out equilibrium: no drift (rounding only)
    np.testing.assert_allclose(got[4], x0, rtol=1e-12, atol=1e-9)

    # The difference is RK4 truncation, not a model mismatch: halving h shrinks it by ~2^4.
    # (A model error would not shrink with h.) Require at least a factor 8.
    got8 = integrate(p, x0, sched, nsub=2 * NSUB)
    err8 = np.max(np.abs(got8 - ref), axis=0)
    assert np.all(err8 <= err / 8.0), f"errors {err} -> {err8} with half the step"


def test_two_stage_own_step_is_classic_rk4():
    """``rk4_step`` is the classic RK4 step over ``derivs`` (the classic fourth-order tableau,
    Hairer, Norsett & Wanner, *Solving Ordinary Differential Equations I*, 2nd ed., 1993,
    sec. II.1, from memory; written out in _rk4_periods_one) with its arithmetic in another
    order: over random states, loads (both signs of P, the resistive stand-in below
    v_load_min) and commands (inside and beyond both clamps), the two agree to rounding. The
    bound, 1e-13 of the state's and the step's magnitudes, is a few hundred units of double
    rounding (common practice, no source); a wrong weight or stage width is off by far more
    (checked below)."""
    p = _pack(two_stage_lc, TWO)
    rng = np.random.default_rng(20261202)  # demo data: arbitrary test points
    h = TS / NSUB
    worst = 0.0
    for _ in range(400):
        x = np.array([rng.uniform(-400, 400), rng.uniform(0, 800), rng.uniform(-400, 400),
                      rng.choice([rng.uniform(0.5, 10.0), rng.uniform(10.0, 800.0)])])
        d = _vec(rng.uniform(-1.5e5, 1.5e5), rng.uniform(0.0, 2.0), rng.uniform(-200, 200))
        u = _vec(rng.uniform(-100.0, 900.0))
        generic = _rk4_periods_one(two_stage_lc.derivs, p, x, u, d, h)
        own = np.array(two_stage_lc.rk4_step(h, p, tuple(x), u, d))
        scale = np.abs(x) + np.abs(generic - x) + 1.0
        worst = max(worst, float(np.max(np.abs(own - generic) / scale)))
    assert worst <= 1e-13, worst
    # the check has teeth: the same comparison for a step of 1.001 h fails by orders of magnitude
    x, u, d = _vec(120.0, 401.0, 118.0, 399.0), _vec(405.0), _vec(50e3, 0.0, 0.0)
    off = np.array(two_stage_lc.rk4_step(1.001 * h, p, tuple(x), u, d))
    generic = _rk4_periods_one(two_stage_lc.derivs, p, x, u, d, h)
    assert np.max(np.abs(off - generic) / (np.abs(x) + np.abs(generic - x) + 1.0)) > 1e-7


def _rk4_periods_one(derivs, p, x, u, d, h):
    """One classic RK4 step of length h over derivs (the stages of _rk4_periods)."""
    k1 = np.array(derivs(0.0, p, x, u, d))
    k2 = np.array(derivs(0.0, p, x + 0.5 * h * k1, u, d))
    k3 = np.array(derivs(0.0, p, x + 0.5 * h * k2, u, d))
    k4 = np.array(derivs(0.0, p, x + h * k3, u, d))
    return x + h / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4)


def test_single_stage_trajectory_matches_radau():
    c = ONE
    p = _pack(single_lc, c)
    i0 = _i_load_ref(V0, *_D0, c["v_load_min"])
    x0 = [i0, V0]
    u0 = V0 + c["R"] * i0
    sched = _schedule(u0)

    ref = _radau_periods(_single_rhs, c, x0, sched)
    got = _rk4_periods(single_lc.derivs, p, x0, sched)

    eigs = np.concatenate([np.linalg.eigvals(_single_jac(c, V0, P, G)) for P, G, _ in (_D0, _D1)])
    tol = _rk4_global_tolerance(eigs, len(sched) * NSUB, np.ptp(ref, axis=0))
    err = np.max(np.abs(got - ref), axis=0)
    assert np.all(err <= tol), f"max |error| per state {err} exceeds RK4 bound {tol}"
    # the schedule exercised the dynamics: the output moved far more than the tolerance
    assert np.ptp(ref[:, 1]) > 1e4 * tol[1]


@pytest.mark.parametrize("u_cmd, u_applied", [
    (1000.0, 800.0),   # above V_dc: clamped to V_dc (a buck cannot exceed its DC link)
    (-50.0, 0.0),      # below 0: clamped to 0 (a buck cannot reverse its output voltage)
    (float("nan"), 0.0),  # NaN command applies 0 V (documented in the plant kernels)
    (405.0, 405.0),    # inside: passed through
])
def test_command_clamp(u_cmd, u_applied):
    # common practice, no source: the averaged buck output voltage d*V_dc with duty d in [0, 1]
    d = _vec(20e3, 0.25, 10.0)  # demo data
    x2 = _vec(100.0, 402.0, 90.0, 399.0)  # demo data: an arbitrary off-equilibrium state
    dx = np.empty(4)
    dx[:] = two_stage_lc.derivs(0.0, _pack(two_stage_lc, TWO), x2, _vec(u_cmd), d)
    np.testing.assert_allclose(dx, _two_stage_rhs(0.0, x2, u_applied, *d, TWO), rtol=1e-12)

    x1 = _vec(100.0, 399.0)
    dx = np.empty(2)
    dx[:] = single_lc.derivs(0.0, _pack(single_lc, ONE), x1, _vec(u_cmd), d)
    np.testing.assert_allclose(dx, _single_rhs(0.0, x1, u_applied, *d, ONE), rtol=1e-12)


# --------------------------------------------------------------------------------------------
# 2. Two-stage equilibrium and eigenvalues: CHECKS.md worked numbers
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("P, i_eq, v1_eq, u_eq, expected", [
    # CHECKS.md worked example (derived, re-derived with numpy): 100 kW at 400 V, unstable
    (100e3, 250.0, 402.5, 405.0, [548.23 + 2848.87j, 2451.77 + 15120.95j]),
    # CHECKS.md worked example (derived, re-derived with numpy): no load, lightly damped
    (0.0, 0.0, 400.0, 400.0, [-25.55 + 2876.31j, -99.45 + 15547.22j]),
])
def test_two_stage_equilibrium_and_eigenvalues(P, i_eq, v1_eq, u_eq, expected):
    c = TWO
    p = _pack(two_stage_lc, c)
    d = _vec(P, 0.0, 0.0)
    u = _vec(u_eq)
    x0 = np.asarray(two_stage_lc.DECLARATION.equilibrium(c, V0, d), dtype=np.float64)
    np.testing.assert_allclose(x0, [i_eq, v1_eq, i_eq, V0], rtol=1e-12, atol=1e-12)

    # dx/dt = 0 at the equilibrium with the worked u, to rounding: each row's terms are of
    # size |u|/L1, |i|/C1, |v1|/L2, |i|/C2, so allow 16 eps of those.
    dx = np.full(4, np.nan)
    dx[:] = two_stage_lc.derivs(0.0, p, x0, u, d)
    scale = np.array([u_eq / c["L1"], max(i_eq, 1.0) / c["C1"], v1_eq / c["L2"],
                      max(i_eq, 1.0) / c["C2"]])
    assert np.all(np.abs(dx) <= 16 * np.finfo(float).eps * scale), dx

    J_fd = _fd_jacobian(two_stage_lc.derivs, p, x0, u, d)
    J_an = _two_stage_jac(c, V0, P, 0.0)
    np.testing.assert_allclose(J_fd, J_an, rtol=1e-7, atol=1e-7 * np.abs(J_an).max())

    got = _upper_eigs(J_fd)
    np.testing.assert_allclose(got, _upper_eigs(J_an), rtol=1e-7)
    # worked numbers are rounded to 0.01 1/s: compare real and imaginary parts to 0.05 %
    np.testing.assert_allclose(got.real, np.real(expected), rtol=5e-4)
    np.testing.assert_allclose(got.imag, np.imag(expected), rtol=5e-4)


# --------------------------------------------------------------------------------------------
# 3. Single stage: worked eigenvalues and the constant-power-load stability boundary
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("R, expected", [
    (20e-3, 575.0 + 3089.40j),   # CHECKS.md worked example, unstable (derived)
    (0.5, -625.0 + 2546.44j),    # CHECKS.md worked example, stable (derived)
])
def test_single_stage_eigenvalues(R, expected):
    c = dict(ONE, R=R)
    p = _pack(single_lc, c)
    d = _vec(P_100K, 0.0, 0.0)
    x0 = np.asarray(single_lc.DECLARATION.equilibrium(c, V0, d), dtype=np.float64)
    # equilibrium current P/V0 = 250 A (power balance)
    np.testing.assert_allclose(x0, [250.0, V0], rtol=1e-12)
    u = _vec(V0 + R * 250.0)
    dx = np.full(2, np.nan)
    dx[:] = single_lc.derivs(0.0, p, x0, u, d)
    assert np.all(np.abs(dx) <= 16 * np.finfo(float).eps * np.array([u[0] / c["L"], 250.0 / c["C"]]))

    J_fd = _fd_jacobian(single_lc.derivs, p, x0, u, d)
    (got,) = _upper_eigs(J_fd)
    # characteristic polynomial s^2 + (R/L - 1/(C R_cpl)) s + (1 - R/R_cpl)/(L C), R_cpl = V0^2/P
    # (CHECKS.md, derived), solved here by numpy.roots
    r_cpl = V0 ** 2 / P_100K
    roots = np.roots([1.0, R / c["L"] - 1.0 / (c["C"] * r_cpl), (1.0 - R / r_cpl) / (c["L"] * c["C"])])
    assert got == pytest.approx(roots[np.argmax(roots.imag)], rel=1e-7)
    assert got.real == pytest.approx(expected.real, rel=5e-4)
    assert got.imag == pytest.approx(expected.imag, rel=5e-4)


@pytest.mark.parametrize("R, boundary", [
    # R C V0^2 / L binds: 20 mohm * 500 uF * (400 V)^2 / 200 uH = 8 kW (derived, CHECKS.md;
    # the classic condition of Emadi et al. 2006, from memory). Loss of damping: complex pair
    # crosses the imaginary axis.
    (20e-3, 20e-3 * 500e-6 * 400.0 ** 2 / 200e-6),
    # V0^2 / R binds when R^2 > L/C: 1 ohm -> (400 V)^2 / 1 ohm = 160 kW (derived, CHECKS.md).
    # Saddle: one real eigenvalue crosses zero (the CPL's negative resistance beats R).
    (1.0, 400.0 ** 2 / 1.0),
])
def test_single_stage_stability_boundary(R, boundary):
    c = dict(ONE, R=R)
    p = _pack(single_lc, c)
    max_real = {}
    for factor in (0.99, 1.01):
        d = _vec(factor * boundary, 0.0, 0.0)
        x0 = np.asarray(single_lc.DECLARATION.equilibrium(c, V0, d), dtype=np.float64)
        u = _vec(V0 + R * x0[0])
        max_real[factor] = np.linalg.eigvals(_fd_jacobian(single_lc.derivs, p, x0, u, d)).real.max()
    assert max_real[0.99] < 0.0 < max_real[1.01], max_real


def test_lc_resonance_frequency():
    # f0 = 1 / (2 pi sqrt(L C)) = 503.29 Hz for 200 uH, 500 uF (CHECKS.md worked number,
    # textbook LC resonance). No load and R = 0: the eigenvalues are +- j 2 pi f0 exactly.
    c = dict(ONE, R=0.0)
    p = _pack(single_lc, c)
    d = _vec(0.0, 0.0, 0.0)
    x0 = np.asarray(single_lc.DECLARATION.equilibrium(c, V0, d), dtype=np.float64)
    (lam,) = _upper_eigs(_fd_jacobian(single_lc.derivs, p, x0, _vec(V0), d))
    assert abs(lam.real) < 1e-6 * abs(lam)
    assert lam.imag / (2 * np.pi) == pytest.approx(503.29, abs=0.005)


# --------------------------------------------------------------------------------------------
# Energy balance (Tellegen's theorem, textbook circuit theory)
# --------------------------------------------------------------------------------------------

def test_energy_balance():
    """d/dt of the stored energy (1/2 L i^2 + 1/2 C v^2) equals the converter's power minus the
    resistive losses minus the power into the load, at arbitrary states and loads."""
    rng = np.random.default_rng(1)
    p2, p1 = _pack(two_stage_lc, TWO), _pack(single_lc, ONE)
    dx2, dx1 = np.empty(4), np.empty(2)
    for _ in range(20):
        # demo data: random states around the operating range, loads incl. regeneration (P < 0)
        i1, i2 = rng.uniform(-300.0, 300.0, 2)
        v1, v2 = rng.uniform(20.0, 700.0, 2)
        u = rng.uniform(0.0, TWO["V_dc"])
        d = _vec(rng.uniform(-50e3, 100e3), rng.uniform(0.0, 1.0), rng.uniform(-50.0, 50.0))
        i_ld = _i_load_ref(v2, *d, TWO["v_load_min"])

        dx2[:] = two_stage_lc.derivs(0.0, p2, _vec(i1, v1, i2, v2), _vec(u), d)
        stored = (TWO["L1"] * i1 * dx2[0] + TWO["C1"] * v1 * dx2[1]
                  + TWO["L2"] * i2 * dx2[2] + TWO["C2"] * v2 * dx2[3])
        balance = u * i1 - TWO["R1"] * i1 ** 2 - TWO["R2"] * i2 ** 2 - v2 * i_ld
        terms = abs(u * i1) + TWO["R1"] * i1 ** 2 + TWO["R2"] * i2 ** 2 + abs(v2 * i_ld)
        assert stored == pytest.approx(balance, abs=1e-10 * terms)

        dx1[:] = single_lc.derivs(0.0, p1, _vec(i1, v2), _vec(u), d)
        stored = ONE["L"] * i1 * dx1[0] + ONE["C"] * v2 * dx1[1]
        balance = u * i1 - ONE["R"] * i1 ** 2 - v2 * i_ld
        terms = abs(u * i1) + ONE["R"] * i1 ** 2 + abs(v2 * i_ld)
        assert stored == pytest.approx(balance, abs=1e-10 * terms)


def test_outputs_map_states():
    """The outputs follow the declared order (names from the declaration, values from the
    written-out load model)."""
    d = _vec(100e3, 0.1, 5.0)  # demo data
    x = _vec(250.0, 402.5, 240.0, 400.0)
    y = np.full(len(two_stage_lc.DECLARATION.outputs), np.nan)
    two_stage_lc.outputs(0.0, _pack(two_stage_lc, TWO), x, _vec(405.0), d, y)
    want = dict(v_out=400.0, i_out=_i_load_ref(400.0, *d, 10.0), i_L1=250.0, v_C1=402.5,
                i_L2=240.0, v_dc=TWO["V_dc"])
    np.testing.assert_allclose(y, [want[s.name] for s in two_stage_lc.DECLARATION.outputs], rtol=1e-14)

    y = np.full(len(single_lc.DECLARATION.outputs), np.nan)
    single_lc.outputs(0.0, _pack(single_lc, ONE), _vec(250.0, 400.0), _vec(405.0), d, y)
    want = dict(v_out=400.0, i_out=_i_load_ref(400.0, *d, 10.0), i_L1=250.0, v_dc=ONE["V_dc"])
    np.testing.assert_allclose(y, [want[s.name] for s in single_lc.DECLARATION.outputs], rtol=1e-14)


# --------------------------------------------------------------------------------------------
# 6. Pure-Python run of the kernel (NUMBA_DISABLE_JIT=1) so that a failure shows a traceback
# --------------------------------------------------------------------------------------------

def test_two_stage_equilibrium_without_jit(tmp_path):
    code = textwrap.dedent("""
        import numpy as np
        from numba.core import config
        from hilrig.plugins.base import BuildContext
        from hilrig.plugins.plants import two_stage_lc as m
        assert config.DISABLE_JIT
        assert not hasattr(m.derivs, "py_func"), type(m.derivs)  # a plain Python function
        c = dict(V_dc=800.0, L1=200e-6, R1=10e-3, C1=500e-6, L2=50e-6, R2=10e-3, C2=100e-6,
                 v_load_min=10.0)
        p = m.DECLARATION.pack(c, BuildContext(Ts=50e-6))
        d = np.array([100e3, 0.0, 0.0])
        x = np.asarray(m.DECLARATION.equilibrium(c, 400.0, d), dtype=np.float64)
        assert np.allclose(x, [250.0, 402.5, 250.0, 400.0], rtol=1e-12), x
        dx = np.full(4, np.nan)
        dx[:] = m.derivs(0.0, p, x, np.array([405.0]), d)
        scale = np.array([405.0 / c["L1"], 250.0 / c["C1"], 402.5 / c["L2"], 250.0 / c["C2"]])
        assert np.all(np.abs(dx) <= 16 * np.finfo(float).eps * scale), dx
        print("ok")
    """)
    # CHECKS.md worked example: 100 kW at 400 V -> i = 250 A, v1 = 402.5 V, u = 405 V
    env = dict(os.environ, NUMBA_DISABLE_JIT="1", HILRIG_CACHE_DIR=str(tmp_path))
    proc = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "ok"


# --------------------------------------------------------------------------------------------
# The integration's rate bounds and energy limit (runtime/loop.py, stiffness-aware RK4)
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("v, P, G", [(400.0, 100e3, 0.0), (120.0, 200e3, 0.0), (30.0, 200e3, 0.0),
                                     (5.0, 150e3, 0.0), (400.0, -80e3, 0.0), (400.0, 50e3, 100.0)])
def test_rate_bounds_cover_every_eigenvalue(v, P, G):
    # Gershgorin's circle theorem (any linear algebra text): linear_rate + fast_rate bounds the
    # magnitude of every eigenvalue of the Jacobian; checked against numpy's eigenvalues of the
    # kernel's finite-difference Jacobian (below v_load_min the load is resistive)
    for module, values, rhs_jac in ((two_stage_lc, TWO, None), (single_lc, ONE, None)):
        p = _pack(module, values)
        d = _vec(P, G, 0.0)
        x0 = np.asarray(module.DECLARATION.equilibrium(values, v, d), dtype=np.float64)
        J = _fd_jacobian(module.derivs, p, x0, _vec(v), d)
        eig = np.max(np.abs(np.linalg.eigvals(J)))
        bound = module.linear_rate(values) + module.fast_rate(p, tuple(x0), d)
        assert eig <= bound * (1 + 1e-6), (module.__name__, eig, bound)


def test_fast_rate_is_the_loads_conductance_over_the_capacitance():
    # the state-dependent rate: |d i_load / d v| / C_out, written out here from the load model
    p = _pack(two_stage_lc, TWO)
    for v, P, G in ((400.0, 100e3, 0.0), (100.0, 200e3, 1.0), (5.0, 200e3, 0.0)):
        g = G - P / v ** 2 if v >= TWO["v_load_min"] else G + P / TWO["v_load_min"] ** 2
        got = two_stage_lc.fast_rate(p, (0.0, 0.0, 0.0, v), _vec(P, G, 0.0))
        assert got == pytest.approx(abs(g) / TWO["C2"], rel=1e-12)


@pytest.mark.parametrize("P, G, I", [(100e3, 0.0, 0.0), (-80e3, 0.0, 0.0), (0.0, -0.05, -50.0)])
def test_energy_limit_bounds_a_radau_trajectory_driven_hard(P, G, I):
    # the limit holds for the exact dynamics whatever the command: the source at full V_dc from
    # an energy-rich state with a load that feeds power back (P < 0, G < 0, I < 0 where given),
    # solved with Radau; and it is not loose by orders of magnitude
    c = TWO
    p = _pack(two_stage_lc, c)
    x0 = np.array([200.0, 390.0, 180.0, 380.0])
    e = lambda x: 0.5 * (c["L1"] * x[0] ** 2 + c["C1"] * x[1] ** 2 + c["L2"] * x[2] ** 2
                         + c["C2"] * x[3] ** 2)
    sol = solve_ivp(_two_stage_rhs, (0.0, TS), x0, method="Radau", rtol=1e-10, atol=1e-9,
                    args=(c["V_dc"], P, G, I, c), dense_output=True)
    peak = max(e(sol.sol(t)) for t in np.linspace(0.0, TS, 101))
    lim = two_stage_lc.energy_limit(TS, p, e(x0), _vec(P, G, I))
    assert two_stage_lc.energy(p, tuple(x0)) == pytest.approx(e(x0), rel=1e-12)
    assert peak <= lim
    assert lim < 10.0 * peak
