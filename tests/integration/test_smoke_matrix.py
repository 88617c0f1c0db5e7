"""Smoke matrix: every command on every scenario that ships, with the bounds-checked build.

The scenarios are found, not listed: the demo scenario and every scenario file in examples/ (a
file with ``[[cases]]`` is an interlock suite and runs under ``interlock-test``), so a newly
shipped scenario joins the matrix by itself. Each command runs as a user runs it (the console
entry point in a subprocess) with ``--checked`` and ``HILRIG_CHECKED=1`` in its environment, so
that the loop, and every worker or stand-in process it starts, is compiled with numba's bounds
checks: an index out of range anywhere stops the command with an error instead of corrupting
memory silently. Each cell must end with its documented exit status and its outputs written, and
never with a traceback or a signal.

Sizes are kept small (a 2x2 envelope; the shipped durations, 40 ms to 2 s of simulated time);
the checked build of each plugin combination compiles once per test session.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from hilrig.runtime.recording import open_run
from tests.integration.standin import reaped, wait_listening

ROOT = Path(__file__).resolve().parents[2]
CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
CONTROLLERS = "cascaded_pi,flatness,state_feedback"


def _demo() -> Path:
    from importlib.resources import files
    return Path(str(files("hilrig.runtime") / "data" / "demo.toml"))


def shipped() -> tuple[dict[str, Path], dict[str, Path]]:
    """(scenarios, suites) that ship: the demo scenario and examples/*.toml, by name."""
    scenarios = {"demo": _demo()}
    suites = {}
    for f in sorted((ROOT / "examples").glob("*.toml")):
        raw = tomllib.loads(f.read_text())
        (suites if "cases" in raw else scenarios)[f.stem] = f
    return scenarios, suites


SCENARIOS, SUITES = shipped()


def cli(*args, cwd=None, timeout=900, stdin=None):
    env = dict(os.environ, HILRIG_CHECKED="1", COLUMNS="120")
    return subprocess.run(CLI + [str(a) for a in args], capture_output=True, text=True, cwd=cwd,
                          timeout=timeout, env=env, stdin=subprocess.DEVNULL)


def ok(p, codes=(0,)):
    """The command ended with one of ``codes`` (never by a signal), without a traceback."""
    out = p.stdout + p.stderr
    assert p.returncode in codes, f"exit {p.returncode}:\n{out[-4000:]}"
    assert "Traceback" not in out, out[-4000:]
    return out


def test_the_matrix_holds_every_shipped_scenario_and_suite():
    """The discovery itself: the demo, the four example scenarios and the example suite (a
    scenario file added to examples/ shows up here without editing this test)."""
    assert {"demo", "step_100V", "envelope", "interlock_base", "interlock_base_slow"} <= set(SCENARIOS)
    assert "interlock_suite" in SUITES
    for f in list(SCENARIOS.values()) + list(SUITES.values()):
        assert f.is_file()


@pytest.fixture(scope="module")
def sil_runs(tmp_path_factory):
    """One checked SIL run per shipped scenario (``demo`` through the demo command)."""
    base = tmp_path_factory.mktemp("smoke")
    runs = {}
    for name, path in SCENARIOS.items():
        out = base / name
        p = (cli("demo", "--checked", "--headless", "--out", out) if name == "demo"
             else cli("run", path, "--checked", "--headless", "--out", out))
        runs[name] = (out, p)
    return runs


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_run(sil_runs, name):
    out, p = sil_runs[name]
    text = ok(p)
    s = json.loads((out / "summary.json").read_text())
    assert s["ticks_run"] >= 1 and (out / "recording.h5").is_file()
    assert "outcome" in text
    # the checked build records the same bits as the normal one: run it once more without
    # bounds checks and compare (determinism is a documented property of the loop)
    env = {k: v for k, v in os.environ.items()
           if k not in ("HILRIG_CHECKED", "NUMBA_BOUNDSCHECK", "NUMBA_CACHE_DIR")}
    plain = out.parent / (name + "-plain")
    args = (["demo"] if name == "demo" else ["run", str(SCENARIOS[name])])
    q = subprocess.run(CLI + args + ["--headless", "--out", str(plain)], capture_output=True,
                       text=True, timeout=900, env=env, stdin=subprocess.DEVNULL)
    ok(q)
    a, b = open_run(out), open_run(plain)
    assert a.signals.keys() == b.signals.keys()
    for key in a.signals:
        np.testing.assert_array_equal(a.signals[key], b.signals[key], err_msg=key)


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_report_and_exports(sil_runs, name):
    out, _ = sil_runs[name]
    ok(cli("report", out))
    assert (out / "report.md").is_file()
    ok(cli("export", out, "--csv"))
    with open(out / "recording.csv") as fh:
        n = sum(1 for _ in fh) - 1
    assert n == json.loads((out / "summary.json").read_text())["ticks_run"]
    pytest.importorskip("asammdf")
    ok(cli("export", out, "--mf4"))
    assert (out / "recording.mf4").stat().st_size > 0


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_compare(tmp_path, name):
    p = cli("compare", SCENARIOS[name], "--controllers", CONTROLLERS, "--checked", "--json",
            "--out", tmp_path / "cmp")
    ok(p)
    got = json.loads(p.stdout[p.stdout.index("{"):])
    assert set(got) == set(CONTROLLERS.split(","))
    # outcome-aware ranks: 1..3, and no candidate that did not complete above one that did
    ranked = sorted(got.values(), key=lambda r: r["rank"])
    assert [r["rank"] for r in ranked] == [1, 2, 3]
    done = [r["outcome"]["completed"] for r in ranked]
    assert done == sorted(done, reverse=True), ranked
    assert (tmp_path / "cmp" / "comparison.json").is_file()


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_envelope(tmp_path, name):
    p = cli("envelope", SCENARIOS[name], "--controllers", CONTROLLERS, "--grid", "2x2",
            "--v-range", "300:450", "--p-range", "0:40e3", "--checked", "--json",
            "--out", tmp_path / "env")
    ok(p)
    got = json.loads(p.stdout[p.stdout.index("{"):])
    assert set(got) == set(CONTROLLERS.split(","))
    for per in got.values():
        assert sum(per["outcomes"].values()) == 4
    assert (tmp_path / "env" / "envelope.csv").is_file()


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_bridge_lockstep_equals_sil(sil_runs, tmp_path, name):
    """serve-sim and a lockstep run, both checked: the recording equals the SIL run's bit for
    bit (lockstep is deterministic co-simulation of the same compiled stages)."""
    if name == "demo":
        path = sil_runs["demo"][0] / "scenario.toml"  # the demo command's scenario, as a file
    else:
        path = SCENARIOS[name]
    address = f"ipc://{tmp_path}/sim.ipc"
    env = dict(os.environ, HILRIG_CHECKED="1")
    sim = subprocess.Popen(CLI + ["serve-sim", "--scenario", str(path), "--bind", address,
                                  "--sessions", "1", "--idle-timeout", "120", "--checked"],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                           stdin=subprocess.DEVNULL)
    with reaped(sim):
        wait_listening(sim)
        p = cli("run", path, "--bridge", address, "--checked", "--headless", "--out",
                tmp_path / "run")
        ok(p)
        sim.communicate(timeout=120)
    assert sim.returncode == 0
    a, b = open_run(tmp_path / "run"), open_run(sil_runs[name][0])
    np.testing.assert_array_equal(a.signals["v_out"], b.signals["v_out"])
    np.testing.assert_array_equal(a.signals["u"], b.signals["u"])


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_bridge_free_running(sil_runs, tmp_path, name):
    """serve-sim in free-running mode and a free-running run, both checked: the run ends in
    order with its recording and summary (its timing, and so its outcome, depends on the
    machine: not judged here)."""
    path = sil_runs["demo"][0] / "scenario.toml" if name == "demo" else SCENARIOS[name]
    address = f"ipc://{tmp_path}/sim.ipc"
    env = dict(os.environ, HILRIG_CHECKED="1")
    sim = subprocess.Popen(CLI + ["serve-sim", "--scenario", str(path), "--bind", address,
                                  "--sessions", "1", "--idle-timeout", "120", "--mode",
                                  "free-running", "--checked"],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                           stdin=subprocess.DEVNULL)
    with reaped(sim):
        wait_listening(sim)
        p = cli("run", path, "--bridge", address, "--mode", "free-running", "--checked",
                "--headless", "--out", tmp_path / "run")
        ok(p, codes=(0, 1))
        sim.communicate(timeout=120)
    s = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert s["ticks_run"] >= 1 and s["mode"] == "free-running"


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_paced(tmp_path, name):
    """A paced run, checked: it ends in order with its timing statistics (whether its timing
    held on this machine is not judged here: exit 0, 1 when it did not complete, 3 when its
    timing limits were not met)."""
    args = (["demo", "--paced"] if name == "demo" else ["run", SCENARIOS[name], "--paced"])
    p = cli(*args, "--checked", "--headless", "--no-view", "--out", tmp_path / "run")
    ok(p, codes=(0, 1, 3))
    s = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert s["paced"]["lateness_us"] and s["ticks_run"] >= 1


@pytest.mark.parametrize("name", sorted(SUITES))
def test_interlock_suite(tmp_path, name):
    p = cli("interlock-test", SUITES[name], "--checked", "--headless", "--out", tmp_path / "suite")
    text = ok(p)
    res = json.loads((tmp_path / "suite" / "results.json").read_text())
    assert res and "0 failed" in text
