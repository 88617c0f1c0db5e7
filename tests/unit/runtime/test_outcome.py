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
# the trial was set up on the declared numbers and the fixed reference shaping
[design]
defaults = "declared"
[shaping]
pole = "7500 rad/s"
slew_rate = "200 kV/s"
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
    from tests.integration.test_protocol_example import with_shared_plugins
    (tmp_path / "reset.toml").write_text(with_shared_plugins(RESET))
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
    # the verdict is another module's field (runtime/live/paced.py): added here to a real summary
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
    assert STATUSES == ("completed", "tripped", "integration error", "collapsed", "stopped",
                        "timing not met", "ended", "interrupted", "out of band", "oscillating")


INTEG = {"event": "plant integration error", "tick": 299, "time_s": 299 * TS,
         "detail": "tick 299 (t = 14.95 ms): v_out not finite"}


@pytest.mark.parametrize("event, extra", [
    ("plant integration error", {"time_s": 299 * TS, "detail": INTEG["detail"]}),
    # a summary written before the event was renamed
    ("non-finite plant state", {"time_s": 299 * TS, "v_out_V": math.nan}),
])
def test_a_plant_integration_error_is_its_own_status(completed, event, extra):
    s = dict(completed.summary, ticks_run=300, simulated_s=300 * TS, completed=False,
             end_event=event, events=[{"event": event, "tick": 299, **extra}])
    oc = judge(s)
    assert oc["status"] == "integration error" and not oc["completed"] and not oc["whole_run"]
    assert oc["first_cause_time_s"] == pytest.approx(299 * TS)
    assert oc["first_cause"].startswith(event)
    if "detail" in extra:
        assert oc["first_cause"] == f"{event}: {extra['detail']}"
        assert oc["text"] == f"integration error at 14.95 ms: {event}: {extra['detail']}"


def test_a_trip_before_an_integration_error_keeps_tripped(completed):
    trip = {"event": "trip", "tick": 100, "time_s": 100 * TS, "cause": "interlock v_out > 36 V",
            "cause_id": "v_out_high", "value": 37.0}
    s = dict(completed.summary, ticks_run=300, simulated_s=300 * TS, completed=False,
             end_event=INTEG["event"], events=[trip, dict(INTEG)])
    oc = judge(s)
    assert oc["status"] == "tripped" and oc["first_cause_time_s"] == pytest.approx(100 * TS)
    assert oc["then"] == f"plant integration error: {INTEG['detail']} at 14.95 ms"
    # a trip on the integration error's own tick read the diverged state: not a cause
    same = dict(trip, tick=299, time_s=299 * TS, value=1e87)
    oc = judge(dict(s, events=[same, dict(INTEG)]))
    assert oc["status"] == "integration error"
    assert oc["then"] == "tripped on the same tick: interlock v_out > 36 V, value 1e+87 V at 14.95 ms"


def _band(kind):
    tr = {"band_rel": 0.05, "band_floor_V": 0.5, "windows": [[0.02, 0.04]],
          "out_of_band": False, "out_of_band_run": None, "oscillating": False, "oscillation": None}
    if kind in ("out", "both"):
        tr["out_of_band"] = True
        tr["out_of_band_run"] = {"from_s": 0.025, "duration_s": 0.004, "max_error_V": 3.0,
                                 "band_V": 1.4}
    if kind in ("osc", "both"):
        tr["oscillating"] = True
        tr["oscillation"] = {"from_s": 0.02, "to_s": 0.04, "swings": 8.5, "mean_V": 21.0,
                             "peak_to_peak_V": 28.9, "band_V": 1.4}
    return tr


@pytest.mark.parametrize("kind, status", [("out", "out of band"), ("osc", "oscillating"),
                                          ("both", "oscillating"), ("none", "completed")])
def test_band_verdicts_of_a_run_that_reached_its_end(completed, kind, status):
    oc = judge(dict(completed.summary, tracking=_band(kind)))
    assert oc["status"] == status and oc["completed"] == (status == "completed")
    assert oc["whole_run"]
    if status == "out of band":
        assert oc["first_cause_time_s"] == 0.025
        assert oc["text"] == ("out of band at 25 ms: |v_ref_raw - v_out| outside the tracking "
                              "band for 4 ms from 25 ms (up to 3 V, band 1.4 V)")
    if status == "oscillating":
        assert oc["first_cause_time_s"] == 0.02
        assert oc["text"] == ("oscillating at 20 ms: v_out oscillates: 8.5 full swings across "
                              "21 V from 20 ms to 40 ms (peak to peak 28.9 V, band 1.4 V)")


def test_band_verdicts_come_after_trips_and_ends_and_before_timing(completed, tripped_then_collapsed):
    # a trip, a collapse or an integration error names the run, whatever its band did
    oc = judge(dict(tripped_then_collapsed.summary, tracking=_band("osc")))
    assert oc["status"] == "tripped"
    s = dict(completed.summary, ticks_run=300, simulated_s=300 * TS, completed=False,
             end_event=INTEG["event"], events=[dict(INTEG)], tracking=_band("out"))
    assert judge(s)["status"] == "integration error"
    # a paced run that left its band: the band names it, timing not met follows
    oc = judge(dict(completed.summary, tracking=_band("out"),
                    paced={"verdict": {"timing_met": False}}))
    assert oc["status"] == "out of band" and oc["then"] == "timing not met"


def test_an_old_or_odd_tracking_key_is_read_defensively(completed):
    # only a bool True is a verdict; a summary without the key (older versions) is not judged
    # on its band; a verdict without its details still names the status
    for tracking, want in ((None, "completed"), ("inside", "completed"),
                           ({"oscillating": "yes"}, "completed"), ({"out_of_band": 1}, "completed"),
                           ({"oscillating": True, "oscillation": "?"}, "oscillating"),
                           ({"out_of_band": True}, "out of band")):
        oc = judge(dict(completed.summary, tracking=tracking))
        assert oc["status"] == want, tracking
    assert judge(dict(completed.summary, tracking={"out_of_band": True}))["text"] == \
        "out of band: |v_ref_raw - v_out| outside the tracking band"
    old = {k: v for k, v in completed.summary.items() if k != "tracking"}
    assert judge(old)["status"] == "completed"


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


def test_out_of_band_and_oscillating_rank_after_completed_and_before_tripped(completed,
                                                                            tripped_then_collapsed):
    ok = completed.summary["outcome"]
    out = judge(dict(completed.summary, tracking=_band("out")))
    osc = judge(dict(completed.summary, tracking=_band("osc")))
    held = dict(tripped_then_collapsed.summary["outcome"], whole_run=True,
                end_time_s=ok["planned_s"])
    assert rank_key(ok, 1e3) < rank_key(out, 1e-9) < rank_key(held, 1e-12)
    assert rank_key(ok, 1e3) < rank_key(osc, 1e-9) < rank_key(held, 1e-12)
    assert rank_key(osc, 1.0) < rank_key(out, 2.0)      # same class: by the metric
