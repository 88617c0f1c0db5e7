"""The linearised sampled loop (runtime/analysis/linear.py, point.py) against the same loop built
independently with python-control (control 0.10.2, a general-purpose library) from the same
continuous plant matrices (m.A, m.B, m.C, m.D) and the controller's discrete matrices
(m.Ac, m.Bc, m.Cc, m.Dc): control.ss, control.c2d(..., "zoh"), the actuation delay as z^-n in
series (a half-period delay composed from two half steps of c2d at Ts/2), control.series and
control.feedback. The helpers are in loops.py.

What is compared: closed-loop poles (eig of m.Acl) to 1e-9 relative, the loop gain
point.loop_gain to control.frequency_response to 1e-9 relative, and point.margins' governing
margins to control.stability_margins to 0.1 dB / 0.1 degree. Every case runs on the demo plant
(shipped demo.toml, two_stage_lc) and on plants of the tests' own (loops.py, demo data).
"""
import math
import warnings

import control
import numpy as np
import pytest

from hilrig.runtime.analysis import point

from .loops import closed_loop_poles, loop_gain_system, match_poles, model

CONTROLLERS = ("cascaded_pi", "state_feedback", "flatness")
DELAYS = (0.0, 0.5, 1.0, 1.5, 2.0)

#: (plant, v_ref, p_load, extra overrides): the demo plant at several operating points, and the
#: tests' own plants (state_feedback designed at their operating point)
POINTS = [("demo", 400.0, 50e3), ("demo", 300.0, -40e3), ("demo", 500.0, 80e3),
          ("demo", 450.0, 0.0)]
OWN = [("single_48V", 48.0, 1.5e3), ("two_stage_800V", 800.0, 100e3)]


def _extra(plant, controller, v, p):
    if controller == "state_feedback" and plant != "demo":
        return (("controller__V0", v), ("controller__P0", p))
    return ()


def _cases():
    out = []
    for c in CONTROLLERS:
        for plant, v, p in POINTS:
            out.append((plant, c, 0.0, v, p))
        for d in DELAYS[1:]:
            out.append(("demo", c, d, 400.0, 50e3))
        for plant, v, p in OWN:
            for d in DELAYS:
                out.append((plant, c, d, v, p))
    return out


CASES = _cases()
IDS = [f"{pl}-{c}-d{d}-{v:g}V-{p / 1e3:g}kW" for pl, c, d, v, p in CASES]


def _model(plant, c, d, v, p):
    return model(plant, c, d, v, p, _extra(plant, c, v, p))


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_closed_loop_poles_equal_python_controls(case):
    prep, m = _model(*case)
    assert m.delay_halves == 2 * case[2]
    ours = np.linalg.eigvals(m.Acl)
    # python-control: feedback(L, 1) of L = -K(z) z^-n P_zoh(z) (loops.py)
    theirs = closed_loop_poles(m, prep.args["iyc"], case[2])
    assert match_poles(ours, theirs) < 1e-9
    # and point.poles reports the same set, largest first
    ps = point.poles(m)
    assert match_poles([q["z"] for q in ps], theirs) < 1e-9
    assert [q["abs_z"] for q in ps] == sorted((q["abs_z"] for q in ps), reverse=True)
    assert point.largest_pole(m) == pytest.approx(np.max(np.abs(theirs)), rel=1e-9)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_loop_gain_equals_python_controls_frequency_response(case):
    prep, m = _model(*case)
    fn = 0.5 / m.Ts
    f = np.array([1.0, 30.0, 300.0, 1000.0, 0.3 * fn, 0.9 * fn])
    L = loop_gain_system(m, prep.args["iyc"], case[2])
    # control.frequency_response of a discrete system evaluates at z = exp(j w Ts)
    theirs = np.asarray(control.frequency_response(L, 2 * math.pi * f).complex).ravel()
    ours = point.loop_gain(m, f)
    assert np.max(np.abs(ours - theirs) / np.abs(theirs)) < 1e-9


def _frd(L, Ts):
    """python-control's own frequency response of L as FRD data: 4000 log-spaced points up to,
    not including, the Nyquist frequency (from 1e-6 of it: f = 0 is not among them)."""
    wn = math.pi / Ts
    return control.frd(L, np.geomspace(1e-6 * wn, wn, 4001)[:-1])


def _same_margins(ours, gm, pm):
    gm_db = 20 * math.log10(gm) if np.isfinite(gm) and gm > 0 else math.inf
    ok_g = (math.isinf(ours["gain_margin_db"]) and math.isinf(gm_db)) or (
        abs(ours["gain_margin_db"] - gm_db) <= 0.1)
    ok_p = (math.isinf(ours["phase_margin_deg"]) and not np.isfinite(pm)) or (
        abs(ours["phase_margin_deg"] - pm) <= 0.1)
    return ok_g, ok_p


