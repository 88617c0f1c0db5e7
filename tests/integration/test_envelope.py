"""Operating-envelope maps: classification, determinism, pool and Dask backends, CLI output."""
import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime import envelope as env

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
    flat = [o for row in a for o in row]
    assert set(flat) <= set(env.OUTCOMES)
    # the design region of the cascaded PI (400 V, up to 100 kW) tracks
    i400 = [t.v for t in small_tasks].index(400.0)
    assert a[i400] == ["tracks"] * 4


def test_dask_backend_gives_the_same_map(small_tasks):
    distributed = pytest.importorskip("distributed")
    # ":0": the scheduler's HTTP server always starts (None means its default port, 8787,
    # which a second run on the same machine already held: seen as "Port 8787 is already in
    # use" raised through the warnings-as-errors setting); a free port avoids the clash
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster:
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
    assert sum(counts["cascaded_pi"].values()) == 12
    with open(out / "envelope.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 12 and set(rows[0]) == {"controller", "v_ref_V", "p_load_W", "outcome"}
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
    out = {t.controller: env.run_row(t)[0] for t in tasks}
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
