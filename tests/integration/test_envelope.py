"""Operating-envelope maps: classification, determinism, pool and Dask backends, CLI output."""
import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.trials import envelope as env
ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "examples" / "step_100V.toml"


@pytest.fixture(scope="module")
def small_tasks():
    grid = env.Grid.parse("100:500", "0:100e3", "5x4")
    return env.tasks_for(SCENARIO.read_text(), SCENARIO.name, ["cascaded_pi"], grid)


def test_pool_results_are_identical_run_to_run_and_to_one_process(small_tasks):
    a = env.run_envelope(small_tasks, workers=2)
    b = env.run_envelope(small_tasks, workers=2)
    c = env.run_envelope(small_tasks, workers=1)
    assert a == b == c
    flat = [cell.outcome for row in a for cell in row]
    assert set(flat) <= set(env.OUTCOMES)
    # the design region of the cascaded PI (400 V, up to 100 kW) tracks
    i400 = [t.v for t in small_tasks].index(400.0)
    assert [cell.outcome for cell in a[i400]] == ["tracks"] * 4


def test_dask_backend_gives_the_same_map(small_tasks):
    distributed = pytest.importorskip("distributed")
    # ":0": the scheduler's HTTP server always starts (None means its default port, 8787,
    # which a second run on the same machine already held: seen as "Port 8787 is already in
    # use" raised through the warnings-as-errors setting); a free port avoids the clash
    # host and dashboard on loopback: by default the scheduler and its HTTP server listen on
    # every interface (the suite's network guard refused that bind)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address="127.0.0.1:0") as cluster:
        via_dask = env.run_envelope(small_tasks, cluster=cluster.scheduler_address)
    assert via_dask == env.run_envelope(small_tasks, workers=2)


def test_classification_rules():
    n = 100
    v = np.full(n, 400.0)
    u = np.full(n, 400.0)
    vdc = np.full(n, 800.0)
    # within 2 % of 400 V = 8 V over the final 30 %: tracks
    assert env.classify(n, n, 0, False, v + 7.9, v, u, vdc, 400.0, 2.0) == "tracks"
    # outside, command not at a limit: oscillates
    bad = v.copy()
    bad[80::2] += 20.0
    assert env.classify(n, n, 0, False, bad, v, u, vdc, 400.0, 2.0) == "oscillates"
    # outside with the command at the DC-link limit on most ticks: saturates
    usat = u.copy()
    usat[70:] = 800.0
    assert env.classify(n, n, 0, False, v - 50.0, v, usat, vdc, 400.0, 2.0) == "saturates"
    # a trip is reported as such even if the output collapsed afterwards
    assert env.classify(n, 50, 1, True, v, v, u, vdc, 400.0, 2.0) == "trips"
    assert env.classify(n, 50, 1, False, v, v, u, vdc, 400.0, 2.0) == "collapses"


def test_grid_parsing_errors():
    with pytest.raises(ValueError, match="--grid '25by25'"):
        env.Grid.parse("50:600", "0:1e5", "25by25")
    with pytest.raises(ValueError, match="--v-range '0:600': voltages must be above 0 V"):
        env.Grid.parse("0:600", "0:1e5", "2x2")
    with pytest.raises(ValueError, match="--p-range '5:1'"):
        env.Grid.parse("50:600", "5:1", "2x2")
    g = env.Grid.parse("50 V:600 V", "0:150 kW", "3x2")
    assert g.v == (50.0, 325.0, 600.0) and g.p == (0.0, 150e3)


