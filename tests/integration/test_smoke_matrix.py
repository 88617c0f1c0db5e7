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
the checked build of each plugin combination compiles once per test session. Compiling
dominates and each cell is a process of its own, so the cells run two at a time (the CI machine
has two cores), all of them in one module fixture before the tests look at their results; a
cell that fails to run is reported by its own test. The interlock suites run last, alone.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import traceback
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from hilrig.runtime.recording import open_run
from tests import locks
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


def _scenario_file(name: str, base: Path) -> Path:
    """The scenario as a file: the demo's is the one the demo command writes into its folder."""
    return base / "demo" / "scenario.toml" if name == "demo" else SCENARIOS[name]


def _run(name, base):
    out = base / name
    p = (cli("demo", "--checked", "--headless", "--out", out) if name == "demo"
         else cli("run", SCENARIOS[name], "--checked", "--headless", "--out", out))
    # the same run without bounds checks, to compare (determinism is a documented property)
    env = {k: v for k, v in os.environ.items()
           if k not in ("HILRIG_CHECKED", "NUMBA_BOUNDSCHECK", "NUMBA_CACHE_DIR")}
    plain = base / (name + "-plain")
    args = (["demo"] if name == "demo" else ["run", str(SCENARIOS[name])])
    q = subprocess.run(CLI + args + ["--headless", "--out", str(plain)], capture_output=True,
                       text=True, timeout=900, env=env, stdin=subprocess.DEVNULL)
    # report and exports of the checked run's folder
    r = cli("report", out)
    csv_ = cli("export", out, "--csv")
    try:
        import asammdf  # noqa: F401
        mf4 = cli("export", out, "--mf4")
    except ImportError:
        mf4 = None
    return dict(out=out, p=p, plain=plain, q=q, report=r, csv=csv_, mf4=mf4)


def _compare(name, base):
    out = base / f"cmp-{name}"
    return dict(out=out, p=cli("compare", SCENARIOS[name], "--controllers", CONTROLLERS,
                               "--checked", "--json", "--out", out))


def _envelope(name, base):
    out = base / f"env-{name}"
    return dict(out=out, p=cli("envelope", SCENARIOS[name], "--controllers", CONTROLLERS,
                               "--grid", "2x2", "--v-range", "300:450", "--p-range", "0:40e3",
                               "--checked", "--json", "--out", out))


def _analyze(name, base):
    out = base / f"analyze-{name}"
    return dict(out=out, p=cli("analyze", SCENARIOS[name], "--controllers", CONTROLLERS,
                               "--headless", "--out", out))


def _tune(name, base):
    out = base / f"tune-{name}"
    return dict(out=out, p=cli("tune", SCENARIOS[name], "--grid", "2x2", "--starts", "1",
                               "--workers", "1", "--no-confirm", "--headless", "--out", out))


def _bridge(name, base, mode):
    path = _scenario_file(name, base)
    folder = base / f"bridge-{mode}-{name}"
    folder.mkdir()
    address = f"ipc://{folder}/sim.ipc"
    env = dict(os.environ, HILRIG_CHECKED="1")
    sim = subprocess.Popen(CLI + ["serve-sim", "--scenario", str(path), "--bind", address,
                                  "--sessions", "1", "--idle-timeout", "120", "--mode", mode,
                                  "--checked"],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                           stdin=subprocess.DEVNULL)
    with reaped(sim):
        wait_listening(sim)
        p = cli("run", path, "--bridge", address, "--mode", mode, "--checked", "--headless",
                "--out", folder / "run")
        sim_out, sim_err = sim.communicate(timeout=120)
    return dict(out=folder / "run", p=p, sim_rc=sim.returncode, sim_err=sim_err)


def _paced(name, base):
    out = base / f"paced-{name}"
    args = (["demo", "--paced"] if name == "demo" else ["run", SCENARIOS[name], "--paced"])
    return dict(out=out, p=cli(*args, "--checked", "--headless", "--no-view", "--out", out))


def _suite(name, base):
    out = base / f"suite-{name}"
    return dict(out=out, p=cli("interlock-test", SUITES[name], "--checked", "--headless",
                               "--out", out))


@pytest.fixture(scope="module")
def matrix(tmp_path_factory):
    """Every cell, run two at a time; {(command, name): result dict or the error text}."""
    base = tmp_path_factory.mktemp("smoke")
    # the SIL runs first: the demo's run writes the scenario file its bridge cells serve
    jobs = [(("run", n), _run, (n, base)) for n in SCENARIOS]
    later = []
    for n in SCENARIOS:
        later += [(("compare", n), _compare, (n, base)), (("envelope", n), _envelope, (n, base)),
                  (("analyze", n), _analyze, (n, base)), (("tune", n), _tune, (n, base)),
                  (("lockstep", n), _bridge, (n, base, "lockstep")),
                  (("free-running", n), _bridge, (n, base, "free-running")),
                  (("paced", n), _paced, (n, base))]
    # the suites last and alone: some of their cases judge timing (a watchdog's deadline), which
    # a compile running beside them could disturb
    alone = [(("interlock-test", n), _suite, (n, base)) for n in SUITES]

    def guarded(fn, args):
        try:
            return fn(*args)
        except Exception:  # reported by the cell's own test
            return traceback.format_exc()

    results = {}
    with ThreadPoolExecutor(max_workers=2) as pool:
        first = {key: pool.submit(guarded, fn, args) for key, fn, args in jobs}
        results.update({key: f.result() for key, f in first.items()})
        rest = {key: pool.submit(guarded, fn, args) for key, fn, args in later}
        results.update({key: f.result() for key, f in rest.items()})
    # and alone across test processes too (tests/locks.py)
    with locks.exclusive():
        for key, fn, args in alone:
            results[key] = guarded(fn, args)
    return results


