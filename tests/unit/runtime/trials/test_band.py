"""The tracking band (runtime/trials/metrics.py band_check: the outcomes "out of band" and
"oscillating"), segment metrics cut at the first trip or collapse, and metrics withheld after a
plant integration error; on synthetic signals whose answer is known in closed form."""
import math

import control
import numpy as np
import pytest

from hilrig.runtime.trials.metrics import (BAND_FLOOR_V, BAND_REL, OSC_SWINGS, OUT_OF_BAND_S,
                                    OUT_OF_BAND_TICKS, SETTLE_DELAY_S, SETTLE_TICKS, band_check,
                                    segment_metrics, withhold_metrics)
from hilrig.runtime.outcome import judge

TS = 50e-6
N = 800                       # 40 ms
T = np.arange(N) * TS
K_STEP = 100                  # the reference steps 24 V -> 28 V at 5 ms
R = np.where(np.arange(N) > K_STEP, 28.0, 24.0)


def _settled_window_start():
    # the settled window after the step starts SETTLE_DELAY_S after the step's tick
    return (K_STEP + 1) * TS + SETTLE_DELAY_S


def test_the_documented_constants():
    # 5 % band with a 0.5 V floor, 10 ms (100 ticks) settling allowance, 2 ms (20 ticks)
    # outside, 3 full swings
    assert (BAND_REL, BAND_FLOOR_V, SETTLE_DELAY_S, SETTLE_TICKS, OUT_OF_BAND_S,
            OUT_OF_BAND_TICKS, OSC_SWINGS) == (0.05, 0.5, 10e-3, 100, 2e-3, 20, 3)


def test_a_slow_sampled_loop_gets_its_tick_floors():
    # 1 ms ticks: the window starts 100 ticks after the step, the limit is 20 ticks
    ts = 1e-3
    t = np.arange(400) * ts
    r = np.where(np.arange(400) > 50, 12.0, 10.0)
    y = r.copy()
    y[51:51 + 90] = 10.0               # 90 ms behind the step: inside the settling allowance
    y[200:215] -= 1.0                  # 15 ticks outside: under the 20-tick limit
    tr = band_check(t, y, r)
    assert tr["settle_delay_s"] == pytest.approx(0.1) and tr["out_of_band_limit_s"] == pytest.approx(0.02)
    assert tr["windows"][0][0] == pytest.approx(0.151)
    assert tr["out_of_band"] is False
    y[200:222] -= 1.0                  # 22 ticks: out of band
    assert band_check(t, y, r)["out_of_band"] is True


def test_a_sustained_sine_is_oscillating_with_its_period_count():
    # v_out = v_ref + A sin(2 pi f t) in the settled window: a sine crosses its mean twice a
    # period, so f * (window length) full swings (to one half-swing at the window's edges;
    # elementary, no source). A = 3 V > the band at 28 V (1.4 V).
    f, amp = 500.0, 3.0
    y = R + np.where(T >= _settled_window_start(), amp * np.sin(2 * np.pi * f * T), 0.0)
    tr = band_check(T, y, R)
    assert tr["oscillating"] is True
    osc = tr["oscillation"]
    w0, w1 = osc["from_s"], osc["to_s"]
    assert w0 == pytest.approx(_settled_window_start()) and w1 == pytest.approx(N * TS)
    assert abs(osc["swings"] - f * (w1 - w0)) <= 0.5
    assert osc["peak_to_peak_V"] == pytest.approx(2 * amp, rel=1e-3)
    assert osc["band_V"] == pytest.approx(0.05 * 28.0)
    oc = judge(_summary(tracking=tr))
    assert oc["status"] == "oscillating" and not oc["completed"]
    assert oc["first_cause_time_s"] == pytest.approx(w0)


def test_a_sine_inside_the_band_or_a_dying_ringing_is_not_oscillating():
    w0 = _settled_window_start()
    # amplitude below the band: no swing passes the +-band hysteresis
    small = R + np.where(T >= w0, 1.0 * np.sin(2 * np.pi * 500.0 * T), 0.0)
    tr = band_check(T, small, R)
    assert not tr["oscillating"] and not tr["out_of_band"]
    assert judge(_summary(tracking=tr))["status"] == "completed"
    # a ringing that dies out (tau 2 ms): many swings early, none in the window's last half
    ring = R + np.where(T >= w0, 20.0 * np.exp(-(T - w0) / 2e-3) * np.sin(2 * np.pi * 1e3 * T), 0.0)
    tr = band_check(T, ring, R)
    assert tr["oscillation"]["swings"] * 2 >= 2 * OSC_SWINGS
    assert tr["oscillation"]["late_half_swings"] < 2
    assert not tr["oscillating"]


