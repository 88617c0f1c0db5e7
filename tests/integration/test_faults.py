"""Scheduled fault injection in SIL: sensor, load and controller faults, and the interlocks'
response to them (trip on the first tick beyond the limit, safe output on that same tick)."""
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import parse_scenario


def _demo(demo_path, faults: str, duration="0.3 s"):
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', f'duration = "{duration}"')
    return text + "\n" + faults


def _run(tmp_path, text, name="r"):
    res = run_scenario(parse_scenario(text, name="faults.toml"), tmp_path / name)
    return res.summary, open_run(res.folder)


def test_output_short_circuit_trips_over_current_on_the_first_tick_beyond_the_limit(tmp_path, demo_path):
    # a bolted 10 mohm short across C2 = 680 uF (tau = 6.8 us): the default 4 substeps of
    # 12.5 us, refined by the stiffness-aware integration where the short makes them too long
    text = _demo(demo_path, '[[faults]]\nkind = "short_circuit"\nstart = "0.2 s"\nvalue = "10 mohm"\n')
    assert "substeps = 4 " in text
    s, run = _run(tmp_path, text)
    assert s["integration"]["refined_steps"] > 0 and s["integration"]["first_refined_tick"] == 4000
    trip = s["trip"]
    # the short shows first in the measured load current, on the tick it happens
    assert trip is not None and trip["cause"] == "interlock i_out > 500 A", s["events"]
    i_out, u, t = run.signals["i_out"], run.signals["u"], run.time
    first = int(np.argmax(i_out > 500.0))
    assert i_out[first] > 500.0 and np.all(i_out[:first] <= 500.0)
    assert trip["tick"] == first                    # not a tick later, not a tick earlier
    assert t[first] == pytest.approx(0.2)           # the fault's own tick
    assert u[first] == 0.0 and u[first - 1] > 0.0   # the safe output on the trip tick itself
    assert np.all(u[first:] == 0.0)                 # and held (latched) to the end
    # the load really changed at 0.2 s: the output current jumps to about v / 10 mohm
    assert i_out[first] == pytest.approx(run.signals["v_out"][first] / 0.01, rel=0.01)
    # and the output collapses (the run ends on it): a short pulls v_out down, never up
    assert s["end_event"] == "voltage collapse"
    assert np.all(np.diff(run.signals["v_out"][first:]) < 0)


def test_too_few_fixed_substeps_for_a_short_circuit_are_refused(demo_path):
    # with fixed sub-steps (no refinement) a short's time constant needs substeps <= tau / 2
    text = _demo(demo_path, '[[faults]]\nkind = "short_circuit"\nstart = "0.2 s"\nvalue = "10 mohm"\n')
    fixed = text.replace("substeps = 4 ", 'substeps = 4\nintegration = "fixed" ')
    with pytest.raises(ScenarioError, match="substeps to at least 15"):
        parse_scenario(fixed, name="faults.toml")
    parse_scenario(text, name="faults.toml")  # adaptive (the default): accepted


def test_sensor_dropout_trips_on_its_tick_and_offset_shifts_the_true_voltage(tmp_path, demo_path):
    s, run = _run(tmp_path, _demo(demo_path, '[[faults]]\nkind = "dropout"\nsignal = "v_C1"\nstart = "0.1 s"\n'), "drop")
    k = int(np.searchsorted(run.time, 0.1 - 1e-12))
    assert np.isnan(run.signals["v_C1"][k]) and np.all(np.isfinite(run.signals["v_C1"][:k]))
    assert s["trip"]["tick"] == k and s["trip"]["cause"] == "non-finite value of v_C1"
    assert run.signals["u"][k] == 0.0
    # a +5 V offset on the measured v_out: the controller holds the *measured* value on the
    # reference, so the true output sits 5 V low; the constant-power load shows it, since
    # its current is P / v_true (physics of the load; 20 kW until 0.3 s in the demo)
    s2, run2 = _run(tmp_path, _demo(demo_path, '[[faults]]\nkind = "offset"\nsignal = "v_out"\nstart = "0.05 s"\nvalue = "5 V"\n', "0.25 s"), "off")
    assert s2["trip"] is None
    end = slice(-200, None)
    v_true = run2.signals["P_load"][end] / run2.signals["i_out"][end]
    assert np.allclose(run2.signals["v_out"][end] - v_true, 5.0, atol=1e-6)
    assert np.allclose(run2.signals["v_out"][end], run2.signals["v_ref"][end], atol=0.05)


def test_noise_is_reproducible_by_seed_and_stuck_holds(tmp_path, demo_path):
    noise = '[[faults]]\nkind = "noise"\nsignal = "i_L1"\nstart = "0.05 s"\nvalue = "2 A"\n'
    a = _run(tmp_path, _demo(demo_path, noise, "0.1 s"), "n1")[1]
    b = _run(tmp_path, _demo(demo_path, noise, "0.1 s"), "n2")[1]
    c = _run(tmp_path, _demo(demo_path, noise, "0.1 s").replace("seed = 1", "seed = 2"), "n3")[1]
    assert a.signals["i_L1"].tobytes() == b.signals["i_L1"].tobytes()
    assert a.signals["i_L1"].tobytes() != c.signals["i_L1"].tobytes()
    k = int(np.searchsorted(a.time, 0.05 - 1e-12))
    assert a.signals["i_L1"][:k].tobytes() == c.signals["i_L1"][:k].tobytes()
    stuck = '[[faults]]\nkind = "stuck"\nsignal = "i_out"\nstart = "0.02 s"\nend = "0.04 s"\n'
    st = _run(tmp_path, _demo(demo_path, stuck, "0.06 s"), "st")[1]
    k0, k1 = (int(np.searchsorted(st.time, x - 1e-12)) for x in (0.02, 0.04))
    assert np.all(st.signals["i_out"][k0:k1] == st.signals["i_out"][k0])


