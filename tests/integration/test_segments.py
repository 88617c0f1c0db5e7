"""Reference segments of whole runs: the shipped 100 V step turned into a 1 ms ramp through the
scenario's own reference points, and the step itself (two_stage_lc + cascaded_pi + profile, the
combination other tests compile already)."""
import json
import math
from pathlib import Path

import control
import numpy as np
import pytest
from scipy.special import gammainc

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "examples" / "step_100V.toml"
#: the step's two rows at 10 ms become a ramp over 10..11 ms
RAMP = {"reference.points": [[0, "400 V"], ["10 ms", "400 V"], ["11 ms", "500 V"]]}
TS = 50e-6


@pytest.fixture(scope="module")
def ramp_run(tmp_path_factory):
    sc = load_scenario(SCENARIO, overrides=RAMP)
    res = run_scenario(sc, tmp_path_factory.mktemp("ramp") / "r")
    return res, open_run(res.folder)


@pytest.fixture(scope="module")
def step_run(tmp_path_factory):
    res = run_scenario(load_scenario(SCENARIO), tmp_path_factory.mktemp("step") / "r")
    return res, open_run(res.folder)


def test_a_1_ms_ramp_is_one_ramp_segment_not_a_5_V_step(ramp_run):
    res, run = ramp_run
    segs = res.summary["segments"]
    assert [g["kind"] for g in segs] == ["hold", "ramp", "hold"]
    ramp = segs[1]
    assert ramp["t_start_s"] == pytest.approx(0.010) and ramp["t_end_s"] == pytest.approx(0.011)
    assert (ramp["v_from_V"], ramp["v_to_V"]) == (400.0, 500.0)
    assert ramp["slope_V_per_s"] == pytest.approx(1e5, rel=1e-9)
    # summary.json carries every segment
    on_disk = json.loads((res.folder / "summary.json").read_text())
    assert [g["kind"] for g in on_disk["segments"]] == ["hold", "ramp", "hold"]


def test_the_ramp_lag_and_largest_error_from_the_recording(ramp_run):
    res, run = ramp_run
    ramp = res.summary["segments"][1]
    t, v, raw = run.time, run.signals["v_out"], run.signals["v_ref_raw"]
    k0, k1 = round(0.010 / TS), round(0.011 / TS)
    # lag: how far v_out trails the ramp at its end, over the slope
    assert ramp["lag_s"] == pytest.approx((500.0 - v[k1]) / 1e5, rel=1e-9)
    assert 0.0 < ramp["lag_s"] < 1e-3
    # the largest error until settled is the run's largest from the ramp on (after settling
    # the error stays within the 2 % band, 2 V, far below the ramp's tens of volts)
    e = np.abs(raw[k0:] - v[k0:])
    assert ramp["max_abs_error_V"] == e.max()
    assert ramp["time_of_max_abs_error_s"] == t[k0 + int(np.argmax(e))]
    assert ramp["max_abs_error_V"] > 0.5 * 100.0 * ramp["lag_s"] / 1e-3
    # settling: from the ramp's end until the error stays below 2 % of the 100 V change;
    # overshoot: the output's largest excursion above the reference, in % of the change
    last_out = k0 + int(np.flatnonzero(e >= 2.0)[-1])
    assert ramp["settling_time_s"] == pytest.approx(t[last_out + 1] - 0.011, abs=1e-12)
    assert ramp["overshoot_pct"] == pytest.approx(np.max(v[k0:] - raw[k0:]), rel=1e-12)
    assert ramp["overshoot_pct"] > 0.0


def test_the_lag_of_the_shaped_reference_matches_its_closed_form(ramp_run):
    """The shaping filter w^n / (s + w)^n, exact at the ticks for a piecewise-linear input,
    trails a ramp of slope a by e(t) = (a / w) sum_{k=0}^{n-1} P(k + 1, w t), P the regularized
    lower incomplete gamma function [derived: the ramp response integrates the Erlang step
    response P(n, w t)]: the lag our ramp metrics read off the recorded shaped reference at the
    ramp's end (T = 1 ms) is that over a."""
    from hilrig.runtime.trials.metrics import segment_metrics
    res, run = ramp_run
    t, shaped, raw = run.time, run.signals["v_ref"], run.signals["v_ref_raw"]
    segs, _ = segment_metrics(t, shaped, raw)
    ramp = segs[1]
    # the scenario's [shaping] order and pole (derived from the plant: the run records it)
    sh = res.summary["shaping"]
    n, w, T = sh["order"], sh["pole_rad_s"], 1e-3
    assert sh["slew_rate_V_s"] > 1e5  # the 100 V/ms ramp is not rate-limited
    expected = sum(gammainc(k + 1, w * T) for k in range(n)) / w
    assert ramp["lag_s"] == pytest.approx(expected, rel=1e-9)
    # the error grows during the ramp and only shrinks after it (a non-negative impulse
    # response): the largest is at the ramp's end, slope times the lag
    assert ramp["max_abs_error_V"] == pytest.approx(1e5 * expected, rel=1e-9)
    assert ramp["time_of_max_abs_error_s"] == pytest.approx(0.011)
    # far from steady: the lag would tend to n / w = 0.667 ms
    assert ramp["lag_s"] < 0.98 * n / w and ramp["lag_steady_s"] < 0.5 * T


def test_the_step_still_matches_step_info(step_run):
    res, run = step_run
    segs = res.summary["segments"]
    assert [g["kind"] for g in segs] == ["hold", "step", "hold"]
    s = segs[1]
    t, v = run.time, run.signals["v_out"]
    k = round(0.010 / TS)
    assert s["t_start_s"] == t[k] and (s["v_from_V"], s["v_to_V"]) == (400.0, 500.0)
    # python-control's step_info on the same recorded samples, the output at the step
    # subtracted first, the time points passed explicitly
    ref = control.step_info(v[k:] - v[k], timepts=t[k:] - t[k])
    assert s["rise_time_s"] == pytest.approx(ref["RiseTime"], rel=1e-12)
    assert s["settling_time_s"] == pytest.approx(ref["SettlingTime"], rel=1e-12)
    assert s["overshoot_pct"] == pytest.approx(ref["Overshoot"], rel=1e-9)
    assert s["undershoot_pct"] == pytest.approx(ref["Undershoot"], abs=1e-12)
    assert s["peak_V"] - v[k] == pytest.approx(ref["Peak"], rel=1e-12)
    assert s["peak_time_s"] == pytest.approx(ref["PeakTime"], rel=1e-12)
    assert s["steady_state_V"] - v[k] == pytest.approx(ref["SteadyStateValue"], rel=1e-12)
    # the hold after it is measured once the step settled
    assert segs[2]["settled_from_s"] == pytest.approx(s["t_start_s"] + s["settling_time_s"])
    assert segs[2]["max_abs_error_V"] <= 0.02 * abs(ref["SteadyStateValue"]) + abs(
        s["steady_state_error_V"]) + 1e-9
    assert not math.isnan(segs[0]["max_abs_error_V"])
