"""Sharing metrics of paralleled units (runtime/trials/sharing.py): each unit's deviation from
its share, the circulating and reverse currents, time blocked and trips, scored up to the cut.

The first tests feed synthetic recordings whose answers are worked out by hand from the
definitions in the module docstring (the arithmetic is written out beside each value, never
taken from the code). The last ones run the shipped example of four droop-controlled units
(examples/units/four_units.toml, demo data) once and check its steady sharing against the
closed form of droop sharing: in steady state each unit's integral action holds its terminal
voltage at v_ref - R_d i_k, and its cable drops R_c,k i_k to the common bus, so
i_k = (v_ref - v_bus) / (R_d + R_c,k) and the currents divide in inverse proportion to
R_d + R_c,k (Kirchhoff's laws on parallel branches, derived; droop as a virtual series
resistance: common practice, no source).
"""
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.trials.metrics import withhold_metrics
from hilrig.runtime.trials.sharing import cause_text, sharing_metrics, table_rows

CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
EXAMPLE = Path(__file__).resolve().parents[2] / "examples" / "units" / "four_units.toml"
TS = 1e-4      # 100 ticks = 10 ms: the settling delay is exactly 100 ticks at this period


def _signals(n, cur, on=None, trip=None, ref=400.0, bus=None):
    t = np.arange(n) * TS
    cur = np.asarray(cur, dtype=float)
    on = np.ones_like(cur) if on is None else np.asarray(on, dtype=float)
    trip = np.zeros_like(cur) if trip is None else np.asarray(trip, dtype=float)
    r = np.full(n, ref) if np.isscalar(ref) else np.asarray(ref, dtype=float)
    y = r - 2.0 if bus is None else bus
    return t, y, r, cur, on, trip


def test_two_units_constant_currents_hand_computed():
    # 2 units, equal weights, 60 A and 40 A for 400 ticks: the total 100 A, each share 50 A,
    # deviations +10 A (+20 %) and -10 A (-20 %); circulating 1/2 (10 + 10) = 10 A. Steady:
    # ticks 100..399 (10 ms after the start), 300 ticks = 30 ms
    n = 400
    cur = np.column_stack([np.full(n, 60.0), np.full(n, 40.0)])
    t, y, r, cur, on, trip = _signals(n, cur)
    out = sharing_metrics(t, y, r, cur, on, trip, [1.0, 1.0])
    assert out["windows"] == [[pytest.approx(100 * TS), pytest.approx(400 * TS)]]
    assert out["steady_s"] == pytest.approx(300 * TS)
    u1, u2 = out["units"]
    assert (u1["share"], u2["share"]) == (0.5, 0.5)
    assert u1["largest_deviation_A"] == pytest.approx(10.0)
    assert u2["largest_deviation_A"] == pytest.approx(-10.0)
    assert u1["largest_deviation_pct"] == pytest.approx(20.0)
    assert u2["largest_deviation_pct"] == pytest.approx(-20.0)
    assert u1["rms_deviation_A"] == pytest.approx(10.0) and u2["rms_deviation_pct"] == pytest.approx(20.0)
    assert u2["mean_deviation_pct"] == pytest.approx(-20.0)
    assert out["largest_deviation_pct"] == pytest.approx(20.0) and out["largest_deviation_unit"] == 1
    c = out["circulating"]
    assert c["largest_A"] == pytest.approx(10.0) and c["rms_A"] == pytest.approx(10.0)
    assert c["reverse_largest_A"] == 0.0 and c["reverse_unit"] is None
    # bus: v_ref_raw - v_out = 2 V throughout
    assert out["bus"]["steady_mean_error_V"] == pytest.approx(2.0)
    assert out["units_tripped"] == [] and u1["time_blocked_s"] == 0.0