def test_cli_writes_csv_png_and_json(tmp_path):
    out = tmp_path / "env"
    cmd = [sys.executable, "-m", "hilrig.runtime.cli", "envelope", str(SCENARIO),
           "--controllers", "cascaded_pi", "--grid", "4x3", "--v-range", "200:500",
           "--p-range", "0:60e3", "--out", str(out), "--json"]
    p = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stderr
    counts = json.loads(p.stdout)
    assert sum(counts["cascaded_pi"]["outcomes"].values()) == 12
    with open(out / "envelope.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 12 and list(rows[0]) == list(env.CSV_COLUMNS)
    assert (out / "envelope.png").stat().st_size > 1000
    # run again into the same folder: refused, nothing overwritten
    p = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    assert p.returncode == 2 and "nothing was overwritten" in p.stdout


def test_far_from_the_design_point_linear_fails_flatness_tracks():
    """At low voltage and constant power the load's incremental resistance -V^2/P shrinks
    towards zero (its destabilising conductance P/V^2 grows: 2.2 S at 150 V / 50 kW against
    0.31 S at 400 V), so the linearised plant's unstable pole P/(C2 V^2) moves far from where the
    linear gains were designed (400 V / 50 kW) and the loop leaves the band or collapses. The
    flatness-based law cancels the load's nonlinearity at every operating point and keeps
    tracking (within the converter's current rating)."""
    scen = ROOT / "examples" / "envelope.toml"
    grid = env.Grid.parse("150:150", "50e3:50e3", "1x1")
    tasks = env.tasks_for(scen.read_text(), scen.name,
                          ["cascaded_pi", "state_feedback", "flatness"], grid)
    out = {t.controller: env.run_row(t)[0].outcome for t in tasks}
    assert out["flatness"] == "tracks"
    assert out["state_feedback"] != "tracks"
    assert out["cascaded_pi"] != "tracks"


def test_envelope_of_a_scenario_with_a_battery_model_reference_runs(demo_path, tmp_path):
    """The demo's own scenario (battery-model reference): every map point runs with a profile
    reference, so the loop must be compiled for it. It was compiled for the battery model, whose
    kernel then read the profile's arrays out of bounds ("double free or corruption", a
    segmentation fault or BrokenProcessPool). A subprocess, so that a crash fails the test
    instead of the test session."""
    out = tmp_path / "env"
    p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "envelope", demo_path,
                        "--controllers", "cascaded_pi", "--grid", "2x2", "--v-range", "380:420",
                        "--p-range", "0:20e3", "--workers", "1", "--out", str(out), "--json"],
                       capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stdout + p.stderr
    with open(out / "envelope.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 4
    # near the demo's own operating point (about 400 V) and light load, the baseline tracks
    assert all(r["outcome"] == "tracks" for r in rows), rows
    # a cell of it as a normal run starts where the map's points start (the battery model's
    # voltage at t = 0, found by the run's own fixed-point search) and tracks the same way
    p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "envelope", demo_path,
                        "--cell", "420,20e3", "--controllers", "cascaded_pi", "--out",
                        str(tmp_path / "cell"), "--headless"],
                       capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stdout + p.stderr
    assert env.cell_of_run(tmp_path / "cell", 420.0) == row_cell(find(
        read_rows(out / "envelope.csv"), "cascaded_pi", 420.0, 20e3)) == env.Cell("tracks")
    assert "cell outcome (the map's rules, tracking within 2 %): tracks" in p.stdout


# --- the envelope as a first-class command: --headless, --set, elapsed time, progress, the
# run's notices, first trip causes, re-running a cell ---------------------------------------

HILRIG = [sys.executable, "-m", "hilrig.runtime.cli"]
MAP_SCENARIO = ROOT / "examples" / "envelope.toml"
#: a tighter over-voltage interlock (560 V) than the scenario's 650 V, so that the 600 V cells
#: trip on it, beside the converter's 600 A current rating (both: the scenario's demo data)
INTERLOCKS_SET = ('interlocks=[{signal = "v_out", above = "560 V"}, '
                  '{signal = "i_L1", above = "600 A"}]')
#: two voltages x five load powers, both candidates whose loops the tests above compile
MAP_ARGS = [MAP_SCENARIO, "--controllers", "cascaded_pi,flatness", "--v-range", "100:600",
            "--grid", "2x5", "--p-range", "0:150e3", "--workers", "1", "--set", INTERLOCKS_SET]
V_CAUSE = "interlock v_out > 560 V"
I_CAUSE = "interlock i_L1 > 600 A"


def cli(*args, timeout=600):
    return subprocess.run(HILRIG + [str(a) for a in args], capture_output=True, text=True,
                          timeout=timeout, env=dict(os.environ, COLUMNS="200"))


