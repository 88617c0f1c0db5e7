"""Paced mode: the same compiled tick as SIL, started on the wall clock. Checked here: the
recording of every loop signal is bit-identical to the SIL run of the same scenario (the
clock decides only *when* a tick runs, never what it computes), a run takes at least its
simulated time on the wall clock, each tick's lateness and compute time are recorded, a forced
overrun is spent for real and trips the overrun watchdog on the next tick, and the Python
fallback path (for machines without a usable cycle counter) behaves the same. Timing figures
are not asserted (the machine is shared): bench/pacing.py measures them."""
import dataclasses
import time

import numpy as np
import pytest

from hilrig.runtime import clock
from hilrig.runtime.paced import run_paced
from hilrig.runtime.recording import dumps_json, open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

DURATION = 0.25


def _sc(demo_path, extra=None, **over):
    sc = load_scenario(demo_path, overrides={"timing.duration": DURATION, **(extra or {})})
    return dataclasses.replace(sc, **over) if over else sc


@pytest.fixture(scope="module")
def sil(demo_path, tmp_path_factory):
    res = run_scenario(_sc(demo_path), tmp_path_factory.mktemp("sil") / "r")
    return res.summary, open_run(res.folder)


@pytest.fixture(scope="module")
def paced(demo_path, tmp_path_factory):
    t = time.perf_counter()
    res = run_paced(_sc(demo_path), tmp_path_factory.mktemp("paced") / "r")
    return res.summary, open_run(res.folder), time.perf_counter() - t


def test_paced_recording_equals_sil_bit_for_bit(sil, paced):
    (_, s_run), (p_sum, p_run, _) = sil, paced
    assert p_sum["completed"] and p_sum["mode"] == "paced"
    assert np.array_equal(p_run.time, s_run.time)
    for name, v in s_run.signals.items():
        assert np.array_equal(p_run.signals[name], v), name
    assert p_run.attrs["mode"] == "paced" and p_run.attrs["complete"]


def test_paced_metrics_match_sil(sil, paced):
    (s_sum, _), (p_sum, _, _) = sil, paced
    for k, v in s_sum["metrics"].items():
        assert p_sum["metrics"][k] == pytest.approx(v, rel=1e-12, abs=1e-15), k
    assert dumps_json(p_sum["segments"]) == dumps_json(s_sum["segments"])  # NaN != NaN


def test_paced_run_keeps_the_wall_clock_and_records_timing(paced):
    p_sum, p_run, wall = paced
    n = p_run.time.shape[0]
    # the last tick cannot start before its deadline: the run lasts at least (n - 1) Ts
    assert wall >= (n - 1) * 50e-6
    late, comp = p_run.signals["tick_lateness"], p_run.signals["tick_compute"]
    assert late.shape == comp.shape == (n,)
    assert np.all(late >= 0.0) and np.all(comp > 0.0)
    pc = p_sum["paced"]
    assert pc["lateness_us"]["n"] == n and pc["compute_us"]["n"] == n
    # the summary's statistics are those of the recorded columns (0.5 us histogram bins)
    assert pc["lateness_us"]["max"] == pytest.approx(late.max() * 1e6, rel=1e-9)
    assert pc["late_ticks"] == int((late > 50e-6).sum())
    assert pc["wait"] == ("compiled, cycle counter" if clock.supported() else "Python, sleep then spin")


def test_forced_overrun_is_spent_and_trips_the_overrun_watchdog(demo_path, tmp_path):
    # 25 ms of forced compute on one tick against a 15 ms budget (far above the scheduling
    # noise of a shared machine, a few ms at worst): the tick really takes that long, and the
    # overrun (known when the tick is over) trips on the next tick
    sc = load_scenario(demo_path, overrides={
        "timing.duration": 0.12, "watchdogs": {"overrun_budget": "15 ms"},
        "faults": [{"kind": "overrun", "value": "25 ms", "start": "0.1 s", "end": "0.10005 s"}]})
    res = run_paced(sc, tmp_path / "r")
    run = open_run(res.folder)
    k = 2000
    assert res.summary["trip"] is not None, res.summary["events"]
    assert run.signals["tick_compute"][k] >= 25e-3
    assert res.summary["trip"]["cause_id"] == "watchdog overrun"
    assert res.summary["trip"]["tick"] == k + 1
    assert run.signals["u"][k + 1] == 0.0 and run.signals["u"][k] > 0.0
    assert res.summary["paced"]["overruns"] >= 1


def test_python_fallback_path_gives_the_same_recording(sil, demo_path, tmp_path, monkeypatch):
    monkeypatch.setattr(clock, "supported", lambda: False)
    res = run_paced(_sc(demo_path), tmp_path / "r")
    assert res.summary["paced"]["wait"] == "Python, sleep then spin"
    run = open_run(res.folder)
    for name, v in sil[1].signals.items():
        assert np.array_equal(run.signals[name], v), name
    assert np.all(run.signals["tick_lateness"] >= 0.0)