def test_a_unit_trip_renormalises_the_shares_and_is_listed():
    # 3 units, weights 2:1:1 (shares 1/2, 1/4, 1/4). Ticks 0..199: 50, 20, 30 A (total 100 A,
    # shares 50, 25, 25 A: deviations 0, -5, +5 A). Unit 3 trips at tick 200 (forced, bit 16)
    # and carries 0 A; units 1 and 2 carry 70 and 30 A: shares renormalised over the two
    # that run, 2/3 and 1/3 of 100 A = 66.667 and 33.333 A, deviations +3.333, -3.333 A.
    # Steady: ticks 100..199 and, 10 ms after the change of units at 200, ticks 300..499.
    n = 500
    cur = np.zeros((n, 3))
    cur[:200] = [50.0, 20.0, 30.0]
    cur[200:] = [70.0, 30.0, 0.0]
    on = np.ones((n, 3))
    on[200:, 2] = 0.0
    trip = np.zeros((n, 3))
    trip[200:, 2] = 16.0
    t, y, r, cur, on, trip = _signals(n, cur, on, trip)
    out = sharing_metrics(t, y, r, cur, on, trip, [2.0, 1.0, 1.0], i_trip=[550.0] * 3)
    assert out["windows"] == [[pytest.approx(100 * TS), pytest.approx(200 * TS)],
                              [pytest.approx(300 * TS), pytest.approx(500 * TS)]]
    u1, u2, u3 = out["units"]
    third = 100.0 / 3.0 - 30.0                       # 3.333 A
    assert u1["largest_deviation_A"] == pytest.approx(70.0 - 200.0 / 3.0)
    assert u1["time_of_largest_deviation_s"] == pytest.approx(300 * TS)
    assert u1["largest_deviation_pct"] == pytest.approx(100.0 * third / (200.0 / 3.0))   # 5 %
    # mean over 100 ticks at 0 A and 200 at 3.333 A: 2.222 A; mean share current
    # (100 x 50 + 200 x 66.667) / 300 = 61.111 A; RMS sqrt(200/300 x 3.333^2) = 2.7217 A
    assert u1["mean_deviation_A"] == pytest.approx(200.0 / 300.0 * third)
    assert u1["mean_deviation_pct"] == pytest.approx(
        100.0 * (200.0 / 300.0 * third) / ((100 * 50.0 + 200 * 200.0 / 3.0) / 300.0))
    assert u1["rms_deviation_A"] == pytest.approx(math.sqrt(200.0 / 300.0) * third)
    assert u2["largest_deviation_A"] == pytest.approx(-5.0)       # before the trip
    assert u1["largest_current_A"] == 70.0 and u3["largest_current_A"] == 30.0
    # unit 3: only while it runs (ticks 100..199): +5 A of 25 A = +20 %
    assert u3["largest_deviation_A"] == pytest.approx(5.0)
    assert u3["largest_deviation_pct"] == pytest.approx(20.0)
    assert u3["steady_s"] == pytest.approx(100 * TS)
    assert u3["time_blocked_s"] == pytest.approx(300 * TS)
    assert u3["trips"] == [{"tick": 200, "time_s": pytest.approx(200 * TS), "bits": 16,
                            "cause": "forced trip"}]
    assert out["units_tripped"] == [3]
    # circulating: 1/2 (0 + 5 + 5) = 5 A before, 1/2 (3.333 + 3.333 + 0) = 3.333 A after;
    # RMS sqrt((100 x 25 + 200 x 3.333^2) / 300)
    c = out["circulating"]
    assert c["largest_A"] == pytest.approx(5.0)
    assert c["time_of_largest_s"] == pytest.approx(100 * TS)
    assert c["rms_A"] == pytest.approx(math.sqrt((100 * 25.0 + 200 * third ** 2) / 300.0))
    rows = dict(table_rows(out))
    assert rows["units tripped"] == "unit 3: forced trip at t = 0.02 s"
    # units 2 and 3 are 20 % off their shares (-5 A of 25 A, +5 A of 25 A): the first is shown
    assert "-20 % of its share, unit 2" in rows["sharing: largest deviation"]


def test_reverse_current_into_a_unit_while_another_sources():
    # 2 units: 110 A and -10 A (unit 2 sinks 10 A that unit 1 sources): total 100 A, shares
    # 50 A, deviations +60 and -60 A; circulating 60 A; reverse 10 A into unit 2
    n = 300
    cur = np.column_stack([np.full(n, 110.0), np.full(n, -10.0)])
    cur[250:, 1] = -12.0                     # and 12 A at tick 250 (a steady sample)
    cur[250:, 0] = 112.0
    out = sharing_metrics(*_signals(n, cur), [1.0, 1.0])
    c = out["circulating"]
    assert c["reverse_largest_A"] == pytest.approx(12.0) and c["reverse_unit"] == 2
    assert c["time_of_reverse_largest_s"] == pytest.approx(250 * TS)
    assert c["largest_whole_run_A"] == pytest.approx(62.0)
    assert "reverse 12 into unit 2" in dict(table_rows(out))["circulating current [A]"]


