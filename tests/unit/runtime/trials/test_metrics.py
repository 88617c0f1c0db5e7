"""Step-response, ramp and tracking metrics against python-control's ``step_info`` and closed
forms; the split of a reference into holds, steps and ramps."""
import math

import control
import numpy as np
import pytest

from hilrig.runtime.trials.metrics import (MAX_CHANGES, TrackingMetrics, segment_metrics,
                                    split_reference, step_response_info)


def _compare_with_step_info(t, y):
    # python-control's step_info on recorded data measures from zero and takes the last sample
    # as the final value; pass the time grid (without it, 100 points are assumed).
    ref = control.step_info(y, t)
    ours = step_response_info(t, y)
    assert ours["rise_time_s"] == pytest.approx(ref["RiseTime"], rel=1e-12, abs=1e-15)
    assert ours["settling_time_s"] == pytest.approx(ref["SettlingTime"], rel=1e-12, abs=1e-15)
    assert ours["overshoot_pct"] == pytest.approx(ref["Overshoot"], rel=1e-12, abs=1e-12)
    assert ours["undershoot_pct"] == pytest.approx(ref["Undershoot"], rel=1e-12, abs=1e-12)
    assert ours["peak"] == pytest.approx(ref["Peak"], rel=1e-12)
    assert ours["peak_time_s"] == pytest.approx(ref["PeakTime"], rel=1e-12, abs=1e-15)
    assert ours["steady_state"] == pytest.approx(ref["SteadyStateValue"], rel=1e-12)
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
    assert all(math.isnan(v) for k, v in nothing.items() if k.endswith(("_s", "_pct")))


def test_undershoot_of_a_non_minimum_phase_step_matches_step_info():
    # (1 - s) / (s + 1)^2 starts the wrong way: step_info's Undershoot is 100 times the largest
    # excursion below 0 over the final value (python-control docs)
    sys = control.tf([-1.0, 1.0], [1.0, 2.0, 1.0])
    t = np.linspace(0.0, 20.0, 20001)
    y = np.asarray(control.step_response(sys, t).outputs).ravel()
    ours = _compare_with_step_info(t, y)
    # y(t) = 1 - (1 + 2t) e^-t dips to 1 - 2 e^-1/2 = -0.21306 at t = 1/2 (inverse Laplace
    # transform of (1 - s) / (s (s + 1)^2) [derived]); relative to y(20) = 1 - 41 e^-20, the
    # final value step_info and ours divide by (1e-7 low)
    assert ours["undershoot_pct"] == pytest.approx(100.0 * (2.0 * math.exp(-0.5) - 1.0), rel=1e-6)
    assert ours["overshoot_pct"] == 0.0


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
    segs, _ = segment_metrics(t, v, raw)
    assert [g["kind"] for g in segs] == ["hold", "step", "hold"]
    s = segs[1]
    k = int(np.flatnonzero(t == s["t_start_s"])[0])
    assert t[k] == pytest.approx(0.010)
    # the step's window runs to the end of the run (no later change); step_info on recorded
    # data measures from 0, so the output's value at the step is subtracted first
    ref = control.step_info(v[k:] - v[k], timepts=t[k:] - t[k])
    assert s["rise_time_s"] == pytest.approx(ref["RiseTime"], rel=1e-12)
    assert s["settling_time_s"] == pytest.approx(ref["SettlingTime"], rel=1e-12)
    assert s["overshoot_pct"] == pytest.approx(ref["Overshoot"], rel=1e-9, abs=1e-12)
    assert s["undershoot_pct"] == pytest.approx(ref["Undershoot"], rel=1e-9, abs=1e-12)
    assert s["peak_V"] - v[k] == pytest.approx(ref["Peak"], rel=1e-12)
    assert s["peak_time_s"] == pytest.approx(ref["PeakTime"], rel=1e-12)
    assert s["steady_state_V"] - v[k] == pytest.approx(ref["SteadyStateValue"], rel=1e-12)
    assert (s["v_from_V"], s["v_to_V"]) == (400.0, 420.0)
    assert abs(s["steady_state_error_V"]) < 0.05
    # the summary carries the same numbers
    assert res.summary["segments"][1]["rise_time_s"] == s["rise_time_s"]


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


# Segments. Ramps are checked against the closed-form ramp response of a first-order lag
# y' = (r - y) / tau from rest: with r = a s (s from the ramp's start) y = a (s - tau +
# tau e^(-s/tau)), so the error a tau (1 - e^(-s/tau)) tends to a tau and the lag to tau;
# after the ramp ends (s = T) y relaxes to V2 as e^(-(s - T)/tau) [derived].
TS = 50e-6


