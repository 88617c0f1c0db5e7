"""The analysis' continuous plant against closed forms, and the output-impedance model against
the constant-power-load model (Middlebrook's view of the same loop).

Single-stage LC filter with a constant-power load P and a conductance G at V (the plant's
docstring, plugins/plants/single_lc.py; derived from its two equations with i_load = P/v + G v):

    A = [[-R/L, -1/L], [1/C, P/(C V^2) - G/C]]

eigenvalues (tr +- sqrt(tr^2 - 4 det)) / 2; stable iff tr < 0 and det > 0, i.e.
P < R C V^2 / L and P < V^2 / R (G = 0): the load's negative incremental resistance
-V^2/P (R. D. Middlebrook, "Input filter considerations in design and application of switching
regulators", IEEE IAS Annual Meeting, 1976, from memory; A. Emadi, A. Khaligh, C. H. Rivetta,
G. A. Williamson, "Constant power loads and negative impedance instability in automotive
systems", IEEE Trans. Veh. Technol. 55(4), 2006, from memory).
"""
import cmath
import dataclasses

import control
import numpy as np
import pytest

from hilrig.runtime.analysis import linear, point
from hilrig.runtime.run import prepare
from hilrig.runtime.scenario import parse_scenario

from .loops import SINGLE_400V, match_poles, model, sampled_plant


def _single(R=20e-3, L=200e-6, C=500e-6, V_dc=800.0, G_ohm=None):
    """The tests' own 400 V-class single-stage scenario with other filter values (demo data);
    G_ohm: a resistive load in parallel [ohm]."""
    text = SINGLE_400V
    if G_ohm is not None:
        text = text.replace('P = "1 kW"\n', f'P = "1 kW"\nR = "{G_ohm} ohm"\n')
    ov = {"plant.R": R, "plant.L": L, "plant.C": C, "plant.V_dc": V_dc}
    return prepare(parse_scenario(text, name="single.toml", overrides=ov))


def _closed_form(R, L, C, V, P, G=0.0):
    """(eigenvalues, trace, determinant) of the single-stage Jacobian with the load."""
    a22 = P / (C * V * V) - G / C
    tr = -R / L + a22
    det = (-R / L) * a22 + 1.0 / (L * C)
    disc = cmath.sqrt(tr * tr - 4.0 * det)
    return np.array([(tr + disc) / 2, (tr - disc) / 2]), tr, det


# (R, L, C, V_dc, V, P, G_ohm): 48 V-class with a large capacitor, 400 V and 800 V classes with
# small and large ones, regeneration (P < 0), a resistive load in parallel (demo data)
PLANTS = [
    (4e-3, 22e-6, 4.7e-3, 60.0, 48.0, 1.5e3, None),
    (4e-3, 22e-6, 4.7e-3, 60.0, 48.0, -2e3, None),
    (20e-3, 200e-6, 500e-6, 800.0, 400.0, 50e3, None),
    (20e-3, 200e-6, 500e-6, 800.0, 400.0, 50e3, 200.0),
    (0.5, 200e-6, 500e-6, 800.0, 400.0, 100e3, None),
    (10e-3, 300e-6, 47e-6, 1000.0, 800.0, 120e3, None),
    (10e-3, 300e-6, 2.2e-3, 1000.0, 800.0, 120e3, 50.0),
]


@pytest.mark.parametrize("R,L,C,V_dc,V,P,G_ohm", PLANTS)
def test_single_stage_jacobian_and_eigenvalues_equal_the_closed_form(R, L, C, V_dc, V, P, G_ohm):
    prep = _single(R, L, C, V_dc, G_ohm)
    m = linear.linearize(prep, V, P)
    assert m.op.v_out == pytest.approx(V, rel=1e-9)     # cascaded_pi has integral action
    G = 0.0 if G_ohm is None else 1.0 / G_ohm
    assert m.plant_states == ["i_L1", "v_out"]
    A = np.array([[-R / L, -1 / L], [1 / C, P / (C * V * V) - G / C]])
    assert np.max(np.abs(m.A - A)) < 1e-6 * np.max(np.abs(A))
    lam, _, _ = _closed_form(R, L, C, V, P, G)
    assert match_poles(lam, np.linalg.eigvals(m.A)) < 1e-6
    # the load's incremental conductance: d(P/v + G v)/dv = -P/V^2 + G (a constant-power load's
    # incremental resistance -V^2/P: Middlebrook 1976; Emadi et al. 2006, from memory)
    assert m.y_load == pytest.approx(-P / V ** 2 + G, rel=1e-7, abs=1e-12)
    assert point.load_impedance(m) == pytest.approx(1.0 / (-P / V ** 2 + G), rel=1e-7)


def test_the_worked_single_stage_numbers():
    # worked by hand from the quadratic formula above (derived): L 200 uH, C 500 uF, V0 400 V,
    # P 100 kW: R 20 mohm -> 575 +- j3089.40 1/s (unstable); R 0.5 ohm -> -625 +- j2546.44 1/s
    for R, want in ((20e-3, 575 + 3089.40j), (0.5, -625 + 2546.44j)):
        m = linear.linearize(_single(R=R), 400.0, 100e3)
        lam = np.linalg.eigvals(m.A)
        top = lam[np.argmax(lam.imag)]
        assert top.real == pytest.approx(want.real, abs=0.01)
        assert top.imag == pytest.approx(want.imag, abs=0.01)


@pytest.mark.parametrize("R,L,C,V", [(20e-3, 200e-6, 500e-6, 400.0), (4e-3, 22e-6, 4.7e-3, 48.0),
                                     (10e-3, 300e-6, 47e-6, 800.0)])
