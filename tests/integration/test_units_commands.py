"""Every command on a scenario of paralleled units ([units]; examples/units/four_units.toml,
demo data, cut short here): compare's candidates replace every unit's controller, envelope
with the number of units or a unit's tolerance as a further axis, interlock-test with unit
faults and bus interlocks, the bridge (stand-in + lockstep run) carrying every unit's signals,
and report on the run folder.

Only the loops the other units tests compile are used: 4 (and 2) units of two_stage_lc +
cascaded_pi, cabled. Trip semantics (first tick beyond the limit, safe output on that tick,
latched) are common practice, no source; lockstep reproducing SIL bit for bit holds because
both sides run the same IEEE 754 operations in the same order (as test_bridge_lockstep.py)."""
import csv
import json
import subprocess
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario, not_applied_lines, plan_candidates
from tests.integration.standin import CLI, free_tcp_port, reaped, serve, wait_listening

ROOT = Path(__file__).resolve().parents[2]
FOUR = ROOT / "examples" / "units" / "four_units.toml"


def _short(tmp_path: Path, duration: str = "30 ms", extra: str = "", name="four.toml") -> Path:
    text = FOUR.read_text().replace('duration = "120 ms"', f'duration = "{duration}"')
    assert f'duration = "{duration}"' in text
    path = tmp_path / name
    path.write_text(text + extra)
    return path


# ---- compare -------------------------------------------------------------------------------

UNIT_TABLES = """
[units.unit2.controller]
plugin = "flatness"
pole = 3000.0

[units.unit3.controller]
Kp_v = 0.9
"""


def test_compare_candidates_plan_every_unit_and_say_what_they_leave_out(tmp_path):
    """A candidate runs on every unit: the scenario's own controller keeps [controller]'s
    values (every unit) and a unit's own values for it; a unit's table for another plugin is
    left out, and the command says so; another candidate runs with its defaults, keeping only
    a unit's table for itself; a controller parameter override reaches the candidates that
    have it."""
    path = _short(tmp_path, extra=UNIT_TABLES)
    text = path.read_text().replace('plugin = "cascaded_pi"\n',
                                    'plugin = "cascaded_pi"\nI_max = "480 A"\n', 1)
    path.write_text(text)
    _, plans = plan_candidates(path, {"controller.Ki_v": 25.0}, ["cascaded_pi", "flatness"])
    pi, fl = plans["cascaded_pi"].scenario, plans["flatness"].scenario
    assert pi.units.unit_controllers == ["cascaded_pi"] * 4
    assert fl.units.unit_controllers == ["flatness"] * 4
    upi = [u["values"] for u in pi.controller.values["units"]]
    assert all(v["I_max"] == 480.0 and v["Ki_v"] == 25.0 for v in upi)
    assert upi[2]["Kp_v"] == 0.9 and upi[0]["Kp_v"] != 0.9
    ufl = [u["values"] for u in fl.controller.values["units"]]
    assert ufl[1]["pole"] == 3000.0 and ufl[0]["pole"] != 3000.0
    lines = "\n".join(not_applied_lines(plans))
    assert "units.unit2.controller" in lines and "cascaded_pi" in lines
    assert "units.unit3.controller" in lines and "flatness" in lines
    assert "controller.Ki_v is not applied to flatness" in lines


def test_compare_runs_on_units_with_plots_and_table(tmp_path):
    path = _short(tmp_path)
    out = tmp_path / "cmp"
    p = subprocess.run(CLI + ["compare", str(path), "--controllers", "cascaded_pi", "--out",
                              str(out), "--json"], capture_output=True, text=True, timeout=900)
    assert p.returncode == 0, p.stdout[-3000:] + p.stderr[-3000:]
    res = json.loads(p.stdout)
    assert res["cascaded_pi"]["outcome"]["status"] == "completed"
    for png in ("compare_v_out.png", "compare_error.png", "compare_u.png"):
        assert (out / png).stat().st_size > 1000, png
    run = open_run(out / "cascaded_pi")
    assert {f"unit{k}_i_out" for k in range(1, 5)} <= set(run.signals)
    # the scenario's own controller runs as written: no controller table replaced
    assert "controller = {plugin" not in (out / "cascaded_pi" / "scenario.toml").read_text()


