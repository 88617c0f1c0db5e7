"""The excited start ([initial] v_out_offset): an unstable equilibrium cannot pass as tracking.

The plant's v_out state starts a documented offset from its equilibrium (default 0.25 % of the
start voltage, below it). At an operating point where the loop is unstable the run and the
envelope's cell must collapse or trip; at a stable point the verdict stays what it was with an
exact equilibrium start.

Outside reference for which point is which: the spectral radius of the sampled linearised loop
(the demo plant's averaged equations, ZOH by scipy, eigenvalues by numpy), as computed in
tests/unit/plugins/test_cascaded_pi.py: above 1 at 200 V / 100 kW (unstable), below 1 at
200 V / 50 kW and 400 V / 50 kW (stable). Textbook discrete-time stability (Franklin, Powell,
Workman, Digital Control of Dynamic Systems, 3rd ed., ch. 4, from memory).

Every run here uses two_stage_lc + cascaded_pi + profile, the combination the other
integration tests compile.
"""
import re

import numpy as np
import pytest

from hilrig.runtime.trials import envelope as env
from hilrig.runtime.recording import open_run
from hilrig.runtime.run import prepare, run_scenario
from hilrig.runtime.scenario import load_scenario, parse_scenario
from tests.integration.test_envelope import SCENARIO as STEP_100V
from tests.unit.plugins.test_cascaded_pi import _closed_loop_radius


def _hold(v: str, p: str, offset: str | None = None, duration: str = "50 ms") -> str:
    """DEMO DATA: the default plant and controller holding ``v`` into a constant power ``p``."""
    start = f'\n[initial]\nv_out_offset = "{offset}"\n' if offset is not None else ""
    return f'''# DEMO DATA: an invented test scenario on the default plant.
title = "hold {v} at {p}"
demo_data = true

[timing]
Ts = "50 us"
duration = "{duration}"

[plant]
plugin = "two_stage_lc"

[controller]
plugin = "cascaded_pi"

[reference]
plugin = "profile"
points = [[0, "{v}"]]

[load]
[[load.points]]
t = 0
P = "{p}"
{start}'''


def _run(text, folder):
    res = run_scenario(parse_scenario(text, name="hold.toml"), folder)
    return res.summary, open_run(res.folder)


def test_the_points_are_what_the_linearised_loop_says():
    # the premise of the tests below, from the outside reference (module docstring)
    assert _closed_loop_radius(200.0, 100e3) > 1.0
    assert _closed_loop_radius(200.0, 50e3) < 1.0
    assert _closed_loop_radius(400.0, 50e3) < 1.0


def test_an_unstable_equilibrium_collapses_in_run(tmp_path):
    """200 V / 100 kW, the cascaded PI's own docstring: unstable there. With the default
    excitation the run collapses (measured: voltage collapse at 7.05 ms, v_out 11.7 V)."""
    s, run = _run(_hold("200 V", "100 kW"), tmp_path / "r")
    assert s["outcome"]["status"] in ("collapsed", "tripped"), s["outcome"]
    assert not s["completed"] and s["ticks_run"] < s["ticks_planned"]
    # the start was excited as documented: 0.25 % of 200 V below the equilibrium
    assert s["v_out_start_V"] == 200.0 and s["v_out_start_offset_V"] == pytest.approx(-0.5, abs=1e-12)
    assert run.signals["v_out"][0] == pytest.approx(199.5, abs=1e-12)


def test_offset_off_is_the_exact_equilibrium_start_and_hides_the_instability(tmp_path):
    """"0 V" switches the excitation off: the start is the exact equilibrium (x0 is the plant's
    equilibrium bit for bit), and the unstable point then sits there for the whole run, as it
    did before the excitation existed. "0 %" is the same run, bit for bit."""
    sc = parse_scenario(_hold("200 V", "100 kW", "0 V"), name="hold.toml")
    prep = prepare(sc)
    eq = sc.plant.plugin.declaration.equilibrium(sc.plant.values, 200.0, sc.load_v[:, 0].copy())
    assert np.array_equal(prep.args["x"], np.asarray(eq, dtype=np.float64))
    assert prep.v_out_offset == 0.0
    s, run = _run(_hold("200 V", "100 kW", "0 V"), tmp_path / "off")
    assert s["completed"] and s["v_out_start_offset_V"] == 0.0
    assert np.all(run.signals["v_out"] == 200.0)  # never moves: nothing excites it
    s2, run2 = _run(_hold("200 V", "100 kW", "0 %"), tmp_path / "off_pct")
    for name in run.signals:
        assert np.array_equal(run.signals[name], run2.signals[name], equal_nan=True), name


def test_a_stable_point_settles_with_the_same_verdict(tmp_path):
    """400 V / 50 kW (the cascaded PI's design region): the excited start settles back; the
    verdict is "completed" as with an exact equilibrium start, and the end is on the reference."""
    s, run = _run(_hold("400 V", "50 kW"), tmp_path / "on")
    assert s["outcome"]["status"] == "completed" and s["trip"] is None
    v = run.signals["v_out"]
    assert v[0] == pytest.approx(399.0, abs=1e-12)          # excited: 1 V below
    assert np.max(np.abs(v[run.time >= 0.04] - 400.0)) < 0.01  # settled on the reference
    off, _ = _run(_hold("400 V", "50 kW", "0 V"), tmp_path / "off")
    assert off["outcome"]["status"] == s["outcome"]["status"]