def test_the_constant_power_limit_of_damping(R, L, C, V):
    # tr < 0 iff P < R C V^2 / L (Emadi et al. 2006, from memory; derived from the trace):
    # just below the plant's eigenvalues are in the left half plane, just above in the right
    p_lim = R * C * V * V / L
    prep = _single(R, L, C, V_dc=min(2.5 * V, 1200.0))
    k = linear.kernels(prep)
    below = linear.linearize(prep, V, p_lim * (1 - 1e-3), k)
    above = linear.linearize(prep, V, p_lim * (1 + 1e-3), k)
    assert np.max(np.linalg.eigvals(below.A).real) < 0 < np.max(np.linalg.eigvals(above.A).real)


def test_the_constant_power_limit_of_the_resistance():
    # det > 0 iff P < V^2 / R (Emadi et al. 2006, from memory; derived from the determinant):
    # a real eigenvalue crosses zero there. R large enough that this limit comes before the
    # damping limit R C V^2 / L (here 2.3 MW against V^2/R = 1152 W).
    R, L, C, V = 2.0, 22e-6, 4.7e-3, 48.0
    p_lim = V * V / R
    assert p_lim < R * C * V * V / L
    prep = _single(R, L, C, V_dc=200.0)
    k = linear.kernels(prep)
    below = linear.linearize(prep, V, p_lim * (1 - 1e-3), k)
    above = linear.linearize(prep, V, p_lim * (1 + 1e-3), k)
    lb, la = np.linalg.eigvals(below.A), np.linalg.eigvals(above.A)
    assert np.all(lb.real < 0) and np.max(la.real) > 0
    assert np.linalg.det(below.A) > 0 > np.linalg.det(above.A)
    assert abs(la[np.argmax(la.real)].imag) == 0.0


# -- Middlebrook: the loop with the load equals the emulator's loop closed through the load ------

MB_CASES = [("demo", "cascaded_pi", 0.0, 400.0, 50e3), ("demo", "flatness", 0.0, 300.0, 80e3),
            ("demo", "state_feedback", 1.5, 400.0, 50e3),
            ("demo", "cascaded_pi", 2.0, 450.0, -40e3),
            ("single_48V", "cascaded_pi", 0.5, 48.0, 1.5e3),
            ("two_stage_800V", "flatness", 1.0, 800.0, 100e3)]


@pytest.mark.parametrize("case", MB_CASES, ids=[f"{c[0]}-{c[1]}-d{c[2]}" for c in MB_CASES])
def test_the_load_closes_the_emulators_loop_exactly_in_continuous_time(case):
    # The current drawn by the load is i = y_load v_out (small signal). The emulator with a
    # current sink (As, Es: input the current drawn) closed through it in continuous time must
    # give the plant with the constant-power load: A = As + y_load Es C_v (Middlebrook 1976,
    # from memory: source and load as two impedances in a loop). Then the sampled loop built
    # from that with python-control (c2d ZOH, delay, controller) has the poles of m.Acl.
    prep, m = model(*case)
    Cv = m.C[m.i_vout:m.i_vout + 1, :]
    A_closed = m.As + m.y_load * m.Es @ Cv
    assert np.max(np.abs(A_closed - m.A)) < 1e-7 * np.max(np.abs(m.A))
    m2 = dataclasses.replace(m, A=A_closed)
    P = sampled_plant(m2, prep.args["iyc"], int(round(2 * case[2])))
    K = control.ss(m.Ac, m.Bc, m.Cc, m.Dc, m.Ts)
    cl = control.feedback(-control.series(P, K), 1)
    assert match_poles(np.linalg.eigvals(m.Acl), control.poles(cl)) < 1e-9


def _sampled_closure_error(m):
    """Relative pole distance between m.Acl and the sampled output-impedance loop closed
    through the load's admittance: python-control feedback of Z_out = ss(Az, Bz, -Cz, -Dz, Ts)
    (v_out per current drawn, v = -Z_out i) with i = y_load v_out."""
    Z = control.ss(m.Az, m.Bz, -m.Cz, -m.Dz, m.Ts)
    return match_poles(np.linalg.eigvals(m.Acl), control.poles(control.feedback(Z, m.y_load)))


def test_the_sampled_impedance_loop_differs_by_the_held_load_current():
    # Closing the *sampled* Z_out through the load's admittance is not the same loop: Z_out's
    # model holds the drawn current over a period (ZOH, point.py: "the injected current held
    # over a period"), the constant-power load draws y_load v_out(t) continuously. Measured:
    # 3.5e-3 (demo, cascaded_pi, 400 V, 50 kW), 2.1e-2 (400 V single stage), falling as Ts^2
    # (about 4x per halving of Ts). So the minor-loop gain Z_out / Z_load of point.middlebrook is
    # this approximation of the real loop, good to O(Ts^2). The test pins that: not exact, and
    # vanishing as Ts^2; the loop closed with the sign reversed is 10-100x further off and
    # converges only to first order (9.1e-2, 4.2e-2, 2.0e-2 at 50, 25, 12.5 us: every pole tends
    # to z = 1).
    errs, wrongs = [], []
    for ts in (50e-6, 25e-6, 12.5e-6):
        _, m = model("demo", "cascaded_pi", 0.0, 400.0, 50e3, (("timing__Ts", ts),))
        errs.append(_sampled_closure_error(m))
        Z = control.ss(m.Az, m.Bz, -m.Cz, -m.Dz, m.Ts)
        wrongs.append(match_poles(np.linalg.eigvals(m.Acl),
                                  control.poles(control.feedback(Z, m.y_load, sign=1))))
    assert all(w > 10 * e for w, e in zip(wrongs, errs))
    assert 1e-4 < errs[0] < 1e-2
    assert errs[1] < errs[0] / 3 and errs[2] < errs[1] / 3
