"""The operating point (runtime/analysis/linear.py, step 1) checked by calling the plugins'
kernels directly, against the averaged circuit's equilibrium, and its error paths."""
import math

import numpy as np
import pytest

from hilrig.runtime.analysis import linear, point

from .loops import model

CONTROLLERS = ("cascaded_pi", "state_feedback", "flatness")
# (plant, v_ref, p_load, extra): the demo plant at three points, the tests' own plants
POINTS = [("demo", 400.0, 50e3, ()), ("demo", 300.0, -40e3, ()), ("demo", 480.0, 80e3, ()),
          ("single_48V", 48.0, 1.5e3, ()), ("two_stage_800V", 800.0, 100e3, ())]
CASES = [(pl, c, v, p, (("controller__V0", v), ("controller__P0", p))
          if c == "state_feedback" and pl != "demo" else ex)
         for c in CONTROLLERS for pl, v, p, ex in POINTS]


def _kernels(prep):
    sc = prep.sc
    return sc.plant.plugin.module, sc.controller.plugin.module, prep.args


@pytest.mark.parametrize("plant,controller,v,p,extra", CASES,
                         ids=[f"{c[0]}-{c[1]}-{c[2]:g}V-{c[3] / 1e3:g}kW" for c in CASES])
def test_the_operating_point_is_at_rest(plant, controller, v, p, extra):
    prep, m = model(plant, controller, 0.0, v, p, extra)
    pm, cm, a = _kernels(prep)
    op = m.op
    x, u, d, xc = op.x.copy(), op.u.copy(), op.d.copy(), op.xc.copy()
    # the plant at rest: no state moves by more than 1e-9 of its size over a control period
    f = np.array(pm.derivs(0.0, a["pp"], x, u, d))
    assert np.all(np.abs(f) * m.Ts <= 1e-9 * np.maximum(np.abs(x), 1.0)), f
    # the measurement the controller reads, from the plant's own outputs kernel
    y = np.zeros(a["y"].shape[0])
    pm.outputs(0.0, a["pp"], x, u, d, y)
    assert np.allclose(y, op.y, rtol=1e-12, atol=0.0)
    yc = np.ascontiguousarray(y[np.asarray(a["iyc"])[:len(m.reads)]])
    r = np.zeros(5)
    r[0] = v
    # the controller at rest: one step leaves its state as it is and returns the same command
    xc2, u2 = xc.copy(), np.zeros_like(u)
    code = cm.step(0.0, a["pc"], xc2, yc, r, u2)
    assert code == 0
    assert np.all(np.abs(xc2 - xc) <= 1e-9 * np.maximum(np.abs(xc), 1.0))
    assert np.all(np.abs(u2 - u) <= 1e-9 * np.maximum(np.abs(u), 1.0))
    # cascaded_pi and state_feedback integrate the voltage error: no steady-state error
    if controller in ("cascaded_pi", "state_feedback"):
        assert op.v_out == pytest.approx(v, rel=1e-9)
        assert not any("steady-state error" in n for n in op.notes)


def test_the_demo_equilibrium_is_the_circuits():
    # Two-stage LC filter with a constant-power load P at v2 (derived from the averaged
    # circuit at rest; Erickson & Maksimovic, Fundamentals of Power Electronics,
    # 2nd ed., ch. 3, from memory): i1 = i2 = P/v2, v1 = v2 + R2 P/v2, u = v1 + R1 P/v2.
    # Demo plant R1 = 5 mohm, R2 = 3 mohm (demo.toml).
    for v, p in ((400.0, 50e3), (300.0, -40e3)):
        _, m = model("demo", "cascaded_pi", 0.0, v, p)
        i = p / v
        want = dict(i_L1=i, v_C1=v + 3e-3 * i, i_L2=i, v_out=v)
        got = dict(zip(m.all_plant_states, m.op.x))
        for name, val in want.items():
            assert got[name] == pytest.approx(val, rel=1e-9, abs=1e-9)
        assert m.op.u[0] == pytest.approx(v + 3e-3 * i + 5e-3 * i, rel=1e-9)


def test_integral_action_removes_the_error_of_a_wrong_model():
    # The flatness law without integral action (pole_int = 0) with its resistances 1.5x the
    # plant's ends off the reference (measured 400.655 V at 400 V, 50 kW); with integral action
    # it ends on it (common practice, no source: an integrator removes a constant error)
    _, off = model("demo", "flatness", 0.0, 400.0, 50e3, (("controller__model_R_scale", 1.5),))
    assert abs(off.op.v_out - 400.0) > 0.1
    assert any("steady-state error" in n for n in off.op.notes)
    _, on = model("demo", "flatness", 0.0, 400.0, 50e3,
                  (("controller__model_R_scale", 1.5), ("controller__pole_int", 300.0)))
    assert on.op.v_out == pytest.approx(400.0, rel=1e-9)
    assert not on.op.notes


def test_no_steady_state_is_a_clear_error():
    # cascaded_pi at 50 V, 60 kW on the demo plant would need 1200 A: beyond its 600 A current
    # limit (I_max), so no steady state exists
    with pytest.raises(linear.AnalysisError) as exc:
        model("demo", "cascaded_pi", 0.0, 50.0, 60e3)
    msg = str(exc.value)
    assert isinstance(exc.value, ValueError)
    assert "no steady state" in msg and "50 V" in msg and "60000 W" in msg
    assert "limit" in msg


def test_a_point_below_the_collapse_limit_is_a_clear_error():
    # demo.toml: [limits] v_collapse = "25 V"
    with pytest.raises(linear.AnalysisError, match=r"20 V.*below the collapse limit 25 V"):
        model("demo", "cascaded_pi", 0.0, 20.0, 1e3)


@pytest.mark.parametrize("controller", CONTROLLERS)
def test_margins_and_summary_are_numbers(controller):
    _, m = model("demo", controller, 0.0, 400.0, 50e3)
    mg = point.margins(m)
    assert mg["available"]
    for key in ("gain_margin", "gain_margin_db", "phase_margin_deg", "f_phase_crossover_hz",
                "f_gain_crossover_hz"):
        assert isinstance(mg[key], float) and math.isfinite(mg[key]), (key, mg[key])
    s = point.summary(m)
    assert s["stable"] is (point.largest_pole(m) < 1.0)
    assert s["v_out_V"] == m.op.v_out