def _first_order_ramp(tau, n_ramp, n0=100, n_after=400, v1=400.0, a=5000.0):
    """Ticks k = 0..n-1 at TS: a hold at v1 for n0 ticks, a ramp of slope a [V/s] over n_ramp
    ticks, a hold at v2 for n_after ticks; the output is the closed form above."""
    k = np.arange(n0 + n_ramp + n_after)
    t = k * TS
    s = np.clip(k - n0, 0, None) * TS              # time since the ramp's start, exact ticks
    T = n_ramp * TS
    sr = np.minimum(s, T)
    r = v1 + a * sr
    v2 = v1 + a * T
    e_end = a * tau * (1.0 - math.exp(-T / tau))   # error at the ramp's end
    y = np.where(s <= T, v1 + a * (sr - tau + tau * np.exp(-sr / tau)),
                 v2 - e_end * np.exp(-(s - T) / tau))
    return t, r, y, T, e_end


@pytest.mark.parametrize("n_ramp", [400, 40])     # T = 20 tau (steady lag) and 2 tau (not yet)
def test_ramp_lag_and_largest_error_match_the_first_order_closed_form(n_ramp):
    tau, a, n0 = 1e-3, 5000.0, 100
    t, r, y, T, e_end = _first_order_ramp(tau, n_ramp, n0=n0, a=a)
    segs, info = segment_metrics(t, y, r)
    assert [g["kind"] for g in segs] == ["hold", "ramp", "hold"]
    hold0, ramp, hold1 = segs
    assert ramp["t_start_s"] == t[n0] and ramp["t_end_s"] == t[n0 + n_ramp]
    assert ramp["v_from_V"] == 400.0 and ramp["v_to_V"] == pytest.approx(400.0 + a * T, rel=1e-12)
    assert ramp["slope_V_per_s"] == pytest.approx(a, rel=1e-9)
    # lag at the ramp's end: tau (1 - e^(-T/tau)) [derived]; -> tau for a long ramp
    assert ramp["lag_s"] == pytest.approx(tau * (1.0 - math.exp(-T / tau)), rel=1e-9)
    # largest error: a tau (1 - e^(-T/tau)) at the ramp's end (it grows during the ramp and
    # decays after it) [derived]
    assert ramp["max_abs_error_V"] == pytest.approx(e_end, rel=1e-9)
    assert ramp["time_of_max_abs_error_s"] == t[n0 + n_ramp]
    # the lag stays within 2 % of its end value from s* = -tau ln(0.02 + 0.98 e^(-T/tau)) on
    # (tau (1 - e^(-s/tau)) >= 0.98 tau (1 - e^(-T/tau))) [derived]; sampled at ticks
    s_star = -tau * math.log(0.02 + 0.98 * math.exp(-T / tau))
    assert T - s_star - TS - 1e-12 <= ramp["lag_steady_s"] <= T - s_star + 1e-12
    # settling after the end: the error e_end e^(-u/tau) drops below 2 % of the change a T at
    # u = tau ln(e_end / (0.02 a T)) [derived]; the first tick after it
    u = tau * math.log(e_end / (0.02 * a * T))
    assert u - 1e-12 <= ramp["settling_time_s"] <= u + TS + 1e-12
    assert ramp["overshoot_pct"] == 0.0                 # a first-order lag never passes r
    v2 = 400.0 + a * T
    assert ramp["steady_state_error_V"] == pytest.approx(v2 - y[-1], rel=1e-9)
    # the hold after it is measured from the instant the ramp's response settled
    assert hold1["settled_from_s"] == pytest.approx(ramp["t_end_s"] + ramp["settling_time_s"])
    assert hold1["max_abs_error_V"] < 0.02 * a * T
    assert hold0["max_abs_error_V"] == 0.0
    assert (hold0["t_start_s"], hold0["t_end_s"]) == (0.0, t[n0])
    assert info["changes_found"] == info["changes_listed"] == 1


def test_a_long_lag_is_tau_and_a_short_ramp_says_its_lag_is_not_steady():
    tau = 1e-3
    long_ramp = segment_metrics(*(_first_order_ramp(tau, 400)[i] for i in (0, 2, 1)))[0][1]
    short_ramp = segment_metrics(*(_first_order_ramp(tau, 40)[i] for i in (0, 2, 1)))[0][1]
    assert long_ramp["lag_s"] == pytest.approx(tau, rel=1e-8)      # e^-20 [derived]
    assert long_ramp["lag_steady_s"] > 0.75 * 400 * TS             # steady over most of it
    assert short_ramp["lag_steady_s"] < 0.1 * 40 * TS              # still growing at its end


