"""The outcome of a run (runtime/outcome.py): one verdict per run, judged from its summary.

Each status is judged on the summary of a real run where one is cheap to make (the plugin
combinations the suite compiles anyway: two_stage_lc + cascaded_pi / flatness + profile, and
the first-order test plant with its PI controller). The times and values a verdict names are
checked against the recording, read back with h5py (an independent path: the event log is
kept by the compiled loop, the recording by the writer). Statuses that need a bridge peer or
the paced verdict (another module's field) are judged on a real summary with that part added,
and say so.
"""
import json
import math
from pathlib import Path

import h5py
import numpy as np
import pytest

from hilrig.runtime import run as runmod
from hilrig.runtime.outcome import STATUSES, coverage_text, judge, rank_key
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import parse_scenario
from tests.unit.safety.test_caution import LOW_48V

#: the 48 V-class scenario with its own controller (cascaded PI) detuned, and an i_L1 limit
#: (test data). flatness with its defaults draws just over 23 A at the 24 V -> 28 V step and
#: trips; the safe output (0 V) then lets the 500 W constant-power load collapse the output
#: below v_collapse: a run that ends after about 10.7 of its 40 ms with the smaller IAE. The
#: detuned PI stays under 23 A and completes (with a large overshoot: the larger IAE).
TRIP_48V = LOW_48V.replace('plugin = "cascaded_pi"\n',
                           'plugin = "cascaded_pi"\nKp_v = 1.0\nKi_v = 1500.0\nC_ff = 0.0\n') + """
[[interlocks]]
signal = "i_L1"
above = "23 A"
"""
TS = 50e-6


def _run(text, folder, **overrides):
    return run_scenario(parse_scenario(text, name="outcome.toml", overrides=overrides), folder)


def _recorded(folder):
    with h5py.File(Path(folder) / "recording.h5", "r") as f:
        return f["time"][()], {k: f["signals"][k][()] for k in f["signals"]}


@pytest.fixture(scope="module")
def completed(tmp_path_factory):
    return _run(LOW_48V, tmp_path_factory.mktemp("ok") / "r")


@pytest.fixture(scope="module")
def tripped_then_collapsed(tmp_path_factory):
    return _run(TRIP_48V, tmp_path_factory.mktemp("trip") / "r",
                **{"controller": {"plugin": "flatness"}})


def test_a_clean_run_is_completed_and_summary_json_keeps_the_verdict(completed):
    s = completed.summary
    oc = s["outcome"]
    assert oc["status"] == "completed" and oc["completed"] and oc["whole_run"]
    assert oc["end_time_s"] == oc["planned_s"] == pytest.approx(0.04)
    assert oc["first_cause"] is None and oc["first_cause_time_s"] is None and oc["then"] is None
    assert coverage_text(oc) is None
    on_disk = json.loads((completed.folder / "summary.json").read_text())
    assert on_disk["outcome"] == oc == judge(on_disk)
    # the old keys stay for the code that reads them
    assert s["completed"] is True and s["end_event"] is None


def test_a_trip_then_a_collapse_is_tripped_with_the_collapse_as_then(tripped_then_collapsed):
    s = tripped_then_collapsed.summary
    oc = s["outcome"]
    t, sig = _recorded(tripped_then_collapsed.folder)
    # the first recorded sample beyond the limit is the trip (the limit's own definition)
    k = int(np.argmax(sig["i_L1"] > 23.0))
    assert sig["i_L1"][k] > 23.0 and np.all(sig["i_L1"][:k] <= 23.0)
    assert oc["status"] == "tripped" and not oc["completed"] and not oc["whole_run"]
    assert oc["first_cause_time_s"] == pytest.approx(t[k], abs=1e-12)
    assert oc["first_cause"] == f"interlock i_L1 > 23 A, value {sig['i_L1'][k]:.4g} A"
    # the run ended on its last recorded tick, below v_collapse (5 V in LOW_48V)
    assert oc["end_time_s"] == pytest.approx(t.size * TS) and t.size < 800
    assert sig["v_out"][-1] < 5.0 and np.all(sig["v_out"][:-1] >= 5.0)
    assert oc["then"] == f"voltage collapse (v_out {sig['v_out'][-1]:.4g} V) at {t[-1] * 1e3:.4g} ms"
    assert coverage_text(oc) == f"to {t.size * TS * 1e3:.4g} ms of 40 ms"
    assert oc["text"].startswith(f"tripped at {t[k] * 1e3:.4g} ms: interlock i_L1 > 23 A")
    # the old keys say only the collapse: why the verdict had to be judged apart
    assert s["end_event"] == "voltage collapse"


