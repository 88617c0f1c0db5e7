"""``hilrig diff``: two short runs of the step trial (two_stage_lc + cascaded_pi + profile, 30 ms),
the second with another voltage-loop gain. The largest difference of each signal is checked
against a hand computation with numpy on the recordings read straight with h5py; the time-base
handling against numpy.interp; the exit codes 0, 1 and 2 through the command line. PNG
signature per the PNG specification (ISO/IEC 15948, from memory)."""
import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from hilrig.runtime.recording import Run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
STEP = Path(__file__).resolve().parents[2] / "examples" / "step_100V.toml"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    root = tmp_path_factory.mktemp("diff")
    a = run_scenario(load_scenario(STEP, {"timing.duration": "30 ms"}), root / "a").folder
    b = run_scenario(load_scenario(STEP, {"timing.duration": "30 ms", "controller.Kp_v": 8.0}),
                     root / "b").folder
    return a, b


def _cli(*args):
    p = subprocess.run(CLI + ["diff", *map(str, args)], capture_output=True, text=True,
                       timeout=300)
    return p.returncode, p.stdout, p.stderr


def _read(folder):
    with h5py.File(folder / "recording.h5", "r") as f:
        return f["time"][()], {k: d[()] for k, d in f["signals"].items()}


def test_largest_difference_where_numpy_puts_it_and_exit_1_beyond_tolerance(runs, tmp_path):
    a, b = runs
    rc, out, err = _cli(a, b, "--json", "--tol", "v_out=0.5V", "--out", tmp_path)
    assert rc == 1, out + err
    res = json.loads(out)
    assert res["bit_identical"] is False
    assert res["time_base"]["method"] == "sample by sample"
    ta, sa = _read(a)
    tb, sb = _read(b)
    assert res["time_base"]["compared"] == len(ta) == len(tb) == 600
    by = {s["name"]: s for s in res["signals"]}
    # hand computation: largest |B - A| over the samples, its first index, B's range
    for name in ("v_out", "i_L1", "u"):
        d = np.abs(sb[name] - sa[name])
        i = int(np.argmax(d))
        assert by[name]["max_abs"] == pytest.approx(d[i], rel=0, abs=0)
        assert by[name]["at_s"] == ta[i]
        rng = sb[name].max() - sb[name].min()
        assert by[name]["rel_range"] == pytest.approx(d[i] / rng, rel=1e-12)
        assert by[name]["identical"] is False
    # the changed gain acts after the step at 10 ms; the load's signals are the same in both
    assert 0.010 <= by["v_out"]["at_s"] <= 0.015
    assert by["P_load"]["identical"] and by["P_load"]["max_abs"] == 0.0
    assert [c["name"] for c in res["checks"]] == ["v_out"] and not res["checks"][0]["passed"]
    assert (tmp_path / "diff.png").read_bytes()[:8] == PNG_MAGIC
    # metrics side by side from the summaries
    m = {r["key"]: r for r in res["metrics"]}
    sa_json = json.loads((a / "summary.json").read_text())["metrics"]
    sb_json = json.loads((b / "summary.json").read_text())["metrics"]
    assert m["iae_Vs"]["a"] == sa_json["iae_Vs"] and m["iae_Vs"]["b"] == sb_json["iae_Vs"]
    assert m["iae_Vs"]["label"] == "IAE [V s]"


def test_exit_0_within_tolerances_and_1_beyond_a_metric_tolerance(runs):
    a, b = runs
    ta, sa = _read(a)
    tb, sb = _read(b)
    worst = float(np.abs(sb["v_out"] - sa["v_out"]).max())
    # just above and just below the largest difference, the latter in millivolts
    rc, out, err = _cli(a, b, "--no-plot", "--tol", f"v_out={worst * 1.001}V",
                        "--tol", "i_L1=100%")
    assert rc == 0, out + err
    assert "within tolerances" in out
    rc, out, err = _cli(a, b, "--no-plot", "--tol", f"v_out={worst * 0.999e3} mV")
    assert rc == 1, out + err
    # IAE relative to B's value
    ma = json.loads((a / "summary.json").read_text())["metrics"]["iae_Vs"]
    mb = json.loads((b / "summary.json").read_text())["metrics"]["iae_Vs"]
    rel = abs(mb - ma) / abs(mb) * 100
    assert _cli(a, b, "--no-plot", "--tol-metric", f"iae={rel * 1.01}%")[0] == 0
    assert _cli(a, b, "--no-plot", "--tol-metric", f"iae_v={rel * 0.99}%")[0] == 1
    # absolute, in the metric's unit (V s)
    assert _cli(a, b, "--no-plot", "--tol-metric", f"iae_Vs={abs(mb - ma) * 1.01}")[0] == 0
    # any difference fails under --bit-identical
    assert _cli(a, b, "--no-plot", "--bit-identical")[0] == 1