def read_rows(path: Path) -> list[dict]:
    """envelope.csv's rows with numbers as floats and empty times as None."""
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    for r in rows:
        for k in ("v_ref_V", "p_load_W", "first_cause_time_s", "end_event_time_s"):
            r[k] = float(r[k]) if r[k] != "" else None
    return rows


def row_cell(r: dict) -> "env.Cell":
    return env.Cell(r["outcome"], r["first_cause"], r["first_cause_time_s"], r["end_event"],
                    r["end_event_time_s"])


def find(rows, controller, v, p):
    (r,) = [r for r in rows if (r["controller"], r["v_ref_V"], r["p_load_W"]) == (controller, v, p)]
    return r


def rerun(command: str, out: Path):
    """Run a printed ``hilrig run ...`` command as it stands (the interpreter's module in place
    of the console script), into ``out``."""
    import shlex
    words = shlex.split(command)
    assert words[:2] == ["hilrig", "run"], command
    return cli(*words[1:], "--out", out, "--headless")


@pytest.fixture(scope="module")
def two_causes(tmp_path_factory):
    import time
    out = tmp_path_factory.mktemp("envelope") / "text"
    t0 = time.perf_counter()
    p = cli("envelope", *MAP_ARGS, "--out", out, "--headless")
    wall = time.perf_counter() - t0
    assert p.returncode == 0, p.stdout + p.stderr
    return out, p.stdout, wall


@pytest.fixture(scope="module")
def two_causes_json(tmp_path_factory):
    out = tmp_path_factory.mktemp("envelope") / "json"
    p = cli("envelope", *MAP_ARGS, "--out", out, "--json")
    assert p.returncode == 0, p.stdout + p.stderr
    return out, json.loads(p.stdout)


def test_set_reaches_every_candidate_headless_output_and_the_whole_elapsed_time(two_causes):
    import re
    out, stdout, wall = two_causes
    rows = read_rows(out / "envelope.csv")
    # with the scenario's own 650 V interlock both candidates track at 600 V ...
    grid = env.Grid.parse("600:600", "0:150e3", "1x2")
    for t in env.tasks_for(MAP_SCENARIO.read_text(), MAP_SCENARIO.name,
                           ["cascaded_pi", "flatness"], grid):
        assert [c.outcome for c in env.run_row(t)] == ["tracks", "tracks"], t.controller
    # ... and --set's 560 V interlock reached both: also flatness, which is not the scenario's
    # own controller (a tracking output must pass 560 V on its way to 600 V)
    for c in ("cascaded_pi", "flatness"):
        at600 = [r for r in rows if r["controller"] == c and r["v_ref_V"] == 600.0]
        assert len(at600) == 5 and {r["first_cause"] for r in at600} == {V_CAUSE}, at600
    assert "\x1b[" not in stdout  # --headless: no colours, no progress bar
    # the elapsed time covers compiling (or loading) the loops and the map, not the pool alone
    m = re.search(r"(\d+) points in ([\d.]+) s \(loops compiled or loaded in ([\d.]+) s, "
                  r"map ([\d.]+) s\)", stdout)
    assert m, stdout
    n, total, loops, grid_s = int(m[1]), float(m[2]), float(m[3]), float(m[4])
    assert n == 20
    assert total >= loops + grid_s - 0.1  # each rounded to 0.1 s
    assert total <= wall