def test_a_trip_held_to_the_planned_end_is_still_tripped(tmp_path):
    """The reset scenario of the fault tests (first-order test plant, its PI controller): a
    trip at 0.05 s, a refused reset, an accepted one at 0.2 s, then the run goes on to its
    end. It reached its end, but it tripped: not completed."""
    from tests.integration.test_faults import RESET
    from tests.integration.test_protocol_example import CONTROLLER, PLANT
    (tmp_path / "first_order.py").write_text(PLANT)
    (tmp_path / "pi_v.py").write_text(CONTROLLER)
    (tmp_path / "reset.toml").write_text(RESET)
    from hilrig.runtime.scenario import load_scenario
    res = run_scenario(load_scenario(tmp_path / "reset.toml"), tmp_path / "r")
    oc = res.summary["outcome"]
    t, sig = _recorded(res.folder)
    assert res.summary["completed"] is True          # the old key: ran to its end
    assert oc["status"] == "tripped" and not oc["completed"] and oc["whole_run"]
    assert oc["end_time_s"] == pytest.approx(0.3) and t.size * 50e-6 == pytest.approx(0.3)
    k = int(np.argmax(sig["v_out"] > 480.0))         # the measured value with its +500 V offset
    assert oc["first_cause_time_s"] == pytest.approx(t[k]) == pytest.approx(0.05)
    assert oc["first_cause"].startswith("interlock v_out > 480 V, value ")
    assert oc["then"] == "reset at 200 ms"
    assert coverage_text(oc) is None


def test_a_collapse_without_a_trip_is_collapsed(tmp_path):
    """The collapse scenario of the SIL tests: 100 kW at a reference ramped to 150 V needs
    667 A, beyond the PI's 600 A limit, so no operating point holds (P = V I)."""
    from tests.integration.test_sil_run import COLLAPSE
    res = run_scenario(parse_scenario(COLLAPSE), tmp_path / "c")
    oc = res.summary["outcome"]
    t, sig = _recorded(res.folder)
    assert res.summary["trip"] is None
    assert oc["status"] == "collapsed" and not oc["whole_run"]
    assert oc["first_cause_time_s"] == pytest.approx(t[-1]) and oc["then"] is None
    assert oc["first_cause"] == f"voltage collapse (v_out {sig['v_out'][-1]:.4g} V)"
    assert sig["v_out"][-1] < 25.0 <= sig["v_out"][-2]  # the default v_collapse, 25 V
    assert oc["end_time_s"] == pytest.approx(t.size * TS)
    assert oc["planned_s"] == pytest.approx(0.2) and t.size * TS < 0.2


class _StopOnSecondChunk:
    """Stands in for the telemetry publisher: the operator's stop arrives before the second
    chunk (the run's real stop path, runtime/run.py LiveControl, does the rest)."""

    def __init__(self):
        self.calls = 0

    def commands(self):
        self.calls += 1
        return ["stop"] if self.calls == 2 else []