def test_the_excitation_follows_the_key(tmp_path):
    """A voltage offset, a percentage, above the equilibrium: x0 moves by exactly that in the
    state named v_out and nowhere else (single_lc: v_out is its 2nd state, two_stage_lc its
    4th)."""
    for plant, where in (("two_stage_lc", 3), ("single_lc", 1)):
        for given, volts in (("-0.5 V", -0.5), ("+1 %", 4.0), ("-0.25 %", -1.0), (-2, -2.0)):
            text = _hold("400 V", "50 kW").replace('plugin = "two_stage_lc"',
                                                  f'plugin = "{plant}"')
            text += f"\n[initial]\nv_out_offset = {given!r}\n".replace("'", '"')
            sc = parse_scenario(text, name="hold.toml")
            eq = np.asarray(sc.plant.plugin.declaration.equilibrium(
                sc.plant.values, 400.0, sc.load_v[:, 0].copy()), dtype=np.float64)
            prep = prepare(sc)
            want = eq.copy()
            want[where] += prep.v_out_offset
            assert prep.v_out_offset == pytest.approx(volts, rel=1e-15)
            assert np.array_equal(prep.args["x"], want), (plant, given)


def test_a_plant_without_a_v_out_state_starts_at_its_equilibrium():
    """Documented: the offset moves the state named v_out; a plant that has none starts
    exactly at its equilibrium and the summary records an offset of 0."""
    from types import SimpleNamespace

    from hilrig.plugins.base import Signal
    from hilrig.runtime.run import _start_offset
    sc = parse_scenario(_hold("400 V", "50 kW"), name="hold.toml")
    decl = SimpleNamespace(states=(Signal("i_L", "A", "current"), Signal("v_C", "V", "voltage")))
    x0 = np.array([125.0, 400.0])
    assert _start_offset(sc, decl, 400.0, x0, "hold.toml") == 0.0
    assert np.array_equal(x0, [125.0, 400.0])


def test_an_offset_beyond_a_tenth_of_the_start_voltage_is_refused(tmp_path):
    """Known only once the start voltage is (it may be the reference's fixed point): refused
    before the run, one line naming the file, key, value and fix, exit 2, nothing written."""
    from hilrig.runtime.errors import ScenarioError
    from tests.integration.test_cli import run_cli
    path = tmp_path / "far.toml"
    path.write_text(_hold("100 V", "5 kW", "-20 V"))
    want = (r"far\.toml: initial\.v_out_offset = -20 V is more than 10 % of the start voltage "
            r"100 V; .* use a smaller one, or set initial\.v_out")
    with pytest.raises(ScenarioError, match=want):
        prepare(load_scenario(path))
    p = run_cli("run", path, "--out", tmp_path / "r", "--headless")
    assert p.returncode == 2, p.stdout + p.stderr
    errors = [line for line in p.stdout.splitlines() if line.startswith("error:")]
    assert len(errors) == 1 and re.search(want, errors[0]), p.stdout
    assert "Traceback" not in p.stdout + p.stderr and not (tmp_path / "r").exists()


def test_the_envelope_excites_a_cell_at_its_start_voltage():
    """A map started at 200 V: the cell whose target is its start voltage is never stepped, so
    only the excitation can reveal the unstable 100 kW point; 50 kW there is stable and tracks,
    and so does the design point 400 V / 50 kW from the scenario's own start (400 V)."""
    text = STEP_100V.read_text()
    row200 = env.tasks_for(text, STEP_100V.name, ["cascaded_pi"],
                           env.Grid(v=(200.0,), p=(50e3, 100e3)), v_start=200.0)
    row400 = env.tasks_for(text, STEP_100V.name, ["cascaded_pi"], env.Grid(v=(400.0,), p=(50e3,)))
    (c50, c100), (c400,) = env.run_envelope(row200 + row400, workers=1)
    assert c100.outcome in ("collapses", "trips"), c100
    assert c50.outcome == "tracks" and c400.outcome == "tracks", (c50, c400)


def test_a_cell_rerun_as_a_run_starts_the_same_way(tmp_path):
    """The cell's overrides (what `envelope --cell` and the worst cells' commands run) give the
    same excited start, so the re-run ends as the cell did (measured: i_L1 > 600 A trips at
    3.95 ms, the voltage collapses at 5.45 ms)."""
    sc = load_scenario(STEP_100V)
    ov = env.cell_overrides(sc, "cascaded_pi", 200.0, 100e3, v_start=200.0)
    res = run_scenario(load_scenario(STEP_100V, overrides=ov), tmp_path / "cell")
    assert res.summary["v_out_start_offset_V"] == pytest.approx(-0.5, abs=1e-12)
    (cell,), = env.run_envelope(env.tasks_for(STEP_100V.read_text(), STEP_100V.name,
                                              ["cascaded_pi"], env.Grid(v=(200.0,), p=(100e3,)),
                                              v_start=200.0), workers=1)
    assert cell.outcome in ("collapses", "trips")
    assert env.cell_of_run(res.folder, 200.0) == cell
