"""Controller designs from the plant (#22 item 1): the ``[design]`` table, the design range,
given parameters kept, the design cache, the run record, and the main check: on six test plants
each shipped controller's designed defaults are stable over the plant's stated range (the
closed-loop poles computed again outside the project, with python-control and numpy) and track
in a small SIL envelope.

Cost: both parts run on all six plants. The 18 envelopes of 9 cells took 82 s on this 2-core
machine when the three single_lc loops were compiled in the same run and about 20 s with the
loops cached (0.3-1.6 s each): within the ~90 s budget, so the simulation part was not cut to
three plants. The runs use the loops the suite already compiles (two_stage_lc and single_lc,
the profile reference, cascaded_pi, state_feedback, flatness). On a fresh cache the cascaded
PI's design search (Nelder-Mead, 5-27 s per plant) costs most of this module's time: the whole
module took 291 s with an empty cache (six loops compiled, every design made) and 40 s with
loops and designs cached.

Criterion (common practice, no source; from memory: Franklin, Powell & Workman, *Digital
Control of Dynamic Systems*, ch. 4): a sampled linear loop is asymptotically stable iff every
closed-loop pole lies inside the unit circle, |z| < 1.
"""
from __future__ import annotations

import functools
import json
import re
from pathlib import Path

import numpy as np
import pytest

import control  # python-control: the closed-loop poles outside the project

from hilrig.runtime import cli
from hilrig.runtime.analysis.linear import AnalysisError, linearize
from hilrig.runtime import registry
from hilrig.runtime.run import prepare
from hilrig.runtime.scenario import ScenarioError, parse_scenario

CONTROLLERS = ("cascaded_pi", "state_feedback", "flatness")

# --- the six test plants ----------------------------------------------------------------------
# DEMO DATA: invented test plants (not real equipment), Ts = 50 us. Each entry: the plant table,
# the start voltage, the start load power, and the stated design range (V, W).
_TWO_STAGE = ('plugin = "two_stage_lc"\nV_dc = "{V_dc}"\nL1 = "{L1}"\nR1 = "{R1}"\nC1 = "{C1}"\n'
              'L2 = "{L2}"\nR2 = "{R2}"\nC2 = "{C2}"\n')
PLANTS = {
    # 48 V class
    "p48": (_TWO_STAGE.format(V_dc="80 V", L1="20 uH", R1="1 mohm", C1="1 mF", L2="10 uH",
                              R2="0.5 mohm", C2="4.7 mF"), 50.0, 5e3, (30.0, 70.0), (-5e3, 10e3)),
    # the 400 V demo-like plant, and the same with small and with large capacitors
    "p400": (_TWO_STAGE.format(V_dc="800 V", L1="150 uH", R1="5 mohm", C1="220 uF", L2="100 uH",
                               R2="3 mohm", C2="680 uF"), 400.0, 40e3, (300.0, 500.0), (-40e3, 80e3)),
    "p400sC": (_TWO_STAGE.format(V_dc="800 V", L1="150 uH", R1="5 mohm", C1="47 uF", L2="100 uH",
                                 R2="3 mohm", C2="100 uF"), 400.0, 40e3, (300.0, 500.0),
               (-40e3, 80e3)),
    "p400lC": (_TWO_STAGE.format(V_dc="800 V", L1="150 uH", R1="5 mohm", C1="1 mF", L2="100 uH",
                                 R2="3 mohm", C2="4.7 mF"), 400.0, 40e3, (300.0, 500.0),
               (-40e3, 80e3)),
    # 800 V class
    "p800": (_TWO_STAGE.format(V_dc="1000 V", L1="400 uH", R1="10 mohm", C1="100 uF",
                               L2="250 uH", R2="8 mohm", C2="220 uF"), 700.0, 75e3, (500.0, 900.0),
             (-75e3, 150e3)),
    # single stage
    "s400": ('plugin = "single_lc"\nV_dc = "800 V"\nL = "200 uH"\nR = "20 mohm"\nC = "500 uF"\n',
             400.0, 40e3, (300.0, 500.0), (-40e3, 80e3)),
}
#: the plants of the simulation part (module docstring: all six)
SIM_PLANTS = tuple(sorted(PLANTS))