def test_an_operator_stop_is_stopped_not_tripped(tmp_path):
    sc = parse_scenario(LOW_48V, name="stop.toml")
    prep = runmod.prepare(sc)
    fn, _, _ = runmod.compile_loop(sc)
    a = prep.args
    runmod.first_call(sc, lambda: runmod._call(fn, 0, 0, np.zeros((1, len(prep.signals))), a))
    live = runmod.LiveControl(_StopOnSecondChunk(), sc, a)
    res = runmod.execute(sc, prep, tmp_path / "s",
                         live.wrap(lambda k0, n, rec: runmod._call(fn, k0, n, rec, a)),
                         timing={}, chunk_s=0.01)
    s, oc = res.summary, res.summary["outcome"]
    # the stop trips the interlock latch with its own cause (the safe output), then ends
    assert s["trip"]["cause_id"] == "stop requested" and s["end_event"] == "stopped by the operator"
    assert oc["status"] == "stopped" and not oc["whole_run"]
    assert oc["first_cause"] == "stopped by the operator" and oc["then"] is None
    t, _ = _recorded(res.folder)
    # one chunk of 10 ms (200 ticks), then the one tick that applies the safe output
    assert t.size == 201 and oc["end_time_s"] == pytest.approx(201 * TS)


@pytest.mark.parametrize("paced, status", [
    ({"verdict": {"timing_met": False}}, "timing not met"),
    ({"verdict": {"timing_met": True}}, "completed"),
    ({"late_ticks": 3}, "completed"),                   # a paced summary without a verdict
    ({"verdict": {"timing_met": "no"}}, "completed"),   # not a bool: no verdict
    ({"verdict": None}, "completed"),
    (None, "completed"),
])
def test_the_paced_timing_verdict_is_read_defensively(completed, paced, status):
    # the verdict is another module's field (runtime/paced.py): added here to a real summary
    s = dict(completed.summary, paced=paced)
    oc = judge(s)
    assert oc["status"] == status and oc["completed"] == (status == "completed")
    assert oc["whole_run"]


def test_a_trip_is_worse_than_timing_not_met(tripped_then_collapsed):
    s = dict(tripped_then_collapsed.summary, paced={"verdict": {"timing_met": False}})
    oc = judge(s)
    assert oc["status"] == "tripped" and oc["then"].endswith("; timing not met")


@pytest.mark.parametrize("event, extra", [
    ("bridge peer lost", {"detail": "no reply for 2 s"}),
    ("bridge protocol error", {"detail": "bad frame"}),
    ("non-finite plant state", {"time_s": 299 * TS, "v_out_V": math.nan}),
])
def test_another_abnormal_end_is_ended_and_names_its_cause(completed, event, extra):
    # a bridge run's end (its events carry a tick, not a time) on a real summary, cut short
    s = dict(completed.summary, ticks_run=300, simulated_s=300 * TS, completed=False,
             end_event=event, events=[{"event": event, "tick": 299, **extra}])
    oc = judge(s)
    assert oc["status"] == "ended" and not oc["whole_run"]
    assert oc["first_cause"].startswith(event) and oc["first_cause_time_s"] == pytest.approx(299 * TS)
    if "detail" in extra:
        assert oc["first_cause"] == f"{event}: {extra['detail']}"


def test_a_run_short_of_its_end_with_no_cause_is_interrupted(completed):
    s = dict(completed.summary, ticks_run=100, simulated_s=100 * TS, completed=False)
    oc = judge(s)
    assert oc["status"] == "interrupted" and oc["text"] == "interrupted at 5 ms of 40 ms"


def test_every_status_is_one_of_the_documented_ones():
    assert STATUSES == ("completed", "tripped", "collapsed", "stopped", "timing not met",
                        "ended", "interrupted")


def test_a_run_that_did_not_complete_never_ranks_above_one_that_did(completed, tripped_then_collapsed):
    ok, bad = completed.summary["outcome"], tripped_then_collapsed.summary["outcome"]
    assert rank_key(ok, 1e3) < rank_key(bad, 1e-9)
    assert rank_key(ok, math.nan) < rank_key(bad, 0.0)
    assert rank_key(ok, 1.0) < rank_key(ok, 2.0) < rank_key(ok, math.nan)
    # among runs that did not complete: one that held its safe output to the end first,
    # then the one that ran longer
    held = dict(bad, whole_run=True, end_time_s=bad["planned_s"])
    shorter = dict(bad, end_time_s=bad["end_time_s"] / 2)
    assert rank_key(held, 1.0) < rank_key(bad, 0.1) < rank_key(shorter, 0.01)
