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
    s, run = _run(tmp_path, _demo(demo_path, '[[faults]]\nkind = "short_circuit"\nstart = "0.2 s"\nvalue = "10 mohm"\n'))
    trip = s["trip"]
    assert trip is not None and trip["cause"] == "interlock i_L1 > 500 A"
    i_l1, u, t = run.signals["i_L1"], run.signals["u"], run.time
    first = int(np.argmax(i_l1 > 500.0))
    assert i_l1[first] > 500.0 and np.all(i_l1[:first] <= 500.0)
    assert trip["tick"] == first                    # not a tick later, not a tick earlier
    assert u[first] == 0.0 and u[first - 1] > 0.0   # the safe output on the trip tick itself
    assert np.all(u[first:] == 0.0)                 # and held (latched) to the end
    assert t[first] >= 0.2
    # the load really changed at 0.2 s: the output current jumps (v / 10 mohm)
    k = int(np.searchsorted(t, 0.2))
    assert run.signals["i_out"][k] > 10 * run.signals["i_out"][k - 1]


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