def test_each_cell_keeps_its_first_trip_cause_and_end_event_in_the_csv(two_causes):
    out, _, _ = two_causes
    rows = read_rows(out / "envelope.csv")
    assert list(rows[0]) == list(env.CSV_COLUMNS) and len(rows) == 20
    for r in rows:
        # a trip has a cause and its time; a collapse without a trip has the loop's end event
        assert (r["outcome"] == "trips") == (r["first_cause"] != "") == (
            r["first_cause_time_s"] is not None), r
        if r["outcome"] == "collapses":
            assert r["end_event"] == "voltage collapse" and r["end_event_time_s"] > 5e-3, r
        assert (r["end_event"] == "") == (r["end_event_time_s"] is None), r
        if r["outcome"] == "tracks":
            assert r["end_event"] == "", r
    # 600 V cells: the start is settled at 400 V and the reference steps at 5 ms, shaped with a
    # slew limit of 200 kV/s (the scenario's shaping), so it reaches 560 V no earlier than
    # 5 ms + 160 V / 200 kV/s = 5.8 ms [derived]
    for r in rows:
        if r["v_ref_V"] == 600.0:
            assert r["first_cause"] == V_CAUSE and 5.8e-3 <= r["first_cause_time_s"] < 60e-3, r
    # 100 V at 75 kW and more needs P / V >= 750 A, beyond the 600 A interlock (P = V I): no
    # cell there tracks; flatness tracks wherever the current allows, so it trips on current
    for r in rows:
        if r["v_ref_V"] == 100.0 and r["p_load_W"] >= 75e3:
            assert r["outcome"] in ("trips", "collapses"), r
            if r["outcome"] == "trips":
                assert r["first_cause"] == I_CAUSE, r
            if r["controller"] == "flatness":
                assert r["outcome"] == "trips", r
    for c in ("cascaded_pi", "flatness"):
        assert find(rows, c, 100.0, 0.0)["outcome"] == "tracks"
    # a trip stays "trips" when the safe output (0 V) then lets the voltage collapse
    assert any(r["outcome"] == "trips" and r["end_event"] == "voltage collapse"
               and r["end_event_time_s"] > r["first_cause_time_s"] for r in rows)
    # this map has both kinds of cell: a collapse without a trip (the cascaded PI at 100 V)
    assert any(r["outcome"] == "collapses" for r in rows)


def test_trip_causes_in_the_json_and_both_maps_legends(two_causes, two_causes_json):
    from collections import Counter
    out, stdout, _ = two_causes
    _, doc = two_causes_json
    rows = read_rows(out / "envelope.csv")
    assert read_rows(two_causes_json[0] / "envelope.csv") == rows  # deterministic
    for c in ("cascaded_pi", "flatness"):
        mine = [r for r in rows if r["controller"] == c]
        assert doc[c]["outcomes"] == {o: sum(r["outcome"] == o for r in mine) for o in env.OUTCOMES}
        assert doc[c]["trip_causes"] == dict(Counter(r["first_cause"] for r in mine
                                                     if r["outcome"] == "trips"))
    # terminal map: a letter per cause, most frequent first, with a key
    n_v = sum(r["first_cause"] == V_CAUSE for r in rows)
    n_i = sum(r["first_cause"] == I_CAUSE for r in rows)
    assert n_v == 10 and 0 < n_i < n_v
    assert f"A trips: {V_CAUSE} ({n_v} cells)" in stdout
    assert f"B trips: {I_CAUSE} ({n_i} cell{'s' if n_i > 1 else ''})" in stdout
    letter = {V_CAUSE: "A", I_CAUSE: "B"}
    lines = stdout.splitlines()
    for c in ("cascaded_pi", "flatness"):
        head = next(i for i, ln in enumerate(lines) if ln.startswith(f"{c}  tracks"))
        for j, v in enumerate((600.0, 100.0)):
            mine = sorted((r for r in rows if r["controller"] == c and r["v_ref_V"] == v),
                          key=lambda r: r["p_load_W"])
            want = "".join(letter[r["first_cause"]] if r["outcome"] == "trips"
                           else env.SYMBOLS[r["outcome"]] for r in mine)
            assert lines[head + 1 + j] == f"{v:7.1f} V  {want}", lines[head + 1 + j]
    # heat map: a second legend lists the causes; each tripping cell carries its cause's hatch
    assert (out / "envelope.png").stat().st_size > 1000
    import matplotlib.pyplot as plt
    fig = env.heat_map_figure(rows)
    try:
        assert len(fig.legends) == 2
        assert [t.get_text() for t in fig.legends[1].get_texts()] == [V_CAUSE, I_CAUSE]
        hatches = [h.get_hatch() for h in fig.legends[1].legend_handles]
        assert len(set(hatches)) == 2 and None not in hatches
        for ax, c in zip(fig.axes, ("cascaded_pi", "flatness")):
            drawn = Counter(pt.get_hatch() for pt in ax.patches)
            want = Counter(hatches[[V_CAUSE, I_CAUSE].index(r["first_cause"])] for r in rows
                           if r["controller"] == c and r["outcome"] == "trips")
            assert drawn == want, c
    finally:
        plt.close(fig)


