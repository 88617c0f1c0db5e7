"""The worked example of docs/plugins.md runs as written, loaded by file path from a scenario."""
import re
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

DOC = Path(__file__).resolve().parents[2] / "docs" / "plugins.md"


def example_files() -> dict[str, str]:
    text = DOC.read_text()
    pat = re.compile(r"<!-- example-file: (\S+) -->\n```\w*\n(.*?)```", re.S)
    return {name: body for name, body in pat.findall(text)}


@pytest.fixture(scope="module")
def docs_example(tmp_path_factory) -> Path:
    """The worked example's files, as written, in one folder for this module's tests that run
    it unchanged (one compile of its loop: the cache is keyed by the plugin file's path)."""
    files = example_files()
    assert set(files) == {"voltage_pi.py", "example.toml"}
    d = tmp_path_factory.mktemp("docs_example")
    for name, body in files.items():
        (d / name).write_text(body)
    return d


def test_docs_worked_example_runs(tmp_path, docs_example):
    # the bumpless-start check below needs an exact equilibrium start (no excitation offset)
    sc = load_scenario(docs_example / "example.toml", overrides={"initial.v_out_offset": "0 V"})
    assert sc.controller.plugin.name == "voltage_pi"
    res = run_scenario(sc, tmp_path / "run")
    s = res.summary
    assert s["completed"] and s["trip"] is None
    run = open_run(res.folder)
    v, t = run.signals["v_out"], run.time
    # bumpless start: the first command is the steady-state one, so v_out holds its start value
    # within a fraction of a volt over the first 10 ms (before the 20 V step at 20 ms)
    assert abs(v[t < 0.01] - 400.0).max() < 0.5
    # after the 400 -> 420 V step the integral action removes the error (end of the run)
    assert abs(v[-1] - 420.0) < 0.05


_INTEGRATE = "        xc[0] += p[KI] * p[TS] * e  # integrate only when not clamped (anti-windup)\n"
#: plugin bugs placed after the integration (the controller then returns 0): 0 / 0 into the
#: command; 0 / 0 into the integrator while the command stays finite, as a clamp written with
#: min and max would keep it
_BUGS = {
    "command": ("    if t >= 0.01:\n        u[0] = u[0] * 0.0 / (t - t)\n",
                "non-finite value of u"),
    "state": ("    if t >= 0.01:\n        xc[0] = xc[0] * 0.0 / (t - t)\n        u[0] = 400.0\n",
              "non-finite controller state"),
}


@pytest.mark.parametrize("where", sorted(_BUGS))
def test_division_by_zero_in_a_plugin_trips_instead_of_raising(tmp_path, where):
    """A controller that divides 0 by 0 mid-run: the compiled loop follows IEEE 754 (0/0 is
    NaN; IEEE 754-2019 sec. 7.2, from memory) instead of raising, and the loop trips on that tick, with the
    safe output, whether the NaN reaches the command or stays in the controller's state; the
    run ends in order with its recording. (Under numba's default error model the compiled
    chunk would raise ZeroDivisionError instead.)"""
    files = example_files()
    bug, cause = _BUGS[where]
    body = files["voltage_pi.py"].replace(_INTEGRATE, _INTEGRATE + bug)
    assert body != files["voltage_pi.py"]
    (tmp_path / "voltage_pi.py").write_text(body)
    (tmp_path / "example.toml").write_text(files["example.toml"])
    sc = load_scenario(tmp_path / "example.toml")
    res = run_scenario(sc, tmp_path / "run")
    s = res.summary
    run = open_run(res.folder)
    k = int(np.searchsorted(run.time, 0.01 - 1e-12))
    assert s["trip"]["tick"] == k and s["trip"]["cause"] == cause
    assert np.all(run.signals["u"][k:] == 0.0)  # the safe output, held
    assert np.all(np.isfinite(run.signals["u"][:k]))
    # with 0 V applied the constant-power load then collapses the output: the run ends on
    # that event, in order (summary, events and recording written)
    assert s["end_event"] == "voltage collapse" and s["ticks_run"] == len(run.time) > k


#: mistakes a plugin author makes, each one edit of the worked example, and what the one-line
#: error must say instead of numba's long report (common practice, no source)
_MISTAKES = {
    "argument count": (("def step(t, p, xc, y, r, u):", "def step(t, p, xc, y, r):"),
                       ["kernel step(t, p, xc, y, r) takes 5 argument(s)",
                        "the loop calls step(t, p, xc, y, r, u)"]),
    "type": (("    e = r[0] - y[Y_VOUT]\n", '    e = r[0] - y[Y_VOUT]\n    e = "x" + 1\n'),
             ["numba could not compile the loop for single_lc + voltage_pi + profile",
              'voltage_pi.py, line', 'e = "x" + 1', "NUMBA_DISABLE_JIT=1"]),
    "no status": (("        xc[0] += p[KI] * p[TS] * e  # integrate only when not clamped "
                   "(anti-windup)\n    return 0\n",
                   "        xc[0] += p[KI] * p[TS] * e  # integrate only when not clamped "
                   "(anti-windup)\n"),
                  ["step seems to return nothing on some path", "returns an int status"]),
}