def scenario_text(plant: str, controller: str = "cascaded_pi", *, design: str | None = "range",
                  controller_extra: str = "", duration: str = "60 ms",
                  plant_extra: dict[str, str] | None = None) -> str:
    """A scenario of the plant (DEMO DATA). ``design``: "range" writes the plant's stated range
    as ``[design]``, None writes no table, any other text is the table's body."""
    table, v0, p0, (v_lo, v_hi), (p_lo, p_hi) = PLANTS[plant]
    for k, v in (plant_extra or {}).items():
        table, n = re.subn(rf'(?m)^{k} = .*$', f'{k} = "{v}"', table)
        assert n == 1, k
    text = (f'# DEMO DATA: invented test plant "{plant}" (not real equipment)\n'
            f'title = "design test {plant}"\ndemo_data = true\n'
            f'[timing]\nTs = "50 us"\nsubsteps = 4\nduration = "{duration}"\n'
            f'[plant]\n{table}'
            f'[controller]\nplugin = "{controller}"\n{controller_extra}'
            f'[reference]\nplugin = "profile"\npoints = [[0, "{v0} V"]]\n'
            f'[shaping]\norder = 5\npole = "7500 rad/s"\nslew_rate = "200 kV/s"\n'
            f'[load]\n[[load.points]]\nt = 0\nP = "{p0} W"\n')
    if design == "range":
        design = f'v_range = ["{v_lo} V", "{v_hi} V"]\np_range = ["{p_lo} W", "{p_hi} W"]\n'
    if design is not None:
        text += f"[design]\n{design}"
    return text


@functools.lru_cache(maxsize=None)
def prepared(plant: str, controller: str, defaults: str = "plant"):
    """The scenario prepared (the controller designed) with the plant's stated range."""
    body = (f'v_range = ["{PLANTS[plant][3][0]} V", "{PLANTS[plant][3][1]} V"]\n'
            f'p_range = ["{PLANTS[plant][4][0]} W", "{PLANTS[plant][4][1]} W"]\n'
            f'defaults = "{defaults}"\n')
    return prepare(parse_scenario(scenario_text(plant, controller, design=body),
                                  name=f"{plant}.toml"))


def poles_outside(prep, v: float, p: float) -> tuple[float, float]:
    """The largest closed-loop |z| at (v, p), from the project's linear model's closed-loop
    matrix, computed by python-control (``control.ss(...).poles()``) and by numpy
    (``numpy.linalg.eigvals``): (python-control, numpy)."""
    m = linearize(prep, v, p)
    n = m.Acl.shape[0]
    sys = control.ss(m.Acl, np.zeros((n, 1)), np.zeros((1, n)), np.zeros((1, 1)), dt=m.Ts)
    z_ctrl = float(np.max(np.abs(sys.poles())))          # python-control
    z_np = float(np.max(np.abs(np.linalg.eigvals(m.Acl))))  # numpy
    return z_ctrl, z_np


def grid(lo_hi, n: int) -> np.ndarray:
    return np.linspace(lo_hi[0], lo_hi[1], n)


def run_cli(capsys, *args) -> tuple[int, str]:
    capsys.readouterr()
    rc = cli.main([str(a) for a in args])
    cap = capsys.readouterr()
    return rc, cap.out + cap.err


# --- 1. parsing of [design] -------------------------------------------------------------------

def test_a_valid_design_table_is_parsed_into_si_values():
    sc = parse_scenario(scenario_text("p400", design='v_range = ["300 V", "0.5 kV"]\n'
                                                     'p_range = ["-40 kW", "80 kW"]\n'
                                                     'defaults = "declared"\n'))
    assert sc.design == {"v_range": (300.0, 500.0), "p_range": (-40e3, 80e3),
                         "defaults": "declared"}
    # without the table: no ranges (derived later) and defaults designed from the plant
    sc = parse_scenario(scenario_text("p400", design=None))
    assert sc.design == {"v_range": None, "p_range": None, "defaults": "plant"}