def cell(matrix, command, name) -> dict:
    got = matrix[(command, name)]
    assert isinstance(got, dict), f"{command} on {name} failed to run:\n{got}"
    return got


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_analyze(matrix, name):
    """The operating-point analysis of every candidate at the scenario's start, its kernels
    under bounds checks: each candidate is analysed (or said to have no steady state, exit 1),
    with its figures and table written."""
    c = cell(matrix, "analyze", name)
    text = ok(c["p"], codes=(0, 1))
    data = json.loads((c["out"] / "analysis.json").read_text())
    assert set(data["controllers"]) | set(data["no_steady_state"]) == set(CONTROLLERS.split(","))
    for ctrl, s in data["controllers"].items():
        assert s["largest_pole_abs"] > 0.0 and s["poles"], ctrl
        assert f"{ctrl}: " in text
    assert (c["out"] / "analysis.png").stat().st_size > 10_000


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_tune(matrix, name):
    """Tuning the scenario's controller over its design range (analysis only here): the tuned
    set is stable at the grid's points, or no worse than the scenario's own (a tuned set may
    trade |z| for margins, never stability), and the snippet is TOML."""
    c = cell(matrix, "tune", name)
    text = ok(c["p"])
    data = json.loads((c["out"] / "tune.json").read_text())
    w = data["worst_pole_abs"]
    assert w["tuned"] < 1.0 or w["tuned"] <= w["before"] + 1e-9, w
    snip = tomllib.loads((c["out"] / "tuned.toml").read_text())
    assert set(data["tuned"]) <= set(snip["controller"])
    assert "tuned set for the scenario" in text


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_run(matrix, name):
    c = cell(matrix, "run", name)
    out = c["out"]
    text = ok(c["p"])
    s = json.loads((out / "summary.json").read_text())
    assert s["ticks_run"] >= 1 and (out / "recording.h5").is_file()
    assert "outcome" in text
    # the checked build records the same bits as the normal one
    ok(c["q"])
    a, b = open_run(out), open_run(c["plain"])
    assert a.signals.keys() == b.signals.keys()
    for key in a.signals:
        np.testing.assert_array_equal(a.signals[key], b.signals[key], err_msg=key)


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_report_and_exports(matrix, name):
    c = cell(matrix, "run", name)
    out = c["out"]
    ok(c["report"])
    assert (out / "report.md").is_file()
    ok(c["csv"])
    with open(out / "recording.csv") as fh:
        n = sum(1 for _ in fh) - 1
    assert n == json.loads((out / "summary.json").read_text())["ticks_run"]
    if c["mf4"] is None:
        pytest.skip("asammdf is not installed")
    ok(c["mf4"])
    assert (out / "recording.mf4").stat().st_size > 0


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_compare(matrix, name):
    c = cell(matrix, "compare", name)
    p = c["p"]
    ok(p)
    got = json.loads(p.stdout[p.stdout.index("{"):])
    assert set(got) == set(CONTROLLERS.split(","))
    # outcome-aware ranks: 1..3, and no candidate that did not complete above one that did
    ranked = sorted(got.values(), key=lambda r: r["rank"])
    assert [r["rank"] for r in ranked] == [1, 2, 3]
    done = [r["outcome"]["completed"] for r in ranked]
    assert done == sorted(done, reverse=True), ranked
    assert (c["out"] / "comparison.json").is_file()


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_envelope(matrix, name):
    c = cell(matrix, "envelope", name)
    p = c["p"]
    ok(p)
    got = json.loads(p.stdout[p.stdout.index("{"):])
    assert set(got) == set(CONTROLLERS.split(","))
    for per in got.values():
        assert sum(per["outcomes"].values()) == 4
    assert (c["out"] / "envelope.csv").is_file()


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_bridge_lockstep_equals_sil(matrix, name):
    """serve-sim and a lockstep run, both checked: the recording equals the SIL run's bit for
    bit (lockstep is deterministic co-simulation of the same compiled stages)."""
    c = cell(matrix, "lockstep", name)
    ok(c["p"])
    assert c["sim_rc"] == 0, c["sim_err"]
    a, b = open_run(c["out"]), open_run(cell(matrix, "run", name)["out"])
    np.testing.assert_array_equal(a.signals["v_out"], b.signals["v_out"])
    np.testing.assert_array_equal(a.signals["u"], b.signals["u"])


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_bridge_free_running(matrix, name):
    """serve-sim in free-running mode and a free-running run, both checked: the run ends in
    order with its recording and summary (its timing, and so its outcome, depends on the
    machine: exit 0, or 1 when a watchdog ended it)."""
    c = cell(matrix, "free-running", name)
    ok(c["p"], codes=(0, 1))
    s = json.loads((c["out"] / "summary.json").read_text())
    assert s["ticks_run"] >= 1 and s["mode"] == "free-running"


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_paced(matrix, name):
    """A paced run, checked: it ends in order with its timing statistics (whether its timing
    held on this machine is not judged here: exit 0, 1 when it did not complete, 3 when its
    timing limits were not met)."""
    c = cell(matrix, "paced", name)
    ok(c["p"], codes=(0, 1, 3))
    s = json.loads((c["out"] / "summary.json").read_text())
    assert s["paced"]["lateness_us"] and s["ticks_run"] >= 1


@pytest.mark.parametrize("name", sorted(SUITES))
def test_interlock_suite(matrix, name):
    c = cell(matrix, "interlock-test", name)
    text = ok(c["p"])
    res = json.loads((c["out"] / "results.json").read_text())
    assert res and "0 failed" in text