def test_steady_windows_skip_reference_and_load_changes_and_stop_at_the_cut():
    # a 100 V reference step at tick 100 and a load step at tick 250, cut at tick 450:
    # steady ticks 201..250 (the step at 100: ticks 101..199 settle; the window ends at the
    # load's last unchanged tick 250) and 350..449
    n = 600
    ref = np.where(np.arange(n) > 100, 500.0, 400.0)
    p_load = np.where(np.arange(n) > 250, 280e3, 200e3)
    cur = np.column_stack([np.full(n, 55.0), np.full(n, 45.0)])
    trip = np.zeros((n, 2))
    trip[500:, 0] = 1.0                      # after the cut: not listed
    t, y, r, cur, on, trip = _signals(n, cur, trip=trip, ref=ref)
    out = sharing_metrics(t, y, r, cur, on, trip, [1.0, 1.0], loads=[p_load], cut=450,
                          cut_reason="the first trip")
    assert out["windows"] == [[pytest.approx(201 * TS), pytest.approx(251 * TS)],
                              [pytest.approx(351 * TS), pytest.approx(450 * TS)]]
    assert out["cut_at_s"] == pytest.approx(450 * TS)
    assert out["units"][0]["trips"] == [] and out["units_tripped"] == []
    # no steady sample at all (a run shorter than the settling delay): no numbers, no error
    short = sharing_metrics(*_signals(50, cur[:50]), [1.0, 1.0])
    assert short["windows"] == [] and math.isnan(short["units"][0]["largest_deviation_A"])
    assert math.isnan(short["largest_deviation_pct"]) and short["largest_deviation_unit"] is None


def test_percentages_need_a_share_current_and_causes_read_as_text():
    # an unloaded bus: 0.2 A and -0.2 A; the share is 0 A: no percentage of nothing
    n = 300
    cur = np.column_stack([np.full(n, 0.2), np.full(n, -0.2)])
    out = sharing_metrics(*_signals(n, cur), [1.0, 1.0])
    assert out["units"][0]["largest_deviation_A"] == pytest.approx(0.2)
    assert math.isnan(out["units"][0]["largest_deviation_pct"])
    assert math.isnan(out["units"][0]["rms_deviation_pct"])
    assert cause_text(1 | 2) == "over-current, over-voltage" and cause_text(8) == "lost"


def test_withheld_metrics_null_the_sharing_metrics():
    s = {"metrics": {"trips": 0}, "segments": [], "tracking": {}, "sharing": {"units": []}}
    withhold_metrics(s, "a plant integration error")
    assert s["sharing"] is None and s["tracking"] is None


# ---- the shipped example: one compile of its loop ---------------------------------------------

def _tripped_example(folder: Path) -> Path:
    """The example with unit 3 forced to trip at 40 ms (test data): the other three take the
    load."""
    f = folder / "four_units_trip.toml"
    f.write_text(EXAMPLE.read_text() + '\n[[units.faults]]\nunit = 3\nkind = "trip"\nat = "40 ms"\n')
    return f


@pytest.fixture(scope="module")
def example_runs(tmp_path_factory):
    base = tmp_path_factory.mktemp("units")
    out = {}
    for name, scen in (("droop", EXAMPLE), ("trip", _tripped_example(base))):
        folder = base / name
        p = subprocess.run(CLI + ["run", str(scen), "--out", str(folder), "--headless"],
                           capture_output=True, text=True, timeout=900)
        out[name] = (folder, p)
    return out