def _wrong_by_its_own_response(L, ours, gm, pm, wpc, wgc, ok_g, ok_p):
    """Where python-control's governing margin differs from ours, show by
    control.frequency_response that python-control's is wrong: its crossover is none (|L| not
    1, L not real and negative, or L infinite: an open-loop pole at z = 1), or it missed ours
    (a true crossover by its frequency response, closer to instability than its own). Returns
    the reasons, one per differing margin (an AssertionError if neither holds)."""
    def at(w):
        try:
            return complex(np.asarray(control.frequency_response(L, [w]).complex).ravel()[0])
        except np.linalg.LinAlgError:      # a pole of L on the unit circle at w
            return complex(np.inf, 0.0)

    why = []
    if not ok_g:
        Lp = at(wpc)
        # python-control's true crossovers sit within 1e-5 of the real axis; its spurious ones
        # near DC 1.6e-3 off it (the L of two integrators tends to -180 degrees, no crossing)
        none = not np.isfinite(Lp) or abs(Lp.imag) > 1e-4 * abs(Lp) or Lp.real > 0
        f_o = ours["f_phase_crossover_hz"]
        Lo = at(2 * math.pi * f_o) if f_o is not None else None
        missed = (Lo is not None and abs(Lo.imag) < 1e-9 * abs(Lo) and Lo.real < 0
                  and abs(ours["gain_margin_db"]) < abs(20 * math.log10(gm)) - 0.1)
        assert none or missed, ("gain margin", ours["gain_margin_db"], 20 * math.log10(gm))
        why.append("gm: none" if none else "gm: missed")
    if not ok_p:
        Lg = at(wgc)
        none = not np.isfinite(Lg) or abs(abs(Lg) - 1.0) > 1e-4
        f_o = ours["f_gain_crossover_hz"]
        Lo = at(2 * math.pi * f_o) if f_o is not None else None
        missed = (Lo is not None and abs(abs(Lo) - 1.0) < 1e-9
                  and abs(ours["phase_margin_deg"]) < abs(pm) - 0.1)
        assert none or missed, ("phase margin", ours["phase_margin_deg"], pm)
        why.append("pm: none" if none else "pm: missed")
    return why


#: the margins on fewer cases (python-control's FRD margins cost 0.3 s each): every operating
#: point without delay, and 1.5 and 2 periods (where python-control's methods go wrong)
MARGIN_CASES = [c for c in CASES if c[2] in (0.0, 1.5, 2.0)]


@pytest.mark.parametrize("case", MARGIN_CASES,
                         ids=[IDS[CASES.index(c)] for c in MARGIN_CASES])
def test_governing_margins_equal_python_controls(case):
    prep, m = _model(*case)
    ours = point.margins(m)
    assert ours["available"]
    for key in ("gain_margin_db", "phase_margin_deg"):
        assert isinstance(ours[key], float) and not math.isnan(ours[key])
    L = loop_gain_system(m, prep.args["iyc"], case[2])
    # control.stability_margins, governing margins (the gain margin closest to 0 dB, the
    # smallest |phase margin|), two ways: its default ("poly", roots of polynomials in z) on
    # the state-space L, and on python-control's frequency response of L (FRD). Each agrees
    # with ours to 0.1 dB / 0.1 degree, or is wrong by its own frequency response: the
    # polynomials of a 5th-8th order loop sampled at 10-20 kHz are ill-conditioned (seen: the
    # demo plant with 1.5 and 2 periods of delay, |L| = 0.9945 at its "gain crossover"; the
    # 48 V plant with 2, crossovers at 222 and 327 Hz missed), and the FRD grid interpolates
    # (seen: the 800 V plant with 2 periods, gain margin -24.12 dB at 3618.7 Hz where L is
    # not real) and does not reach f = 0. For each margin at least one of the two agrees.
    agree_g = agree_p = False
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")    # python-control: "singular matrix" at a pole z = 1
        for gm, pm, _, wpc, wgc, _ in (control.stability_margins(L),
                                       control.stability_margins(_frd(L, m.Ts))):
            ok_g, ok_p = _same_margins(ours, gm, pm)
            _wrong_by_its_own_response(L, ours, gm, pm, wpc, wgc, ok_g, ok_p)
            agree_g, agree_p = agree_g or ok_g, agree_p or ok_p
    assert agree_g and agree_p


def _stable(m, k):
    return np.max(np.abs(np.linalg.eigvals(m.Ao + k * m.Bo @ m.Co))) < 1.0