BAD_DESIGN = {
    "v_not_a_pair": ('v_range = ["300 V"]\n', "design.v_range"),
    "v_not_a_list": ('v_range = "300 V"\n', "design.v_range"),
    "v_high_below_low": ('v_range = ["500 V", "300 V"]\n', "design.v_range"),
    "p_not_a_pair": ('p_range = ["-40 kW", "0 kW", "80 kW"]\n', "design.p_range"),
    "p_high_below_low": ('p_range = ["80 kW", "-40 kW"]\n', "design.p_range"),
    "unknown_key": ('v_ragne = ["300 V", "500 V"]\n', "design.v_ragne"),
    "bad_defaults": ('defaults = "tuned"\n', "design.defaults"),
}


@pytest.mark.parametrize("case", sorted(BAD_DESIGN))
def test_each_bad_design_table_is_a_scenario_error_naming_the_key(case):
    body, key = BAD_DESIGN[case]
    with pytest.raises(ScenarioError) as exc:
        parse_scenario(scenario_text("p400", design=body), name="bad.toml")
    assert key in str(exc.value), str(exc.value)
    assert str(exc.value).startswith("bad.toml")


@pytest.mark.parametrize("case", ["v_high_below_low", "unknown_key", "bad_defaults"])
def test_a_bad_design_table_from_the_command_line_exits_2_and_writes_no_run(case, tmp_path,
                                                                           capsys):
    body, key = BAD_DESIGN[case]
    path = tmp_path / "bad.toml"
    path.write_text(scenario_text("p400", design=body))
    out = tmp_path / "r"
    rc, text = run_cli(capsys, "run", path, "--headless", "--out", out)
    assert rc == 2, text
    errors = [ln for ln in text.splitlines() if ln.startswith("error:")]
    assert len(errors) == 1 and key in errors[0], text
    assert "Traceback" not in text
    assert not out.exists()


# --- 2. the design range ----------------------------------------------------------------------

def test_the_derived_range_is_the_start_voltage_25_percent_and_the_load_power_with_zero():
    # no [design]: 400 V +-25 % = 300..500 V (below 0.95 x 800 V), P from 0 to the 40 kW load
    prep = prepare(parse_scenario(scenario_text("p400", "flatness", design=None)))
    assert prep.design["range"] == pytest.approx(
        dict(v_lo_V=0.75 * 400.0, v_hi_V=1.25 * 400.0, p_lo_W=0.0, p_hi_W=40e3), rel=1e-9)
    assert prep.design["range_from"] != "[design] v_range; [design] p_range"


def test_the_derived_range_is_capped_below_the_dc_link_and_takes_a_regenerating_load():
    # 70 V start on the 80 V plant: 1.25 x 70 = 87.5 V is above 0.95 x 80 = 76 V, so the top is
    # 76 V; a -5 kW (regenerating) load gives P from -5 kW to 0
    text = scenario_text("p48", "flatness", design=None)
    text = text.replace('points = [[0, "50.0 V"]]', 'points = [[0, "70.0 V"]]')
    text = text.replace('P = "5000.0 W"', 'P = "-5000.0 W"')
    prep = prepare(parse_scenario(text))
    assert prep.v0 == pytest.approx(70.0, rel=1e-6)
    assert prep.design["range"] == pytest.approx(
        dict(v_lo_V=0.75 * 70.0, v_hi_V=0.95 * 80.0, p_lo_W=-5e3, p_hi_W=0.0), rel=1e-6)


def test_with_a_design_table_the_range_is_its_values():
    prep = prepare(parse_scenario(scenario_text(
        "p400", "flatness", design='v_range = ["320 V", "450 V"]\np_range = ["-10 kW", "60 kW"]\n')))
    assert prep.design["range"] == dict(v_lo_V=320.0, v_hi_V=450.0, p_lo_W=-10e3, p_hi_W=60e3)


# --- 3. given parameters are kept -------------------------------------------------------------

def test_a_given_gain_is_kept_exactly_and_no_search_runs():
    prep = prepare(parse_scenario(scenario_text("p400", controller_extra="Kp_v = 0.123456\n")))
    assert prep.sc.controller.values["Kp_v"] == 0.123456
    assert "Kp_v" in prep.design["given"] and "Kp_v" not in prep.design["designed"]
    assert "search" not in prep.design
    assert "Kp_v" not in prep.design["values"]