def test_the_worst_cells_command_reruns_it_as_a_normal_run_with_the_same_outcome(
        two_causes_json, tmp_path):
    out, doc = two_causes_json
    rows = read_rows(out / "envelope.csv")
    seen = set()
    for c in ("cascaded_pi", "flatness"):
        w = doc[c]["worst"]
        r = find(rows, c, w["v_ref_V"], w["p_load_W"])
        assert w["outcome"] == r["outcome"] != "tracks"
        seen.add(w["outcome"])
        p = rerun(w["command"], tmp_path / c)
        # a worst cell trips or collapses: as a normal run it did not complete (status 1)
        assert p.returncode == 1, p.stdout + p.stderr
        # the run's recording, classified by the map's rules, is the map's cell: the same
        # outcome, first cause and times
        assert env.cell_of_run(tmp_path / c, w["v_ref_V"]) == row_cell(r)
        s = json.loads((tmp_path / c / "summary.json").read_text())
        if r["first_cause"] == I_CAUSE:
            assert s["trip"]["value"] > 600.0
    # the worst cells of this map: a collapse (cascaded PI) and a trip (flatness)
    assert seen == {"collapses", "trips"}


def test_cell_option_runs_one_cell_as_a_normal_run(two_causes, tmp_path):
    out, _, _ = two_causes
    r = find(read_rows(out / "envelope.csv"), "flatness", 600.0, 75e3)
    assert r["outcome"] == "trips"
    folder = tmp_path / "cell"
    args = ["envelope", MAP_SCENARIO, "--cell", "600 V,75 kW", "--controller", "flatness",
            "--set", INTERLOCKS_SET, "--out", folder, "--headless"]
    p = cli(*args)
    assert p.returncode == 0, p.stdout + p.stderr
    for f in ("recording.h5", "summary.json", "scenario.toml", "overview.png"):
        assert (folder / f).exists(), f
    assert env.cell_of_run(folder, 600.0) == row_cell(r)
    assert (f"cell outcome (the map's rules, tracking within 2 %): trips: {V_CAUSE} at "
            f"{r['first_cause_time_s'] * 1e3:.3g} ms") in p.stdout
    # the printed command is the same run
    cmd = next(ln.strip() for ln in p.stdout.splitlines() if ln.strip().startswith("hilrig run "))
    assert "flatness" in cmd and "--out" in cmd
    # a second time: refused, nothing overwritten
    p = cli(*args)
    assert p.returncode == 2 and "nothing was overwritten" in p.stdout, p.stdout
    p = cli("envelope", MAP_SCENARIO, "--cell", "600 V", "--controller", "flatness")
    assert p.returncode == 2 and "--cell '600 V': write V,P" in p.stdout, p.stdout


#: test data (invented, not a device): an 80 V DC link feeding a 48 V output
V80 = """\
title = "80 V DC link, 48 V output (test data)"

[timing]
Ts = "50 us"
duration = "40 ms"

[plant]
plugin = "two_stage_lc"
V_dc = "80 V"

[controller]
plugin = "cascaded_pi"

[reference]
plugin = "profile"
points = [[0, "48 V"]]

[[load.points]]
t = 0
P = "500 W"

[limits]
v_collapse = "5 V"
"""