@pytest.mark.parametrize("mistake", sorted(_MISTAKES))
def test_a_plugin_mistake_is_one_clear_error(tmp_path, mistake):
    """A kernel with the wrong arguments is refused when the plugin loads; one that numba cannot
    type is refused at the loop's first call with the line and what numba could not type (a
    PluginError, which the command line prints as one message with exit code 2)."""
    from hilrig.runtime.errors import PluginError
    files = example_files()
    (old, new), says = _MISTAKES[mistake]
    body = files["voltage_pi.py"].replace(old, new)
    assert body != files["voltage_pi.py"]
    (tmp_path / "voltage_pi.py").write_text(body)
    (tmp_path / "example.toml").write_text(files["example.toml"])
    with pytest.raises((PluginError, ValueError)) as info:
        run_scenario(load_scenario(tmp_path / "example.toml"), tmp_path / "run")
    text = str(info.value)
    for part in says:
        assert part in text, text
    assert "\n" not in text and len(text) < 600
    assert not (tmp_path / "run" / "recording.h5").exists()


#: an index past the controller's state array (the worked example keeps one state): written
#: from 10 ms on, so that the run has started and the tick is known
_OUT_OF_RANGE = "    if t >= 0.01:\n        xc[7] = 1.0\n"


def test_an_index_out_of_range_in_a_kernel_is_named_by_the_checked_build(tmp_path):
    """--checked: the loop compiled with bounds checks stops at the bad index with one message
    naming the plugin, the kernel and the tick (exit code 2), and keeps the recording up to its
    last flushed chunk. (The normal build writes past the array, silently or with a crash.)"""
    import os
    import subprocess
    import sys
    files = example_files()
    body = files["voltage_pi.py"].replace(_INTEGRATE, _INTEGRATE + _OUT_OF_RANGE)
    assert body != files["voltage_pi.py"]
    (tmp_path / "voltage_pi.py").write_text(body)
    (tmp_path / "example.toml").write_text(files["example.toml"])
    env = {k: v for k, v in os.environ.items() if k not in ("HILRIG_CHECKED", "NUMBA_BOUNDSCHECK")}
    p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "run", "example.toml",
                        "--checked", "--headless", "--out", "run"], cwd=tmp_path,
                       capture_output=True, text=True, timeout=600, env=env)
    assert p.returncode == 2, p.stdout + p.stderr
    err = [ln for ln in p.stdout.splitlines() if ln.startswith("error:")]
    assert len(err) == 1, p.stdout
    Ts = 50e-6  # the worked example's control period
    k = int(round(0.01 / Ts))
    assert f"controller 'voltage_pi': kernel step, tick {k}" in err[0], err[0]
    assert "Traceback" not in p.stdout + p.stderr


def test_arrays_of_another_plugin_combination_are_refused_before_the_first_tick(docs_example):
    """The compiled loop is bound to the plugins it was generated for: arrays prepared for
    another combination (what crashed the envelope of a battery-model scenario) are refused with
    a message naming both, and a wrong array size names the plugin and the array."""
    from hilrig.runtime.errors import PluginError
    from hilrig.runtime.run import _call, compile_loop, prepare
    sc = load_scenario(docs_example / "example.toml")
    fn, _, _ = compile_loop(sc)
    other = load_scenario(docs_example / "example.toml", overrides={"reference": {
        "plugin": "battery_ecm", "n_series": 100}, "initial": {"v_out": "400 V"}})
    prep = prepare(other)
    with pytest.raises(PluginError) as info:
        _call(fn, 0, 0, np.zeros((1, len(prep.signals))), prep.args)
    text = str(info.value)
    assert "reference 'profile'" in text and "reference 'battery_ecm'" in text, text
    # the right plugins, one array too small: named with its owner
    prep = prepare(sc)
    prep.args["xc"] = np.zeros(0)
    with pytest.raises(PluginError) as info:
        _call(fn, 0, 0, np.zeros((1, len(prep.signals))), prep.args)
    assert "controller 'voltage_pi': array xc has 0 elements" in str(info.value), info.value
    prep = prepare(sc)
    with pytest.raises(PluginError) as info:
        _call(fn, 0, 0, np.zeros((1, len(prep.signals) - 1)), prep.args)
    assert "hilrig (recording)" in str(info.value)