def test_run_against_itself_is_bit_identical(runs):
    a, _ = runs
    rc, out, err = _cli(a, a, "--json", "--bit-identical", "--no-plot", "--tol", "v_out=0V")
    assert rc == 0, out + err
    res = json.loads(out)
    assert res["bit_identical"] is True and res["failed"] == []
    assert all(s["identical"] and s["max_abs"] == 0.0 for s in res["signals"])


@pytest.mark.parametrize("args, words", [
    (["{tmp}", "{a}"], "no recording at"),
    (["{a}", "{tmp}/missing"], "is not a folder"),
    (["{a}", "{b}", "--tol", "v_nope=1V"], "'v_nope' is recorded in neither run"),
    (["{a}", "{b}", "--tol", "v_out=abc"], "v_out = 'abc' is not a quantity"),
    (["{a}", "{b}", "--tol", "v_out=0.5A"], "expected V"),
    (["{a}", "{b}", "--tol", "v_out"], "write NAME=VALUE"),
    (["{a}", "{b}", "--tol-metric", "nope=5%"], "no metric 'nope'"),
    (["{a}", "{b}", "--tol-metric", "v_out=5%"], "could mean any of v_out_min_V, v_out_max_V"),
])
def test_bad_input_exits_2_with_one_line(runs, tmp_path, args, words):
    a, b = runs
    rc, out, err = _cli(*[x.format(a=a, b=b, tmp=tmp_path) for x in args])
    assert rc == 2, out + err
    text = (out + err).strip()
    assert "Traceback" not in text
    assert len(text.splitlines()) == 1, text
    assert text.startswith("error: ") and words in text, text


def _run(t, **sig):
    return Run(folder=Path("x"), time=np.asarray(t, float),
               signals={k: np.asarray(v, float) for k, v in sig.items()},
               units={k: "V" for k in sig}, attrs={"Ts": float(t[1] - t[0])},
               summary={"metrics": {}})


def test_different_ts_interpolates_b_onto_a_and_names_one_sided_signals():
    from hilrig.runtime.trials import diff as diffmod
    ta = np.arange(0, 101) * 1e-4          # Ts 100 us, 0..10 ms
    tb = np.arange(0, 202) * 4e-5          # Ts 40 us, 0..8.04 ms: the common span ends there
    a = _run(ta, v_out=400 + 1e3 * ta, only_a=ta)
    xb = 400 + 1e3 * tb + np.where(np.arange(tb.size) == 127, 3.0, 0.0)  # a bump at 5.08 ms
    b = _run(tb, v_out=xb, only_b=tb)
    res = diffmod.compare(a, b)
    assert "interpolated" in res.time_base["method"] and res.time_base["compared"] == 81
    assert res.only_in_a == ["only_a"] and res.only_in_b == ["only_b"]
    assert not res.bit_identical and "different Ts" in res.identical_reason
    # the reference: numpy.interp of B at A's times within B's span
    t = ta[ta <= tb[-1]]
    d = np.abs(np.interp(t, tb, xb) - (400 + 1e3 * t))
    s = res.signals[0]
    assert s.max_abs == d.max() and s.at_s == t[np.argmax(d)]
    # the bump seen at A's 5.1 ms, halfway between B's samples at 5.08 and 5.12 ms
    assert s.max_abs == pytest.approx(1.5) and s.at_s == pytest.approx(5.1e-3)