def test_controller_nan_output_trips(tmp_path, demo_path):
    s, run = _run(tmp_path, _demo(demo_path, '[[faults]]\nkind = "nan_output"\nstart = "0.1 s"\n', "0.15 s"))
    k = int(np.searchsorted(run.time, 0.1 - 1e-12))
    assert s["trip"]["tick"] == k and s["trip"]["cause"] == "non-finite value of u"
    assert run.signals["u"][k] == 0.0


@pytest.mark.parametrize("fault, message", [
    ('kind = "shortcircuit"\nstart = 0.1', "did you mean 'short_circuit'"),
    ('kind = "offset"\nstart = 0.1\nvalue = 1', "faults[0].signal = '' is not a measured signal"),
    ('kind = "short_circuit"\nstart = 0.1', "faults[0] (short_circuit) needs a value"),
    ('kind = "dropout"\nsignal = "v_out"\nstart = 0.1\nvalue = 3', "takes no value"),
    ('kind = "short_circuit"\nstart = 0.1\nvalue = "0 ohm"', "outside (0, 1e+09] ohm"),
    ('kind = "offset"\nsignal = "v_out"\nstart = 0.1\nvalue = "3 A"', "expected V"),
    ('kind = "gain"\nsignal = "v_out"\nstart = 0.2\nend = 0.1\nvalue = 1.1', "is not after start"),
    ('kind = "open_circuit"\nsignal = "v_out"\nstart = 0.1', "acts on the load"),
])
def test_bad_faults_are_refused_clearly(demo_path, fault, message):
    with pytest.raises(ScenarioError) as err:
        parse_scenario(_demo(demo_path, "[[faults]]\n" + fault + "\n"), name="faults.toml")
    assert message in str(err.value) and str(err.value).startswith("faults.toml: ")


RESET = '''
title = "reset test (test data)"
seed = 1
resets = ["0.1 s", "0.2 s"]
[timing]
Ts = "50 us"
duration = "0.3 s"
[plant]
plugin = "first_order.py"
tau = "20 ms"
[controller]
plugin = "pi_v.py"
Kp = 1.0
Ki = 20.0
[reference]
plugin = "profile"
points = [[0, 400]]
[limits]
v_collapse = 0
[[interlocks]]
signal = "v_out"
above = "480 V"
[[faults]]
kind = "offset"
signal = "v_out"
start = "0.05 s"
end = "0.15 s"
value = "500 V"
'''


def test_reset_is_refused_while_the_cause_persists_and_accepted_after(tmp_path):
    """ISO 13849-1:2023 5.2.2.3 (secondary source): a stop is held until it is safe, and a
    restart needs a separate, intended reset. The cause (a +500 V offset on the v_out sensor, so
    the measured value stays above the 480 V limit even with the output off) persists from
    0.05 s to 0.15 s: the reset at 0.1 s is refused, the one at 0.2 s accepted. A first-order
    test plant keeps the example free of filter ringing while the output is off."""
    from hilrig.safety.interlocks import BIT_LATCHED, BIT_RESET_REFUSED, BIT_RESET_REQUESTED
    from tests.integration.test_protocol_example import with_shared_plugins
    (tmp_path / "reset.toml").write_text(with_shared_plugins(RESET))
    from hilrig.runtime.scenario import load_scenario
    res = run_scenario(load_scenario(tmp_path / "reset.toml"), tmp_path / "r")
    s, run = res.summary, open_run(res.folder)
    kinds = [(e["event"], round(e["time_s"], 9)) for e in s["events"]]
    assert kinds == [("trip", 0.05), ("reset refused", 0.1), ("reset accepted", 0.2)]
    assert s["events"][0]["cause"] == "interlock v_out > 480 V"
    assert s["metrics"]["trips"] == 1 and s["completed"]
    word = run.signals["interlock_word"].astype(np.int64)
    t, u = run.time, run.signals["u"]
    k_trip, k_refuse, k_accept = (int(np.searchsorted(t, x - 1e-12)) for x in (0.05, 0.1, 0.2))
    latched = (word >> BIT_LATCHED) & 1
    assert not latched[:k_trip].any() and latched[k_trip:k_accept].all() and not latched[k_accept:].any()
    assert (word[k_refuse] >> BIT_RESET_REQUESTED) & 1 and (word[k_refuse] >> BIT_RESET_REFUSED) & 1
    assert (word[k_accept] >> BIT_RESET_REQUESTED) & 1 and not (word[k_accept] >> BIT_RESET_REFUSED) & 1
    assert np.all(u[k_trip:k_accept + 1] == 0.0)    # safe output held, also on the reset tick
    assert u[k_accept + 1] > 0.0                    # the controller restarts on the next tick
    # and, restarting from the measurement, brings the output back towards 400 V (gains
    # chosen so the restart does not overshoot into the 480 V limit again)
    v = run.signals["v_out"]
    assert v[-1] > 300.0 and v[k_accept:].max() < 480.0