def test_a_ramp_between_ticks_is_one_ramp_with_its_end_values():
    # a profile ramp 400 -> 500 V from 10.02 ms to 11.02 ms: its first and last ticks move
    # by part of the slope
    t = np.arange(800) * TS
    r = np.interp(t, [0.0, 10.02e-3, 11.02e-3], [400.0, 400.0, 500.0])
    segs, _ = segment_metrics(t, r, r)
    assert [g["kind"] for g in segs] == ["hold", "ramp", "hold"]
    ramp = segs[1]
    assert (ramp["v_from_V"], ramp["v_to_V"]) == (400.0, 500.0)
    assert ramp["t_start_s"] == t[200] and ramp["t_end_s"] == t[221]   # last tick at 400 V
    assert ramp["slope_V_per_s"] == pytest.approx(1e5, rel=1e-9)
    assert ramp["lag_s"] == 0.0 and ramp["max_abs_error_V"] == 0.0


def test_steps_and_ramps_of_a_profile_in_order():
    # step up, hold, ramp down, ramp up at another slope right after it, step down
    t = np.arange(2000) * TS
    r = np.interp(t, [0, 10e-3, 10e-3, 30e-3, 40e-3, 60e-3, 80e-3, 80e-3],
                  [400, 400, 450, 450, 350, 450, 450, 420])
    segs, _ = segment_metrics(t, r, r)
    # (np.interp at t = k Ts puts a corner's value 1e-13 V off: rounded away)
    got = [(g["kind"], round(g["t_start_s"], 9), round(g["t_end_s"], 9), round(g["v_from_V"], 9),
            round(g["v_to_V"], 9)) for g in segs]
    assert got == [("hold", 0.0, 0.01, 400.0, 400.0), ("step", 0.01, 0.01, 400.0, 450.0),
                   ("hold", 0.01, 0.03, 450.0, 450.0), ("ramp", 0.03, 0.04, 450.0, 350.0),
                   ("ramp", 0.04, 0.06, 350.0, 450.0), ("hold", 0.06, 0.08, 450.0, 450.0),
                   ("step", 0.08, 0.08, 450.0, 420.0), ("hold", 0.08, 0.1, 420.0, 420.0)]
    assert [g.get("slope_V_per_s") for g in segs if g["kind"] == "ramp"] == [
        pytest.approx(-1e4), pytest.approx(5e3)]


def test_a_noisy_battery_model_reference_makes_a_few_segments():
    """A pack reference v = n (OCV - R0 i) - v_rc driven by a noisy load current (demo data:
    108 cells, R0 1.2 mohm, an RC pair of 0.6 mohm and tau 30 s, 50 A with 5 A rms noise and
    two load steps): the noise and the RC drift stay inside holds; each load step of the
    current is one step of the reference."""
    rng = np.random.default_rng(12)
    n, ts = 200_000, TS                                 # 10 s
    t = np.arange(n) * ts
    i = 50.0 + 150.0 * ((t >= 3.0) & (t < 7.0)) + rng.normal(0.0, 5.0, n)
    ocv = 3.9 - 0.002 * t                               # slow discharge
    v_rc = 108 * 0.6e-3 * 150.0 * np.clip(1.0 - np.exp(-(t - 3.0) / 30.0), 0.0, None)
    r = 108 * (ocv - 1.2e-3 * i) - v_rc
    y = r + rng.normal(0.0, 0.05, n)
    segs, info = segment_metrics(t, y, r)
    assert [g["kind"] for g in segs] == ["hold", "step", "hold", "step", "hold"]
    up, down = segs[1], segs[3]
    assert up["t_start_s"] == pytest.approx(3.0) and down["t_start_s"] == pytest.approx(7.0)
    # a step of 150 A through 108 x 1.2 mohm: 19.44 V [derived], give or take the noise of
    # the two samples it joins (5 A rms x 0.1296 ohm = 0.65 V rms each)
    assert up["v_to_V"] - up["v_from_V"] == pytest.approx(-19.44, abs=4.0)
    assert down["v_to_V"] - down["v_from_V"] == pytest.approx(19.44, abs=4.0)
    # the threshold stands above the noise on the per-tick change
    assert info["threshold_V"] > 5 * 0.65
    assert info["changes_found"] == 2


def test_the_count_of_steps_and_ramps_is_capped_at_the_largest():
    # 300 small steps (2 V square wave) and three large ones (40 V): all the large ones stay
    t = np.arange(30_000) * TS
    r = 400.0 + 2.0 * (np.floor(t / 5e-3) % 2)
    r[10_000:] += 40.0
    r[20_000:] -= 40.0
    r[25_000:] += 40.0
    changes, thr, left = split_reference(r)
    assert len(changes) == MAX_CHANGES and left > 200
    big = [c.a + 1 for c in changes if abs(r[c.b] - r[c.a]) > 30.0]
    assert big == [10_000, 20_000, 25_000]
    segs, info = segment_metrics(t, r, r)
    assert info["changes_listed"] == MAX_CHANGES and info["changes_found"] == MAX_CHANGES + left
    assert sum(g["kind"] != "hold" for g in segs) == MAX_CHANGES