def test_out_of_band_needs_more_than_the_documented_time_in_a_settled_window():
    w0 = _settled_window_start()
    k0 = int(round(w0 / TS)) + 20
    limit = int(round(OUT_OF_BAND_S / TS))          # 40 samples = 2 ms
    for length, expect in ((limit, False), (limit + 1, True)):
        y = R.copy()
        y[k0:k0 + length] -= 2.0                    # 2 V low: outside 5 % of 28 V
        tr = band_check(T, y, R)
        assert tr["out_of_band"] is expect, length
        assert tr["out_of_band_run"]["duration_s"] == pytest.approx(length * TS)
        assert tr["out_of_band_run"]["from_s"] == pytest.approx(T[k0])
        assert not tr["oscillating"]
    oc = judge(_summary(tracking=tr))
    assert oc["status"] == "out of band" and oc["first_cause_time_s"] == pytest.approx(T[k0])
    # the same dip during the transient after the step (before the window) does not count
    y = R.copy()
    y[K_STEP + 1:K_STEP + 1 + 150] -= 2.0
    assert band_check(T, y, R)["out_of_band"] is False
    # nor after a cut (a trip): the safe output is not the loop's tracking
    y = R.copy()
    y[k0:] -= 4.0
    assert band_check(T, y, R)["out_of_band"] is True
    assert band_check(T, y, R, cut=k0)["out_of_band"] is False


def test_the_band_has_an_absolute_floor_near_zero_volts():
    r = np.zeros(N)
    y = np.full(N, 0.4)                            # inside the 0.5 V floor
    assert band_check(T, y, r)["out_of_band"] is False
    y = np.full(N, 0.6)
    assert band_check(T, y, r)["out_of_band"] is True
    # a non-finite output counts as outside
    y = np.zeros(N)
    y[300:400] = np.nan
    assert band_check(T, y, r)["out_of_band"] is True


def _summary(**more):
    s = {"Ts_s": TS, "ticks_planned": N, "ticks_run": N, "simulated_s": N * TS,
         "end_event": None, "events": [], "completed": True}
    s.update(more)
    return s


def _second_order(t, wn=4000.0, zeta=0.3):
    # underdamped step response, closed form (Ogata, Modern Control Engineering, sec. 5-3)
    wd = wn * math.sqrt(1 - zeta ** 2)
    phi = math.acos(zeta)
    return 1.0 - np.exp(-zeta * wn * t) / math.sqrt(1 - zeta ** 2) * np.sin(wd * t + phi)


def test_a_step_after_the_first_trip_is_not_scored_and_says_so():
    y = R.copy()
    y[K_STEP + 1:] = 24.0 + 4.0 * _second_order(T[K_STEP + 1:] - T[K_STEP + 1])
    whole, _ = segment_metrics(T, y, R)
    assert math.isfinite(whole[1]["rise_time_s"])      # scored without a cut
    segs, info = segment_metrics(T, y, R, cut=60, cut_reason="the first trip")
    assert [g["kind"] for g in segs] == ["hold", "step", "hold"]
    step = segs[1]
    for k in ("rise_time_s", "settling_time_s", "overshoot_pct", "peak_V"):
        assert math.isnan(step[k]), k
    assert step["note"] == "not scored: starts at or after the first trip at 3 ms"
    assert info["cut_at_s"] == pytest.approx(60 * TS)
    assert segs[0]["cut_at_s"] == pytest.approx(60 * TS) and "scored only up to" in segs[0]["note"]
    assert segs[2]["note"].startswith("not scored")


def test_a_step_cut_after_it_settled_is_scored_on_the_samples_before_the_cut():
    y = R.copy()
    y[K_STEP + 1:] = 24.0 + 4.0 * _second_order(T[K_STEP + 1:] - T[K_STEP + 1])
    cut = K_STEP + 1 + 300                                 # 15 ms after the step
    # after the cut the output goes somewhere else (the safe output)
    y[cut:] = 5.0
    segs, _ = segment_metrics(T, y, R, cut=cut)
    step = segs[1]
    # python-control's step_info on the samples before the cut (the reference's definitions)
    ref = control.step_info(y[K_STEP + 1:cut] - 24.0, T[K_STEP + 1:cut] - T[K_STEP + 1])
    assert step["rise_time_s"] == pytest.approx(ref["RiseTime"], rel=1e-12)
    assert step["overshoot_pct"] == pytest.approx(ref["Overshoot"], rel=1e-12)
    assert step["cut_at_s"] == pytest.approx(T[cut])
    # without the cut the collapse to 5 V would be the "final value"
    assert segment_metrics(T, y, R)[0][1]["overshoot_pct"] != pytest.approx(ref["Overshoot"])


