"""Conditional faults, forced overruns and the derived-signal interlocks in SIL runs of the demo
scenario (demo data), cut to 0.35 s so that the 20 -> 80 kW load ramp at 0.3 s is included.

Expected ticks are found independently of the fault machinery: from a run of the same scenario
without the fault (same seed: a SIL run is bit-identical up to the tick where the fault first
acts), or from the recording of the run itself (rows before the trip).
"""
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import parse_scenario
from hilrig.safety.interlocks import BIT_LATCHED, BIT_WATCHDOG

DURATION = "0.35 s"


def _demo(demo_path, extra: str = "") -> str:
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', f'duration = "{DURATION}"')
    assert f'duration = "{DURATION}"' in text
    return text + "\n" + extra


def _run(folder, text):
    sc = parse_scenario(text, name="conditional.toml")
    res = run_scenario(sc, folder)
    return sc, res.summary, open_run(res.folder)


def _same_rows(a, b, n):
    """Every recorded signal of runs a and b bit-identical on rows 0 .. n-1 (a's true value of a
    faulted sensor, ``true_<name>``, against b's unfaulted ``<name>``)."""
    extra = set(a.signals) - set(b.signals)
    assert set(b.signals) <= set(a.signals)
    assert all(x.startswith("true_") and x[5:] in b.signals for x in extra), extra
    for name in a.signals:
        other = name[5:] if name in extra else name
        assert a.signals[name][:n].tobytes() == b.signals[other][:n].tobytes(), name


def _word(run):
    return run.signals["interlock_word"].astype(np.int64)


@pytest.fixture(scope="module")
def base(tmp_path_factory, demo_path):
    """The demo without faults: the reference every test compares with."""
    sc, s, run = _run(tmp_path_factory.mktemp("base") / "r", _demo(demo_path))
    assert s["trip"] is None and s["completed"] and s["faults"] == []
    return sc, s, run


@pytest.fixture
def folder(tmp_path):
    return tmp_path / "r"


def _first_above(x, threshold):
    k = int(np.argmax(x > threshold))
    assert x[k] > threshold and np.all(x[:k] <= threshold)
    return k


# --- conditional sensor fault --------------------------------------------------------------

WHEN_I_OUT = 'when = { signal = "i_out", above = "100 A" }'


def test_conditional_offset_starts_on_the_first_tick_true_i_out_exceeds_the_threshold(base, folder, demo_path):
    _, _, b = base
    # without sensor faults the recorded i_out is the true one; the ramp passes 100 A after 0.3 s
    k = _first_above(b.signals["i_out"], 100.0)
    assert b.time[k] > 0.3
    # a +100 V offset on the measured v_out pushes it beyond the demo's 480 V limit at once
    sc, s, run = _run(folder, _demo(demo_path, f'[[faults]]\nkind = "offset"\nsignal = "v_out"\n'
                                               f'value = "100 V"\n{WHEN_I_OUT}\n'))
    _same_rows(run, b, k)                       # nothing happened before the condition held
    v_meas = run.signals["v_out"]
    assert v_meas[k] == b.signals["v_out"][k] + 100.0   # same plant state on tick k, plus offset
    trip = s["trip"]
    assert trip["tick"] == k and trip["cause_id"] == "v_out above"
    assert trip["value"] == v_meas[k]
    assert run.signals["u"][k] == 0.0 and run.signals["u"][k - 1] != 0.0
    assert s["faults"] == [{"kind": "offset", "signal": "v_out", "when": "i_out above 100",
                            "active_from_s": b.time[k], "active_to_s": None}]


def test_conditional_offset_lasts_for_its_duration(base, folder, demo_path):
    _, _, b = base
    k = _first_above(b.signals["i_out"], 100.0)
    sc, s, run = _run(folder, _demo(demo_path, f'[[faults]]\nkind = "offset"\nsignal = "v_out"\n'
                                               f'value = "5 V"\nduration = "10 ms"\n{WHEN_I_OUT}\n'))
    assert s["trip"] is None
    t0 = b.time[k]
    dur = sc.faults[0].duration
    assert dur == pytest.approx(0.01, rel=1e-12)
    assert s["faults"][0]["active_from_s"] == t0 and s["faults"][0]["active_to_s"] == t0 + dur
    # the true v_out from the constant-power load: i_out = P / v_true (physics of the load; the
    # demo has no resistive or current part before 1 s)
    assert np.all(run.signals["G_load"] == 0.0) and np.all(run.signals["I_load"] == 0.0)
    v_true = run.signals["P_load"] / run.signals["i_out"]
    seen = run.signals["v_out"] - v_true
    window = (run.time >= t0) & (run.time < t0 + dur)     # active from its trigger, end excluded
    assert window.sum() == pytest.approx(dur / 50e-6, abs=1)
    assert np.allclose(seen[window], 5.0, atol=1e-6)
    assert np.allclose(seen[~window], 0.0, atol=1e-6)


def test_conditional_fault_is_watched_only_from_its_start(base, folder, demo_path):
    _, _, b = base
    # i_out is about 50 A from the first tick: "above 10 A" holds at once, so the fault starts on
    # the first tick at or after the watched-from time
    sc, s, run = _run(folder, _demo(demo_path, '[[faults]]\nkind = "offset"\nsignal = "v_out"\n'
                                               'value = "5 V"\nstart = "0.1 s"\n'
                                               'when = { signal = "i_out", above = "10 A" }\n'))
    assert np.all(b.signals["i_out"] > 10.0)
    k = int(np.searchsorted(b.time, 0.1))
    assert b.time[k] >= 0.1 and b.time[k - 1] < 0.1
    assert s["faults"][0]["active_from_s"] == b.time[k]
    _same_rows(run, b, k)
    assert run.signals["v_out"][k] == b.signals["v_out"][k] + 5.0


