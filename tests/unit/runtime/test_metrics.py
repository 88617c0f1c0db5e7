"""Step-response and tracking metrics against python-control's ``step_info`` and closed forms."""
import math

import control
import numpy as np
import pytest

from hilrig.runtime.metrics import (TrackingMetrics, find_steps, step_metrics,
                                    step_response_info)


def _compare_with_step_info(t, y):
    # python-control's step_info on recorded data measures from zero and takes the last sample
    # as the final value; pass the time grid (without it, 100 points are assumed).
    ref = control.step_info(y, t)
    ours = step_response_info(t, y)
    assert ours["rise_time_s"] == pytest.approx(ref["RiseTime"], rel=1e-12, abs=1e-15)
    assert ours["settling_time_s"] == pytest.approx(ref["SettlingTime"], rel=1e-12, abs=1e-15)
    assert ours["overshoot_pct"] == pytest.approx(ref["Overshoot"], rel=1e-12, abs=1e-12)
    return ours


def test_first_order_step_matches_step_info_and_closed_form():
    tau = 1e-3
    t = np.linspace(0.0, 20 * tau, 200001)
    y = 100.0 * (1.0 - np.exp(-t / tau))
    ours = _compare_with_step_info(t, y)
    # first-order step: rise time tau ln 9, 2 % settling tau ln 50 [derived, CHECKS.md]
    dt = t[1] - t[0]
    assert ours["rise_time_s"] == pytest.approx(tau * math.log(9.0), abs=2 * dt)
    assert ours["settling_time_s"] == pytest.approx(tau * math.log(50.0), abs=2 * dt)
    assert ours["overshoot_pct"] == 0.0


def test_second_order_overshoot_matches_step_info_and_handbook():
    # zeta = 0.5, wn = 1 rad/s: overshoot exp(-pi zeta / sqrt(1 - zeta^2)) = 16.3034 %,
    # peak time pi / wd = 3.62760 s (Ogata, Modern Control Engineering, ch. 5, from memory)
    sys = control.tf([1.0], [1.0, 1.0, 1.0])
    t = np.linspace(0.0, 40.0, 400001)
    resp = control.step_response(sys, t)
    y = np.asarray(resp.outputs).ravel()
    ours = _compare_with_step_info(t, y)
    assert ours["overshoot_pct"] == pytest.approx(16.3034, abs=2e-3)


def test_negative_step_and_no_change():
    t = np.linspace(0.0, 1.0, 1001)
    y = -50.0 * (1.0 - np.exp(-t / 0.05))
    _compare_with_step_info(t, y)
    nothing = step_response_info(t, np.zeros_like(t))
    assert all(math.isnan(v) for v in nothing.values())


def test_recorded_closed_loop_step(tmp_path):
    """A 400 -> 420 V step of the cascaded PI on the demo plant, from a real run, measured by our
    metrics and by control.step_info on the same recorded samples (output minus its start)."""
    from hilrig.runtime.recording import open_run
    from hilrig.runtime.run import run_scenario
    from hilrig.runtime.scenario import parse_scenario
    text = """
[timing]
Ts = "50 us"
duration = "40 ms"
[reference]
plugin = "profile"
points = [[0, 400], ["10 ms", 400], ["10 ms", 420]]
[load]
[[load.points]]
t = 0
P = "50 kW"
"""
    res = run_scenario(parse_scenario(text), tmp_path / "r")
    run = open_run(res.folder)
    t, v, raw = run.time, run.signals["v_out"], run.signals["v_ref_raw"]
    (k,) = find_steps(raw)
    assert t[k] == pytest.approx(0.010)
    ref = control.step_info(v[k:] - v[k], t[k:] - t[k])
    (s,) = step_metrics(t, v, raw)
    assert s.rise_time_s == pytest.approx(ref["RiseTime"], rel=1e-12)
    assert s.settling_time_s == pytest.approx(ref["SettlingTime"], rel=1e-12)
    assert s.overshoot_pct == pytest.approx(ref["Overshoot"], rel=1e-9, abs=1e-12)
    assert (s.v_from_V, s.v_to_V) == (400.0, 420.0)
    assert abs(s.steady_state_error_V) < 0.05
    # the summary carries the same numbers
    assert res.summary["steps"][0]["rise_time_s"] == s.rise_time_s


def test_tracking_metrics_over_chunks_equal_whole_run():
    # integral criteria IAE = sum |e| Ts, ISE = sum e^2 Ts (rectangle rule; Astrom & Hagglund,
    # Advanced PID Control, 2006, sec. 4.2, from memory) must not depend on the chunking
    rng = np.random.default_rng(3)
    n, ts = 1000, 1e-4
    t = np.arange(n) * ts
    vref = 400.0 + rng.normal(0, 1, n)
    vout = 400.0 + rng.normal(0, 1, n)
    u = rng.uniform(-10, 810, n)
    vdc = np.full(n, 800.0)
    whole = TrackingMetrics(ts)
    whole.update(t, vout, vref, u, vdc)
    parts = TrackingMetrics(ts)
    for a, b in ((0, 333), (333, 700), (700, 1000)):
        parts.update(t[a:b], vout[a:b], vref[a:b], u[a:b], vdc[a:b])
    e = vref - vout
    for m in (whole.result(), parts.result()):
        assert m["iae_Vs"] == pytest.approx(np.abs(e).sum() * ts, rel=1e-12)
        assert m["ise_V2s"] == pytest.approx((e * e).sum() * ts, rel=1e-12)
        assert m["rms_error_V"] == pytest.approx(np.sqrt(np.mean(e * e)), rel=1e-12)
        assert m["max_abs_error_V"] == pytest.approx(np.abs(e).max(), rel=1e-15)
        assert m["saturation_time_s"] == pytest.approx(np.count_nonzero((u <= 0) | (u >= 800)) * ts)