@pytest.mark.parametrize("controller", CONTROLLERS)
def test_declared_defaults_keep_the_plugins_numbers(controller):
    prep = prepared("p400", controller, "declared")
    decl = registry.load("controller", controller).declaration
    assert prep.sc.controller.values == decl.defaults()
    assert prep.design["designed"] == [] and "values" not in prep.design


@pytest.mark.parametrize("controller", CONTROLLERS)
def test_with_a_design_hook_the_controller_runs_with_the_designed_values(controller):
    prep = prepared("p400", controller)
    rec = prep.design
    assert rec["designed"], rec
    assert rec["values"] == {k: prep.sc.controller.values[k] for k in rec["designed"]}
    assert set(rec["values"]) == set(rec["designed"])
    # the design changed at least one of the plugin's declared numbers (not flatness: its
    # declared pole, 5000 rad/s, is already 0.25 / Ts at 50 us)
    decl = registry.load("controller", controller).declaration
    if controller != "flatness":
        assert any(prep.sc.controller.values[k] != decl.defaults()[k] for k in rec["designed"])


def test_flatness_designs_its_pole_from_the_control_period():
    # the contract: pole 0.25 / Ts first; 0.25 / 50 us = 5000 rad/s (arithmetic)
    prep = prepared("p400", "flatness")
    assert prep.sc.controller.values["pole"] == pytest.approx(0.25 / 50e-6)


# --- 4. the cache -----------------------------------------------------------------------------

def test_a_design_is_cached_and_a_plant_change_designs_again(tmp_path, monkeypatch):
    # a private cache folder: the first design cannot come from an earlier session
    monkeypatch.setenv("HILRIG_CACHE_DIR", str(tmp_path / "cache"))
    # Kp_v given: no search (cheap), the rest designed (C_ff = C1 + C2 among them)
    text = scenario_text("p400", controller_extra="Kp_v = 0.2\n")
    first = prepare(parse_scenario(text))
    assert first.design["cached"] is False
    assert list((tmp_path / "cache").rglob("*.json")), "no design written to the cache"
    second = prepare(parse_scenario(text))
    assert second.design["cached"] is True
    assert second.sc.controller.values == first.sc.controller.values
    assert second.design["values"] == first.design["values"]
    changed = prepare(parse_scenario(scenario_text("p400", controller_extra="Kp_v = 0.2\n",
                                                   plant_extra={"C2": "470 uF"})))
    assert changed.design["cached"] is False
    assert changed.design["values"] != first.design["values"]
    assert changed.sc.controller.values["C_ff"] == pytest.approx(220e-6 + 470e-6)


# --- 5. the main check: stable over the range, and tracking --------------------------------

@pytest.mark.parametrize("plant", sorted(PLANTS))
@pytest.mark.parametrize("controller", CONTROLLERS)
def test_the_design_is_stable_at_every_point_of_a_7x7_grid_of_the_range(controller, plant):
    prep = prepared(plant, controller)
    assert prep.design["range"] == dict(v_lo_V=PLANTS[plant][3][0], v_hi_V=PLANTS[plant][3][1],
                                        p_lo_W=PLANTS[plant][4][0], p_hi_W=PLANTS[plant][4][1])
    worst = []
    for v in grid(PLANTS[plant][3], 7):
        for p in grid(PLANTS[plant][4], 7):
            try:
                z_ctrl, z_np = poles_outside(prep, v, p)
            except AnalysisError as exc:
                worst.append((np.inf, v, p, str(exc)))
                continue
            assert z_ctrl == pytest.approx(z_np, rel=1e-9)  # python-control and numpy agree
            worst.append((z_ctrl, v, p, ""))
    bad = [w for w in worst if not w[0] < 1.0]  # |z| < 1: common practice, no source
    assert not bad, (f"{controller} on {plant}: {len(bad)} of 49 points with |z| >= 1 or no "
                     f"steady state, worst {max(worst)[:3]}; design {prep.design}")