# ---- envelope ------------------------------------------------------------------------------

def _two_tables(path: Path) -> Path:
    """The scenario without units 3's and 4's own tables (a map of 2 units has no unit 3)."""
    text = path.read_text()
    cut = text.index("[units.unit3]")
    path.write_text(text[:cut] + text[text.index("[reference]"):])
    return path


def test_envelope_axis_values_stay_integers_and_a_tolerance_axis_sets_that_unit(tmp_path):
    from hilrig.runtime.trials import envelope as env
    path = _two_tables(_short(tmp_path))
    ax = env.Axis.parse("units.count=2,3,4")
    assert ax.values == (2, 3, 4) and all(type(v) is int for v in ax.values)
    sc, plans, ctrl_of, axis_of = env.plan_series(path, {}, ["cascaded_pi"], ax)
    assert [p.scenario.units.count for p in plans.values()] == [2, 3, 4]
    assert list(plans) == [f"cascaded_pi [units.count={n}]" for n in (2, 3, 4)]
    assert set(ctrl_of.values()) == {"cascaded_pi"}
    tol = env.Axis.parse('units.unit2.L1="150 uH","175 uH"')
    _, plans, _, _ = env.plan_series(path, {}, ["cascaded_pi"], tol)
    got = [[u["L1"] for u in p.scenario.plant.values["units"]] for p in plans.values()]
    assert got[0][1] == pytest.approx(150e-6) and got[1][1] == pytest.approx(175e-6)
    assert got[0][0] == got[1][0] == got[0][2]     # the other units keep their own L1
    with pytest.raises(ValueError, match="--axis"):
        env.Axis.parse("units.count")
    with pytest.raises(ValueError, match="cannot be an axis"):
        env.Axis.parse("controller.Kp_v=1,2")


