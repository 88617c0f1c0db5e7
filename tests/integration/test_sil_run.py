"""Whole SIL runs of the shipped demo scenario: recording contract, reproducibility, collapse.

Reference values here are facts of the trade or physical invariants, each marked where it is.
"""
import json
import math
from pathlib import Path

import h5py
import numpy as np
import pytest

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario, parse_scenario

SHORT = {"timing.duration": "0.4 s"}


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory, demo_path):
    sc = load_scenario(demo_path, overrides=SHORT)
    res = run_scenario(sc, tmp_path_factory.mktemp("demo") / "run")
    return sc, res


def test_recording_contract(demo_run):
    sc, res = demo_run
    folder = res.folder
    assert (folder / "recording.h5").is_file()
    assert (folder / "summary.json").is_file()
    assert (folder / "scenario.toml").read_text() == sc.text
    with h5py.File(folder / "recording.h5", "r") as f:
        assert f["time"].attrs["unit"] == "s"
        for name, unit in (("v_out", "V"), ("i_out", "A"), ("i_L1", "A"), ("v_ref", "V"), ("u", "V")):
            d = f["signals"][name]
            assert d.ndim == 1 and d.dtype == np.float64
            assert d.attrs["unit"] == unit
            assert d.shape == f["time"].shape
        assert f.attrs["scenario_text"] == sc.text
        assert f.attrs["seed"] == sc.seed
        assert bool(f.attrs["complete"]) is True
        vers = json.loads(f.attrs["versions"])
        assert {"hilrig", "numba", "numpy", "h5py", "python"} <= set(vers)
    run = open_run(folder)
    n = sc.n_ticks
    assert run.time.shape == (n,)
    # time stamps are k * Ts exactly (no accumulated rounding)
    assert np.array_equal(run.time, np.arange(n, dtype=np.int64) * sc.Ts)
    assert run.units["v_ref_d1"] == "V/s"


def test_demo_tracks_and_summary(demo_run):
    sc, res = demo_run
    s = res.summary
    assert s["completed"] and s["trip"] is None and s["end_event"] is None
    assert s["ticks_run"] == sc.n_ticks
    m = s["metrics"]
    # The demo's 60 kW load ramp at 0.3 s: a few volts of error at most, well inside the
    # +-1 % band of a 400 V output (common practice, no source).
    assert m["max_abs_error_V"] < 4.0
    assert m["rms_error_V"] < 0.5
    run = open_run(res.folder)
    s2 = run.signals
    # the plant starts settled: the first sample is the equilibrium at the reference
    assert abs(s2["v_out"][0] - s2["v_ref"][0]) < 1e-9
    # the load current follows P / v for the constant-power load (physics of the load)
    k = np.flatnonzero((run.time > 0.35) & (run.time < 0.39))
    assert np.allclose(s2["i_out"][k], s2["P_load"][k] / s2["v_out"][k], rtol=1e-12)
    assert json.loads((res.folder / "summary.json").read_text())["metrics"] == m


def test_bit_identical_recordings(demo_run, tmp_path):
    sc, res = demo_run
    again = run_scenario(load_scenario(sc.path, overrides=SHORT), tmp_path / "again")
    a, b = open_run(res.folder), open_run(again.folder)
    assert a.signals.keys() == b.signals.keys()
    for name in a.signals:
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    assert a.time.tobytes() == b.time.tobytes()
    for key in ("scenario_text", "seed", "versions", "events"):
        assert a.attrs[key] == b.attrs[key]


def test_the_run_folder_holds_the_scenario_that_ran(demo_run, demo_path, tmp_path):
    """Overrides (--set; here the duration) are part of what ran: the folder's scenario.toml
    (also the recording's scenario_text) names them and runs again to the same recording, bit
    for bit. Without overrides the text is the file's, byte for byte."""
    sc, res = demo_run
    text = (res.folder / "scenario.toml").read_text()
    assert '#   timing.duration = "0.4 s"' in text
    again = run_scenario(load_scenario(res.folder / "scenario.toml"), tmp_path / "again")
    a, b = open_run(res.folder), open_run(again.folder)
    assert a.time.tobytes() == b.time.tobytes()
    for name in a.signals:
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    assert load_scenario(demo_path).text == Path(demo_path).read_text(encoding="utf-8")


def test_refuses_to_overwrite(demo_run):
    sc, res = demo_run
    before = (res.folder / "recording.h5").read_bytes()
    with pytest.raises(FileExistsError, match="nothing was overwritten"):
        run_scenario(sc, res.folder)
    assert (res.folder / "recording.h5").read_bytes() == before


def test_overwrite_removes_what_described_the_old_recording(demo_path, tmp_path):
    """--overwrite: the report, exports and overview plot of the replaced recording go (they
    would describe a run that is no longer there); the user's own files stay."""
    from hilrig.runtime.recording import DERIVED_FILES
    sc = load_scenario(demo_path, overrides={"timing.duration": "0.05 s"})
    folder = tmp_path / "run"
    run_scenario(sc, folder)
    for name in DERIVED_FILES:
        if name == "report":
            (folder / name).mkdir()
            (folder / name / "overview.png").write_bytes(b"old")
        else:
            (folder / name).write_text("old")
    (folder / "notes.txt").write_text("mine")
    short = load_scenario(demo_path, overrides={"timing.duration": "0.02 s"})
    run_scenario(short, folder, overwrite=True)
    assert sorted(p.name for p in folder.iterdir()) == sorted(
        ["notes.txt", "recording.h5", "scenario.toml", "summary.json"])
    assert (folder / "notes.txt").read_text() == "mine"
    assert open_run(folder).time.shape == (short.n_ticks,)


COLLAPSE = """
title = "collapse test"
[timing]
Ts = "50 us"
substeps = 4
duration = "0.2 s"
[plant]
plugin = "two_stage_lc"
[controller]
plugin = "cascaded_pi"
[reference]
plugin = "profile"
points = [[0, 400], [0.01, 400], [0.03, 150]]
[load]
[[load.points]]
t = 0
P = "100 kW"
"""


def test_voltage_collapse_ends_run_and_keeps_recording(tmp_path):
    # Ramping the reference down to 150 V at 100 kW, the constant-power load would draw
    # P/V = 667 A, beyond the controller's 600 A current limit: no operating point can be held
    # and the output collapses (the classic constant-power-load collapse; the load model is
    # singular at 0 V). The run must end cleanly with the event, never with NaN or a hang.
    res = run_scenario(parse_scenario(COLLAPSE), tmp_path / "c")
    s = res.summary
    assert not s["completed"]
    assert s["end_event"] == "voltage collapse"
    ev = [e for e in s["events"] if e["event"] == "voltage collapse"][0]
    run = open_run(res.folder)
    assert run.time.shape[0] == s["ticks_run"] == ev["tick"] + 1
    assert run.signals["v_out"][-1] < 25.0
    for name, x in run.signals.items():
        assert np.all(np.isfinite(x)), name
    assert json.loads(run.attrs["events"])[-1]["event"] == "voltage collapse"