@pytest.mark.parametrize("case", MARGIN_CASES,
                         ids=[IDS[CASES.index(c)] for c in MARGIN_CASES])
def test_a_stable_loop_loses_stability_at_its_gain_margins(case):
    # Nyquist criterion on the unit circle (Franklin, Powell, Workman, Digital Control of
    # Dynamic Systems, 3rd ed., 1998, sec. 7.4, from memory): the loop gain k L puts a
    # closed-loop pole on the unit circle exactly where -1/k is on L's curve. Raising the gain
    # of a stable loop, it first loses stability at the smallest gain margin above 1; lowering
    # it, at the largest below 1. Checked on the eigenvalues of Ao + k Bo Co directly.
    # point.margins leaves the Nyquist frequency out (as python-control does), where L is real
    # too: a real pole passes z = -1 at 1/|L(-1)| if L(-1) < 0; the test adds that one itself.
    prep, m = _model(*case)
    if not _stable(m, 1.0):
        pytest.skip("unstable at k = 1: the gain margins do not bound a stable range")
    gms = [c["gain_margin"] for c in point.margins(m)["phase_crossovers"]]
    L = loop_gain_system(m, prep.args["iyc"], case[2])
    Ln = complex(np.asarray(control.frequency_response(L, [math.pi / m.Ts]).complex).ravel()[0])
    if Ln.real < 0:
        gms.append(1.0 / abs(Ln))
    up = min((g for g in gms if g > 1.0), default=None)
    down = max((g for g in gms if g < 1.0), default=None)
    for g, inside, outside in ((up, 1 - 1e-4, 1 + 1e-4), (down, 1 + 1e-4, 1 - 1e-4)):
        if g is not None:
            assert _stable(m, g * inside) and not _stable(m, g * outside), g
    if up is None:
        assert _stable(m, 10.0)


@pytest.mark.parametrize("case", MARGIN_CASES,
                         ids=[IDS[CASES.index(c)] for c in MARGIN_CASES])
def test_every_crossover_is_one_by_python_controls_frequency_response(case):
    prep, m = _model(*case)
    ours = point.margins(m)
    L = loop_gain_system(m, prep.args["iyc"], case[2])

    def at(f):
        return complex(np.asarray(control.frequency_response(L, [2 * math.pi * f]).complex)
                       .ravel()[0])

    fn = 0.5 / m.Ts
    for g in ours["gain_crossovers"]:
        assert 0.0 < g["f_hz"] < fn
        Lg = at(g["f_hz"])
        assert abs(Lg) == pytest.approx(1.0, abs=1e-9)
        # phase margin: 180 degrees plus the phase of L (Franklin, Powell, Workman, Digital
        # Control of Dynamic Systems, 3rd ed., 1998, sec. 7.4, from memory)
        pm = (180.0 + math.degrees(math.atan2(Lg.imag, Lg.real)) + 180.0) % 360.0 - 180.0
        assert g["phase_margin_deg"] == pytest.approx(pm, abs=1e-6)
    for c in ours["phase_crossovers"]:
        Lp = at(c["f_hz"])
        assert Lp.real < 0 and abs(Lp.imag) < 1e-9 * abs(Lp)
        # gain margin: 1/|L| where L crosses the negative real axis (same source)
        assert c["gain_margin"] == pytest.approx(1.0 / abs(Lp), rel=1e-9)
        assert c["gain_margin_db"] == pytest.approx(-20 * math.log10(abs(Lp)), abs=1e-9)


# -- the comparison can fail: deliberately wrong loops built the same way must not match ------

@pytest.mark.parametrize("controller", CONTROLLERS)
def test_the_comparison_sees_a_delay_one_tick_off_halves_swapped_or_euler(controller):
    for delay, wrong in [(1.0, dict(lag_shift=1)), (2.0, dict(lag_shift=-1)),
                         (0.5, dict(lag_shift=1)), (0.5, dict(swap_halves=True)),
                         (1.5, dict(swap_halves=True)), (0.0, dict(euler=True))]:
        prep, m = _model("demo", controller, delay, 400.0, 50e3)
        iyc = prep.args["iyc"]
        theirs = closed_loop_poles(m, iyc, delay, **wrong)
        assert match_poles(np.linalg.eigvals(m.Acl), theirs) > 1e-4
        f = np.array([300.0, 3000.0])
        theirs = np.asarray(control.frequency_response(
            loop_gain_system(m, iyc, delay, **wrong), 2 * math.pi * f).complex).ravel()
        assert np.max(np.abs(point.loop_gain(m, f) - theirs) / np.abs(theirs)) > 1e-3