def test_a_step_cut_before_it_settled_gets_no_rise_or_overshoot():
    y = R.copy()
    y[K_STEP + 1:] = 24.0 + 4.0 * _second_order(T[K_STEP + 1:] - T[K_STEP + 1])
    cut = K_STEP + 1 + 8                                   # 0.4 ms into the rise
    segs, _ = segment_metrics(T, y, R, cut=cut)
    assert math.isnan(segs[1]["rise_time_s"]) and math.isnan(segs[1]["overshoot_pct"])
    assert "before it settled" in segs[1]["note"]


def test_metrics_are_withheld_after_a_plant_integration_error():
    # a summary as run.execute makes it, ended by the loop's "plant integration error" (the
    # event the integration check emits; synthetic here) with diverged numbers in it
    y = R.copy()
    y[300:] = 1e87
    segs, info = segment_metrics(T, y, R)
    s = _summary(ticks_run=400, simulated_s=400 * TS, completed=False,
                 end_event="plant integration error",
                 events=[{"event": "plant integration error", "tick": 399, "time_s": 399 * TS,
                          "detail": "tick 399 (t = 19.95 ms): v_out beyond the energy bound"}],
                 metrics={"iae_Vs": 3.6e180, "rms_error_V": math.nan, "max_abs_error_V": 1e87,
                          "v_out_max_V": 1e87, "trips": 0, "warnings": 0, "nonfinite_samples": 0},
                 segments=segs, tracking=band_check(T, y, R))
    withhold_metrics(s, "the run ended on a plant integration error")
    assert s["metrics_note"] == "the run ended on a plant integration error"
    assert all(v is None for k, v in s["metrics"].items() if k not in ("trips", "warnings"))
    assert s["metrics"]["trips"] == 0
    for g in s["segments"]:
        assert g["note"].startswith("not scored")
        nums = {k: v for k, v in g.items() if k not in ("kind", "note", "t_start_s", "t_end_s",
                                                        "v_from_V", "v_to_V", "v_ref_min_V",
                                                        "v_ref_max_V")}
        assert nums and all(v is None for v in nums.values())
    assert s["tracking"] is None
    oc = judge(s)
    assert oc["status"] == "integration error"
    assert oc["first_cause"] == ("plant integration error: tick 399 (t = 19.95 ms): v_out "
                                 "beyond the energy bound")


def test_an_envelope_cell_word_follows_the_run_outcome():
    from hilrig.runtime.trials import envelope as env
    # the map's own final-part word only refines a run that reached its end
    assert env.cell_word("tripped", "tracks") == "trips"
    assert env.cell_word("integration error", "tracks") == "integration error"
    assert env.cell_word("collapsed", "tracks") == "collapses"
    assert env.cell_word("oscillating", "tracks") == "oscillates"   # never "tracks"
    assert env.cell_word("oscillating", "saturates") == "saturates"
    assert env.cell_word("out of band", "tracks") == "oscillates"
    assert env.cell_word("out of band", "saturates") == "saturates"
    assert env.cell_word("completed", "tracks") == "tracks"
    assert set(env.OUTCOMES) == set(env.SYMBOLS) == set(env.COLOURS) == set(env.OUTCOME_WORDS)
    assert env.legend_label("tracks") == "tracks (completed)"
    assert env.legend_label("integration error") == "integration error"


def test_a_ramp_cut_by_a_trip_has_no_lag_and_says_where_it_was_cut():
    # 24 V -> 28 V over 2 ms from 5 ms; the output follows 0.1 ms behind (a pure delay of two
    # ticks: its lag is 0.1 ms by definition); a trip at 6 ms cuts the ramp in its middle
    k = np.arange(N)
    r = np.clip(24.0 + (k - 100) * (4.0 / 40), 24.0, 28.0)
    y = np.concatenate(([24.0, 24.0], r[:-2]))
    whole, _ = segment_metrics(T, y, r)
    ramp = next(g for g in whole if g["kind"] == "ramp")
    assert ramp["lag_s"] == pytest.approx(2 * TS)
    segs, info = segment_metrics(T, y, r, cut=120, cut_reason="the first trip")
    ramp = next(g for g in segs if g["kind"] == "ramp")
    assert math.isnan(ramp["lag_s"]) and math.isnan(ramp["settling_time_s"])
    assert ramp["cut_at_s"] == pytest.approx(120 * TS) == info["cut_at_s"]
    assert ramp["note"] == "scored only up to the first trip at 6 ms"
    # its largest error covers the samples before the cut only: 2 ticks of slope = 0.2 V
    assert ramp["max_abs_error_V"] == pytest.approx(0.2)
