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


# Integral criteria IAE = sum |e| Ts, ISE = sum e^2 Ts, RMS = sqrt(mean e^2) (rectangle rule;
# Astrom & Hagglund, Advanced PID Control, 2006, sec. 4.2, from memory). Leaving non-finite
# samples out of them and counting them apart: common practice, no source.
CHUNKS = ((0, 333), (333, 700), (700, 1000))


def _demo_signals(seed=5, n=1000, ts=1e-4):
    # demo data: a 400 V output around a noisy reference, a command that sometimes saturates
    rng = np.random.default_rng(seed)
    t = np.arange(n) * ts
    vref = 400.0 + rng.normal(0, 1, n)
    vout = 400.0 + rng.normal(0, 1, n)
    u = rng.uniform(-10, 810, n)
    return t, vout, vref, u, np.full(n, 800.0)


def _chunked(ts, t, vout, vref, u, vdc):
    m = TrackingMetrics(ts)
    for a, b in CHUNKS:
        m.update(t[a:b], vout[a:b], vref[a:b], u[a:b], vdc[a:b])
    return m.result()


def test_all_finite_metrics_are_the_plain_numpy_sums_to_the_bit():
    """All-finite runs keep the arithmetic they had before non-finite samples were handled:
    the running sums are numpy's sums per chunk added in chunk order, compared exactly."""
    ts = 1e-4
    t, vout, vref, u, vdc = _demo_signals(ts=ts)
    e = vref - vout
    one = TrackingMetrics(ts)
    one.update(t, vout, vref, u, vdc)
    r1 = one.result()
    # one chunk: exactly numpy on the whole arrays
    assert r1["iae_Vs"] == float(np.abs(e).sum()) * ts
    assert r1["ise_V2s"] == float((e * e).sum()) * ts
    assert r1["rms_error_V"] == math.sqrt(float((e * e).sum()) / e.size)
    assert r1["max_abs_error_V"] == float(np.abs(e).max())
    assert r1["time_of_max_abs_error_s"] == float(t[np.argmax(np.abs(e))])
    assert r1["v_out_min_V"] == float(vout.min()) and r1["v_out_max_V"] == float(vout.max())
    assert r1["saturation_time_s"] == np.count_nonzero((u <= 0) | (u >= 800)) * ts
    assert r1["nonfinite_samples"] == 0
    # chunks: the per-chunk numpy sums, added in order
    s_abs = s_sq = 0.0
    for a, b in CHUNKS:
        s_abs += float(np.abs(e[a:b]).sum())
        s_sq += float((e[a:b] * e[a:b]).sum())
    r3 = _chunked(ts, t, vout, vref, u, vdc)
    assert r3["iae_Vs"] == s_abs * ts and r3["ise_V2s"] == s_sq * ts
    assert r3["rms_error_V"] == math.sqrt(s_sq / e.size)
    assert r3["max_abs_error_V"] == r1["max_abs_error_V"]
    assert list(r3) == ["iae_Vs", "ise_V2s", "rms_error_V", "max_abs_error_V",
                        "time_of_max_abs_error_s", "saturation_time_s", "v_out_min_V",
                        "v_out_max_V", "nonfinite_samples"]


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_non_finite_samples_are_left_out_and_counted(bad):
    ts = 1e-4
    t, vout, vref, u, vdc = _demo_signals(seed=8, ts=ts)
    hit = np.array([0, 1, 332, 333, 500, 999])   # chunk edges included
    vout = vout.copy()
    vout[hit] = bad
    vref = vref.copy()
    vref[650] = math.nan                          # a non-finite reference spoils that tick too
    r = _chunked(ts, t, vout, vref, u, vdc)
    e = vref - vout
    ok = np.isfinite(e)
    assert r["nonfinite_samples"] == hit.size + 1 == np.count_nonzero(~ok)
    ef = e[ok]
    assert r["iae_Vs"] == pytest.approx(np.abs(ef).sum() * ts, rel=1e-12)
    assert r["ise_V2s"] == pytest.approx((ef * ef).sum() * ts, rel=1e-12)
    assert r["rms_error_V"] == pytest.approx(np.sqrt(np.mean(ef * ef)), rel=1e-12)
    assert r["max_abs_error_V"] == float(np.abs(ef).max())
    assert r["time_of_max_abs_error_s"] == float(t[ok][np.argmax(np.abs(ef))])
    vf = vout[np.isfinite(vout)]                  # the range: every finite v_out sample
    assert (r["v_out_min_V"], r["v_out_max_V"]) == (float(vf.min()), float(vf.max()))
    assert r["saturation_time_s"] == np.count_nonzero((u <= 0) | (u >= 800)) * ts
    assert all(math.isfinite(v) for v in r.values())


def test_no_finite_sample_gives_no_value_not_a_number_from_nothing():
    ts = 1e-4
    t = np.arange(10) * ts
    m = TrackingMetrics(ts)
    m.update(t, np.full(10, math.nan), np.full(10, 400.0), np.full(10, 300.0), None)
    r = m.result()
    assert r["nonfinite_samples"] == 10
    for k in ("iae_Vs", "ise_V2s", "rms_error_V", "max_abs_error_V", "time_of_max_abs_error_s",
              "v_out_min_V", "v_out_max_V"):
        assert math.isnan(r[k]), k
    assert r["saturation_time_s"] == 0.0