def test_a_grid_above_the_plants_v_dc_gets_runs_notice_before_the_map(tmp_path):
    scen = tmp_path / "v80.toml"
    scen.write_text(V80)
    p = cli("envelope", scen, "--controllers", "cascaded_pi", "--v-range", "40:120",
            "--grid", "2x1", "--p-range", "0:0", "--v-start", "90 V", "--workers", "1",
            "--out", tmp_path / "map", "--headless")
    assert p.returncode == 0, p.stdout + p.stderr
    lines = p.stdout.splitlines()
    # the two notices of voltages beyond the DC link (the stability check's notice, which also
    # comes before the runs, is about the loop, not these voltages)
    notes = [i for i, ln in enumerate(lines) if ln.startswith("notice: ") and "V_dc" in ln]
    first_run = next(i for i, ln in enumerate(lines) if ln.startswith("preparing the compiled"))
    assert len(notes) == 2 and max(notes) < first_run, p.stdout
    check = [ln for ln in lines if ln.startswith("notice: stability check: cascaded_pi")]
    assert check and "no steady state at 1 of 2 points" in check[0], p.stdout
    start, target = (lines[i] for i in notes)
    assert start.startswith("notice: start voltage (--v-start) = 90 V is above plant.V_dc = 80 V")
    assert target.startswith("notice: target voltage (--v-range) = 120 V is above plant.V_dc = "
                             "80 V") and target.endswith("(1 of 2 target voltages)")
    # an averaged buck stage cannot put out more than V_dc (common practice, no source): the
    # 120 V cell saturates, and it is the worst cell
    rows = read_rows(tmp_path / "map" / "envelope.csv")
    assert find(rows, "cascaded_pi", 120.0, 0.0)["outcome"] == "saturates"
    # the notice is run's own: the worst cell's run says the same of its 120 V reference
    cmd = next(ln.strip() for ln in lines if ln.strip().startswith("hilrig run "))
    r = rerun(cmd, tmp_path / "cell")
    # as a run it did not complete: with the command held at V_dc the output rings between
    # about 70 and 90 V (no damping left to the loop) under its 120 V reference: "oscillating",
    # exit 1 (it read "completed" before runs had a tracking band)
    assert r.returncode == 1, r.stdout + r.stderr
    assert json.loads((tmp_path / "cell" / "summary.json").read_text())["outcome"]["status"] \
        == "oscillating"
    run_note = next(ln for ln in r.stdout.splitlines() if ln.startswith("notice: "))
    assert run_note == ("notice: reference.points = " + target.split(" = ", 1)[1]
                        .removesuffix(" (1 of 2 target voltages)"))
    assert env.cell_of_run(tmp_path / "cell", 120.0).outcome == "saturates"
    # a grid and start within the DC link: no notice
    from hilrig.runtime.scenario import load_scenario
    assert env.grid_notices(load_scenario(scen), env.Grid.parse("20:60", "0:0", "2x1")) == []


def test_an_unknown_set_key_is_one_error_before_any_run(tmp_path):
    bad = "controller.kx=1"
    p = cli("envelope", MAP_SCENARIO, "--controllers", "cascaded_pi,flatness", "--grid", "2x2",
            "--set", bad, "--out", tmp_path / "map")
    assert p.returncode == 2
    # run's words, naming every candidate's parameters; one message, nothing ran or was written
    r = cli("run", MAP_SCENARIO, "--set", bad, "--out", tmp_path / "run")
    assert r.returncode == 2
    assert p.stdout.startswith("error: envelope.toml: unknown key 'controller.kx' (an "
                               "override): no candidate controller has a parameter 'kx'"), p.stdout
    assert "cascaded_pi has Kp_v," in p.stdout and "flatness has pole," in p.stdout
    assert r.stdout.startswith("error: envelope.toml: unknown key 'controller.kx' (an "
                               "override): controller cascaded_pi has no parameter 'kx'"), r.stdout
    assert len(p.stdout.strip().splitlines()) == 1 and "Traceback" not in p.stderr + r.stderr
    assert not (tmp_path / "map").exists()
    p = cli("envelope", MAP_SCENARIO, "--controllers", "cascaded_pi", "--set", "no-equals-sign")
    assert p.returncode == 2 and p.stdout.startswith("error: --set 'no-equals-sign': write KEY=VALUE")


def test_progress_counts_operating_points(small_tasks):
    total = sum(len(t.p) for t in small_tasks)
    for workers in (1, 2):
        calls = []
        env.run_envelope(small_tasks, workers=workers, progress=lambda d, n: calls.append((d, n)))
        assert [d for d, _ in calls] == list(range(4, total + 1, 4))  # a row of 4 points each
        assert {n for _, n in calls} == {total}