@pytest.mark.parametrize("plant", SIM_PLANTS)
@pytest.mark.parametrize("controller", CONTROLLERS)
def test_the_design_tracks_in_every_cell_of_a_3x3_envelope_of_the_range(controller, plant,
                                                                       tmp_path, capsys):
    path = tmp_path / f"{plant}.toml"
    path.write_text(scenario_text(plant, controller))
    (v_lo, v_hi), (p_lo, p_hi) = PLANTS[plant][3], PLANTS[plant][4]
    out = tmp_path / "env"
    capsys.readouterr()
    rc = cli.main(["envelope", str(path), "--controllers", controller,
                   "--v-range", f"{v_lo:g}:{v_hi:g}", f"--p-range={p_lo:g}:{p_hi:g}",
                   "--grid", "3x3", "--workers", "1", "--headless", "--json", "--out", str(out)])
    text = capsys.readouterr().out
    assert rc == 0, text
    res = json.loads(text)
    outcomes = res[controller]["outcomes"]
    assert outcomes["tracks"] == 9, (controller, plant, outcomes, res[controller]["worst"])
    assert sum(outcomes.values()) == 9


# --- 6. the declared defaults fail where the design research said ------------------------------

@pytest.mark.parametrize("plant", ["p800", "p400sC"])
def test_the_declared_cascaded_pi_gains_are_unstable_somewhere_on_these_plants(plant):
    prep = prepared(plant, "cascaded_pi", "declared")
    assert prep.sc.controller.values == registry.load("controller", "cascaded_pi").declaration.defaults()
    worst = 0.0
    for v in grid(PLANTS[plant][3], 7):
        for p in grid(PLANTS[plant][4], 7):
            try:
                z_ctrl, _ = poles_outside(prep, v, p)  # python-control
            except AnalysisError:
                continue
            worst = max(worst, z_ctrl)
    assert worst >= 1.0, f"the declared gains are stable over {plant}'s range: worst |z| {worst}"


# --- 7. the run record ------------------------------------------------------------------------

DESIGN_KEYS = {"controller", "method", "defaults", "range", "range_from", "given", "designed",
               "candidates", "search", "worst_pole_abs", "fixed_modes_abs", "grid",
               "stable_over_range", "values", "seconds", "cached", "margins"}


def test_a_runs_summary_keeps_the_design_the_values_and_the_stability_check(tmp_path, capsys):
    path = tmp_path / "p400.toml"
    path.write_text(scenario_text("p400", "cascaded_pi", duration="20 ms"))
    out = tmp_path / "run"
    rc, text = run_cli(capsys, "run", path, "--headless", "--out", out)
    assert rc == 0, text
    s = json.loads((out / "summary.json").read_text())
    d = s["design"]
    assert set(d) == DESIGN_KEYS, set(d) ^ DESIGN_KEYS
    assert set(d["range"]) == {"v_lo_V", "v_hi_V", "p_lo_W", "p_hi_W"}
    assert set(d["grid"]) == {"n", "worst_pole_abs", "unstable_or_none"}
    assert set(d["margins"]) == {"guarded_worst_pole_abs", "points_short_of_margin", "gain_db",
                                 "phase_deg"}
    # the demo plant's design keeps 3 dB / 20 degrees of margin over its whole range
    assert d["margins"]["points_short_of_margin"] == 0 and d["margins"]["guarded_worst_pole_abs"] < 1
    assert all(set(c) == {"values", "worst_pole_abs"} for c in d["candidates"])
    assert d["controller"] == "cascaded_pi" and d["stable_over_range"] is True
    assert d["range"] == dict(v_lo_V=300.0, v_hi_V=500.0, p_lo_W=-40e3, p_hi_W=80e3)
    # the controller ran with the designed values
    assert {k: s["controller_values"][k] for k in d["designed"]} == d["values"]
    chk = s["stability_check"]
    assert {"status", "largest_pole_abs", "findings"} <= set(chk), chk
    assert chk["status"] in ("stable", "little margin")
    assert "gain_margin_db" in chk and "phase_margin_deg" in chk  # the margins
    # the check's largest |z| at the start (400 V, 40 kW), against python-control
    prep = prepared("p400", "cascaded_pi")
    assert chk["largest_pole_abs"] == pytest.approx(poles_outside(prep, 400.0, 40e3)[0], rel=1e-6)