def test_a_condition_that_never_holds_changes_nothing(base, folder, demo_path):
    _, _, b = base
    assert b.signals["i_out"].min() > 10.0
    _, s, run = _run(folder, _demo(demo_path, '[[faults]]\nkind = "dropout"\nsignal = "v_out"\n'
                                              'when = { signal = "i_out", below = "10 A" }\n'))
    assert s["trip"] is None and s["completed"]
    assert s["faults"][0]["active_from_s"] is None and s["faults"][0]["active_to_s"] is None
    _same_rows(run, b, len(b.time))


# --- forced overrun ------------------------------------------------------------------------

def _overrun(budget, ticks, value):
    return (f'[watchdogs]\noverrun_budget = "{budget}"\noverrun_ticks = {ticks}\n'
            f'[[faults]]\nkind = "overrun"\nstart = "0.1 s"\nvalue = "{value}"\n')


@pytest.mark.parametrize("ticks", [1, 3])
def test_forced_overrun_trips_the_watchdog_on_the_next_tick_after_its_debounce(base, folder, demo_path, ticks):
    _, _, b = base
    k0 = int(np.searchsorted(b.time, 0.1))    # the fault's first tick
    _, s, run = _run(folder, _demo(demo_path, _overrun("100 us", ticks, "150 us")))
    # the overrun of tick k is known on tick k+1; with a debounce of n ticks it trips on k0 + n
    # (overrun_ticks = 3 trips 2 ticks after overrun_ticks = 1)
    k_trip = k0 + ticks
    trip = s["trip"]
    assert trip["tick"] == k_trip and trip["cause_id"] == "watchdog overrun"
    assert trip["cause"] == "watchdog overrun"
    assert trip["value"] == pytest.approx(150e-6, rel=1e-12)
    word, u = _word(run), run.signals["u"]
    over = (word >> BIT_WATCHDOG) & 1
    assert not over[:k0 + 1].any() and over[k0 + 1:k_trip + 1].all()
    latched = (word >> BIT_LATCHED) & 1
    assert not latched[:k_trip].any() and latched[k_trip]
    assert u[k_trip] == 0.0 and u[k_trip - 1] != 0.0
    # the fault itself changes nothing but the watchdog: every other signal equals the run
    # without it up to the trip
    for name in run.signals:
        if name != "interlock_word":
            assert run.signals[name][:k_trip].tobytes() == b.signals[name][:k_trip].tobytes(), name


@pytest.mark.parametrize("value", ["100 us", "60 us"], ids=["at budget", "below budget"])
def test_forced_overrun_within_the_budget_never_trips(base, folder, demo_path, value):
    _, _, b = base
    _, s, run = _run(folder, _demo(demo_path, _overrun("100 us", 1, value)))
    assert s["trip"] is None and s["completed"]
    assert not ((_word(run) >> BIT_WATCHDOG) & 1).any()
    _same_rows(run, b, len(b.time))


# --- derived-signal interlocks -------------------------------------------------------------

def test_dv_out_dt_magnitude_trips_on_the_tick_an_offset_step_is_applied(base, folder, demo_path):
    _, _, b = base
    ts = 50e-6                        # demo data: Ts of the demo scenario
    limit = 100e3                     # 100 kV/s
    offset = -10.0                    # -10 V in one tick: -200 kV/s, beyond the limit
    assert abs(offset) / ts > limit
    # without the step the measured rate stays well inside the limit (numpy.diff as reference)
    assert np.abs(np.diff(b.signals["v_out"]) / ts).max() < limit / 2
    _, s, run = _run(folder, _demo(demo_path,
                                   f'[[interlocks]]\nsignal = "dv_out_dt"\nmagnitude_above = "100 kV/s"\n'
                                   f'[[faults]]\nkind = "offset"\nsignal = "v_out"\nstart = "0.1 s"\n'
                                   f'value = "{offset} V"\n'))
    k0 = int(np.searchsorted(b.time, 0.1))
    v = run.signals["v_out"]
    trip = s["trip"]
    assert trip["tick"] == k0 and trip["cause_id"] == "dv_out_dt magnitude_above"
    # the tripping value is the backward difference of the recorded measurement
    assert trip["value"] == pytest.approx(np.diff(v[k0 - 1:k0 + 1])[0] / ts, rel=1e-12)
    assert trip["value"] == pytest.approx(offset / ts, rel=0.05)
    u = run.signals["u"]
    assert u[k0] == 0.0 and u[k0 - 1] != 0.0


def test_p_out_above_trips_on_the_first_tick_recorded_power_exceeds_the_limit(base, folder, demo_path):
    limit = 60e3                      # demo data: 60 kW, passed on the 20 -> 80 kW ramp
    _, s, run = _run(folder, _demo(demo_path,
                                   '[[interlocks]]\nsignal = "p_out"\nabove = "60 kW"\n'))
    # electrical power P = V I (handbook formula) from the recorded measurements
    p = run.signals["v_out"] * run.signals["i_out"]
    trip = s["trip"]
    assert trip is not None and trip["cause_id"] == "p_out above"
    k = trip["tick"]
    assert np.all(p[:k] <= limit) and p[k] > limit
    assert trip["value"] == p[k]
    assert run.time[k] > 0.3
    assert run.signals["u"][k] == 0.0 and run.signals["u"][k - 1] != 0.0
