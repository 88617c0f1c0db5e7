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
        # the contract's version (runtime/recording.py): 2 since JSON texts are strict
        assert f.attrs["hilrig_format"] == 2
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
    # the plant starts settled at the reference's fixed point, less the documented
    # excitation: v_out 0.25 % of the start voltage below its equilibrium ([initial]
    # v_out_offset's default); the first sample is that start state
    off = s["v_out_start_offset_V"]
    assert off == pytest.approx(-0.0025 * s["v_out_start_V"], rel=1e-12) and off < 0.0
    assert abs(s2["v_out"][0] - (s["v_out_start_V"] + off)) < 1e-9
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


DROPOUT = '\n[[faults]]\nkind = "dropout"\nsignal = "v_out"\nstart = "0.1 s"\n'


def _strict_loads(text: str):
    # RFC 8259, section 6: JSON numbers have no NaN or Infinity; refuse the tokens Python's
    # json module would otherwise write and read
    def refuse(token):
        raise ValueError(f"not JSON (RFC 8259, sec. 6): {token}")
    return json.loads(text, parse_constant=refuse)


@pytest.fixture(scope="module")
def dropout_run(tmp_path_factory, demo_path):
    """The demo with its v_out sensor dropping out (NaN) at 0.1 s: the non-finite check trips
    on that tick; the run goes on with the safe output until the output collapses."""
    from pathlib import Path
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "0.15 s"')
    res = run_scenario(parse_scenario(text + DROPOUT, name="dropout.toml"),
                       tmp_path_factory.mktemp("dropout") / "run")
    return res


def test_summary_of_a_run_with_non_finite_values_is_strict_json(dropout_run):
    folder = dropout_run.folder
    s = _strict_loads((folder / "summary.json").read_text())
    assert s["trip"]["cause_id"] == "non-finite v_out" and s["trip"]["tick"] == 2000
    assert s["trip"]["value"] is None            # the NaN that tripped: no finite value
    run = open_run(folder)
    _strict_loads(run.attrs["events"])           # the recording's copy of the events too
    assert run.summary == s                      # open_run reads the nulls back
    # the metrics describe the finite part of the run and count the rest
    # (IAE = sum |e| Ts, Astrom & Hagglund, Advanced PID Control, 2006, sec. 4.2, from memory)
    e = run.signals["v_ref"] - run.signals["v_out"]
    ok = np.isfinite(e)
    m = s["metrics"]
    assert m["nonfinite_samples"] == np.count_nonzero(~ok) > 0
    assert m["iae_Vs"] == pytest.approx(np.abs(e[ok]).sum() * s["Ts_s"], rel=1e-12)
    assert m["rms_error_V"] == pytest.approx(np.sqrt(np.mean(e[ok] ** 2)), rel=1e-12)
    assert m["max_abs_error_V"] == np.abs(e[ok]).max()
    v = run.signals["v_out"][np.isfinite(run.signals["v_out"])]
    assert (m["v_out_min_V"], m["v_out_max_V"]) == (v.min(), v.max())


def test_a_controller_cause_after_a_dropout_says_what_the_controller_did(dropout_run):
    """Fed the NaN measurement on the trip tick, the cascaded PI's integrators turn NaN: the
    loop substitutes the non-finite-state code for the controller's 0 (recorded in ctrl_code),
    and the later cause in the event log says so, not "controller fault code 0"."""
    from hilrig.safety.interlocks import CODE_NONFINITE_STATE
    s = dropout_run.summary
    also = [e for e in s["events"] if e["event"] == "also beyond while tripped"]
    ctrl = [e for e in also if "controller" in e["cause"]]
    assert [(e["cause"], e["cause_id"]) for e in ctrl] == [
        ("non-finite controller state", "non-finite controller state")], also
    run = open_run(dropout_run.folder)
    assert run.signals["ctrl_code"][ctrl[0]["tick"]] == CODE_NONFINITE_STATE
    assert not any("code 0" in e.get("cause", "") for e in s["events"])