def test_envelope_with_the_number_of_units_as_axis(tmp_path):
    path = _short(tmp_path)
    out = tmp_path / "env"
    # a count below a unit with its own table: one clear message, nothing runs
    p = subprocess.run(CLI + ["envelope", str(path), "--controllers", "cascaded_pi",
                              "--axis", "units.count=2,4", "--out", str(out), "--headless"],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 2 and "there is no unit 3 (units.count = 2)" in p.stdout + p.stderr
    assert "Traceback" not in p.stdout + p.stderr and not out.exists()
    _two_tables(path)
    p = subprocess.run(CLI + ["envelope", str(path), "--controllers", "cascaded_pi",
                              "--axis", "units.count=2,4", "--v-range", "450:450",
                              "--p-range", "50e3:100e3", "--grid", "1x2", "--workers", "1",
                              "--out", str(out), "--headless"],
                       capture_output=True, text=True, timeout=900)
    assert p.returncode == 0, p.stdout[-3000:] + p.stderr[-3000:]
    rows = list(csv.DictReader((out / "envelope.csv").read_text().splitlines()))
    assert [r["axis"] for r in rows] == ["units.count=2"] * 2 + ["units.count=4"] * 2
    assert {r["controller"] for r in rows} == {"cascaded_pi [units.count=2]",
                                               "cascaded_pi [units.count=4]"}
    # 450 V with 50 and 100 kW shared by 2 or 4 units of a 550 A trip level is well inside
    # what every unit delivers: each map tracks
    assert all(r["outcome"] == "tracks" for r in rows), rows
    assert (out / "envelope.png").stat().st_size > 1000


# ---- interlock-test ------------------------------------------------------------------------

SUITE = """
title = "paralleled units' interlocks (test data)"
scenario = "{base}"

[[cases]]
name = "unit 3 lost: the others carry the load, no bus trip"
set = {{ "units.faults" = [{{ unit = 3, kind = "lost", at = "10 ms" }}] }}
expect = "no trip"

[[cases]]
name = "unit 2 trips: a bus interlock on its converter current trips every unit"
set = {{ "units.faults" = [{{ unit = 2, kind = "trip", at = "10 ms" }}] }}
interlocks = [{{ signal = "unit2_i_L1", below = "20 A" }}]
expect = "trip"
cause = "unit2_i_L1 below"
within = "2 ms"

[[cases]]
name = "bus over-voltage on the 100 V step"
interlocks = [{{ signal = "v_out", above = "450 V" }}]
expect = "trip"
cause = "v_out above"
"""


def test_interlock_suite_with_unit_faults_and_bus_interlocks(tmp_path):
    base = _short(tmp_path)
    suite = tmp_path / "suite.toml"
    suite.write_text(SUITE.format(base=base))
    out = tmp_path / "r"
    p = subprocess.run(CLI + ["interlock-test", str(suite), "--out", str(out), "--workers", "1",
                              "--headless"], capture_output=True, text=True, timeout=900)
    assert p.returncode == 0, p.stdout[-4000:] + p.stderr[-2000:]
    cases = {c["name"]: c for c in json.loads((out / "results.json").read_text())["cases"]}
    assert all(c["passed"] for c in cases.values()), cases
    tripped = cases["unit 2 trips: a bus interlock on its converter current trips every unit"]
    # measured from the unit's fault ([[units.faults]] at 10 ms = tick 200): its blocked
    # gates let its inductor current fall from ~125 A to the 20 A limit within ticks
    assert tripped["fault_s"] == pytest.approx(0.01) and 0 < tripped["latency_ticks"] <= 40
    run = open_run(Path(tripped["folder"]) / "run")
    k = tripped["trip_tick"]
    assert run.signals["unit2_i_L1"][k] < 20.0 <= run.signals["unit2_i_L1"][k - 1]
    assert run.signals["unit2_i_L1"][199] > 100.0
    lost = open_run(Path(cases["unit 3 lost: the others carry the load, no bus trip"]["folder"]) / "run")
    # from the loss on (tick 200) unit 3's gates are blocked: its converter current stops at
    # zero (the diode) and only its filter capacitors still exchange charge with the bus
    assert np.all(lost.signals["unit3_enable"][201:] == 0.0)
    assert lost.signals["unit3_i_L1"][199] > 100.0 and np.all(lost.signals["unit3_i_L1"][260:] == 0.0)
    # the three others take its share: 4/3 of their own before the loss (equal droop)
    before = np.mean([np.mean(lost.signals[f"unit{j}_i_L1"][150:200]) for j in (1, 2, 4)])
    after = np.mean([np.mean(lost.signals[f"unit{j}_i_L1"][300:400]) for j in (1, 2, 4)])
    assert 1.2 < after / before < 1.45


# ---- bridge --------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def bridged(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("units_bridge")
    scen = _short(tmp, duration="20 ms")
    address = f"tcp://127.0.0.1:{free_tcp_port()}"
    sim = serve(scen, address)
    with reaped(sim):
        wait_listening(sim)
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--mode", "lockstep",
                                  "--out", str(tmp / "hil"), "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=900)
        sim_out, sim_err = sim.communicate(timeout=120)
    assert p.returncode == 0, p.stdout[-3000:] + p.stderr[-3000:]
    assert sim.returncode == 0, sim_err[-3000:]
    sil = run_scenario(load_scenario(scen), tmp / "sil")
    return tmp, scen, sil


def test_lockstep_bridge_of_units_reproduces_sil(bridged):
    tmp, scen, sil = bridged
    a, b = open_run(tmp / "hil"), open_run(sil.folder)
    assert a.time.shape == b.time.shape == (400,)
    names = ["v_out", "i_out", "v_ref"] + [f"unit{k}_{s}" for k in range(1, 5)
                                           for s in ("v_out", "i_out", "i_L1", "v_C1", "i_L2",
                                                     "u", "enable", "trip")]
    for n in names:
        assert a.signals[n].tobytes() == b.signals[n].tobytes(), n
    s = json.loads((tmp / "hil" / "summary.json").read_text())
    assert s["mode"] == "lockstep" and s["completed"]


def test_report_of_a_units_run(bridged):
    tmp, _, sil = bridged
    p = subprocess.run(CLI + ["report", str(sil.folder)], capture_output=True, text=True,
                       timeout=300)
    assert p.returncode == 0, p.stdout[-3000:] + p.stderr[-3000:]
    md = (Path(sil.folder) / "report.md").read_text()
    assert "completed" in md
    p = subprocess.run(CLI + ["report", str(tmp / "hil"), "--json"], capture_output=True,
                       text=True, timeout=300)
    assert p.returncode == 0 and json.loads(p.stdout)["completed"]