def test_example_droop_sharing_matches_the_closed_form(example_runs):
    folder, p = example_runs["droop"]
    assert p.returncode == 0, p.stdout + p.stderr
    s = json.loads((folder / "summary.json").read_text())
    sh = s["sharing"]
    assert sh["count"] == 4 and sh["sharing"] == "droop" and sh["units_tripped"] == []
    # the example's values: droop_R 50 mohm, cables 5 mohm (units 1-3) and 9 mohm (unit 4)
    rd, rc = 0.050, [0.005, 0.005, 0.005, 0.009]
    g = [1.0 / (rd + r) for r in rc]
    expect_pct = [100.0 * (4.0 * gk / sum(g) - 1.0) for gk in g]   # -5.172 % for unit 4
    from hilrig.runtime.recording import open_run
    run = open_run(folder)
    i1, i4 = run.signals["unit1_i_out"][-1], run.signals["unit4_i_out"][-1]
    assert i1 / i4 == pytest.approx((rd + rc[3]) / (rd + rc[0]), rel=1e-4)
    u = sh["units"]
    assert all(x["share"] == 0.25 for x in u)
    # the steady mean deviation is the closed form's; the largest includes the tail of the
    # bus's settling after the step (its 2 % settling takes 41 ms, beyond the 10 ms delay)
    assert u[3]["mean_deviation_pct"] == pytest.approx(expect_pct[3], abs=0.05)
    assert u[0]["mean_deviation_pct"] == pytest.approx(expect_pct[0], abs=0.05)
    assert u[3]["largest_deviation_pct"] < 0 and sh["largest_deviation_unit"] == 4
    assert u[3]["largest_deviation_pct"] == pytest.approx(expect_pct[3], abs=0.15)
    assert u[3]["mean_deviation_A"] < 0 < u[0]["mean_deviation_A"]
    # circulating: half the sum of |deviation|, three units above their share by d1 and
    # unit 4 below by 3 d1: 3 d1 = |d4|
    assert sh["circulating"]["rms_A"] == pytest.approx(abs(u[3]["rms_deviation_A"]), rel=0.02)
    assert sh["circulating"]["reverse_unit"] is None
    # the run table shows the rows, and units.png is next to overview.png
    for row in ("sharing: largest deviation", "circulating current [A]", "units tripped"):
        assert row in p.stdout, p.stdout
    assert (folder / "units.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_example_report_has_the_units_section(example_runs):
    folder, _ = example_runs["trip"]
    p = subprocess.run(CLI + ["report", str(folder)], capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stdout + p.stderr
    md = (folder / "report.md").read_text()
    assert "## Units" in md
    sec = md[md.index("## Units"):md.index("## Interlock")]
    assert "| unit | share [%] |" in sec and "time blocked [s]" in sec
    assert "circulating current, steady: RMS [A]" in sec
    assert "![" in sec and "(report/units.png)" in sec
    assert (folder / "report" / "units.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    row3 = next(line for line in sec.splitlines() if line.startswith("| 3 |"))
    assert "forced trip at 0.04 s" in row3 and "| 550 |" in row3


def test_example_unit_trip_others_take_its_share(example_runs):
    folder, p = example_runs["trip"]
    s = json.loads((folder / "summary.json").read_text())
    sh = s["sharing"]
    assert sh["units_tripped"] == [3]
    u3 = sh["units"][2]
    assert u3["trips"][0]["cause"] == "forced trip"
    assert u3["trips"][0]["time_s"] == pytest.approx(0.04, abs=s["Ts_s"])
    # blocked from its trip to the end: 120 ms - 40 ms
    assert u3["time_blocked_s"] == pytest.approx(0.08, abs=2 * s["Ts_s"])
    # steady windows by the rule: 10 ms after the start, the reference step (20 ms), unit
    # 3's trip (40 ms) and the load step (60 ms), each up to the next change
    assert sh["windows"] == [[pytest.approx(a), pytest.approx(b)] for a, b in
                             ((0.01, 0.02), (0.03, 0.04), (0.05, 0.06), (0.07, 0.12))]
    assert u3["steady_s"] == pytest.approx(0.02)      # only while it ran
    # the three that run share by the same closed form: i1 / i4 = (R_d + R_c4) / (R_d + R_c1)
    from hilrig.runtime.recording import open_run
    run = open_run(folder)
    i1, i4 = run.signals["unit1_i_out"][-1], run.signals["unit4_i_out"][-1]
    assert i1 / i4 == pytest.approx((0.050 + 0.009) / (0.050 + 0.005), rel=1e-4)
    u = sh["units"]
    assert u[3]["mean_deviation_A"] < 0 < min(u[0]["mean_deviation_A"], u[1]["mean_deviation_A"])
    # the blocked unit's passive output filter stays on the bus through its cable and swaps
    # current with it after the trip (common practice, no source): current into unit 3 while
    # the others source, right after its trip
    c = sh["circulating"]
    assert c["reverse_unit"] == 3 and c["reverse_largest_A"] > 1.0
    assert 0.04 <= c["time_of_reverse_largest_s"] < 0.06
    assert "unit 3: forced trip at t = 0.04 s" in p.stdout
