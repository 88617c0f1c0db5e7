"""The trip's safe state as real hardware has it, and the digital-control delay.

Safe actions (``[safe_state]``): with ``gate_block`` (the default) a trip switches the
converter's gates off: the inductor current freewheels through a diode against the voltage it
sees and stops at zero. Checked against the closed form of a discharging inductor, t = L i0 / v
(an inductor with a constant voltage v across it: di/dt = -v / L; Erickson and Maksimovic,
Fundamentals of Power Electronics, 2nd ed., ch. 2, the inductor volt-second relation, from
memory), and the recorded current never crosses zero after the block. ``zero_voltage`` keeps the
behaviour of before (the converter a voltage source at 0 V that sinks any current). An output
contactor opens the load ``contactor_delay`` after the trip.

Delay (``timing.actuation_delay``, in control periods): the command computed from tick k's
samples acts one period later (1), or from mid-period (0.5, the PWM update). Checked against
scipy's Radau integrating the circuit equations (tests/unit/plugins/test_plants.py) with the
recorded commands shifted by that delay.
"""
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import parse_scenario
from tests.unit.plugins.test_plants import _single_rhs, _two_stage_rhs

# DEMO DATA: invented trials of the project's own. single_lc with a 1 mH inductor, R = 0 and a
# 1 F output capacitance (the output voltage stays within 0.1 V of 400 V while the current
# freewheels), a 250 A constant-current load; the reference steps to 410 V at 2 ms and an
# over-voltage interlock at 401 V trips on the way up.
FREEWHEEL = """
title = "gate block (demo data)"
demo_data = true
[timing]
Ts = "50 us"
substeps = 4
duration = "{duration}"
[plant]
plugin = "single_lc"
L = "1 mH"
R = "0 ohm"
C = "1 F"
[controller]
plugin = "cascaded_pi"
[reference]
plugin = "profile"
points = [[0, "400 V"], ["2 ms", "400 V"], ["2 ms", "410 V"]]
[load]
[[load.points]]
t = 0
I = "250 A"
[[interlocks]]
signal = "v_out"
above = "400.05 V"
[initial]
# at equilibrium: with the default start 1 V low, 1 F would take longer than the run to rise
v_out_offset = "0 V"
{extra}
"""


def _run(tmp_path, name, duration="6 ms", extra=""):
    sc = parse_scenario(FREEWHEEL.format(duration=duration, extra=extra), name="safe.toml")
    res = run_scenario(sc, tmp_path / name)
    return sc, res.summary, open_run(res.folder)


@pytest.fixture(scope="module")
def blocked(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("safe"), "gb")


def test_gate_block_freewheels_for_l_i0_over_v_and_stops_at_zero(blocked):
    sc, s, run = blocked
    assert s["safe_state"]["action"] == "gate_block"
    trip = s["trip"]
    assert trip is not None, s["events"]
    k = trip["tick"]
    i, v, t = run.signals["i_L1"], run.signals["v_out"], run.time
    i0 = i[k]
    assert i0 > 100.0
    L = sc.plant.values["L"]
    # closed form: di/dt = -v / L while the low-side diode conducts (R = 0), zero at L i0 / v
    t_zero = L * i0 / v[k]
    assert 5 * sc.Ts < t_zero < (len(t) - k - 5) * sc.Ts
    z = k + int(np.ceil(t_zero / sc.Ts - 1e-9))
    expect = i0 - v[k] / L * (t[k:z] - t[k])
    # v_out drifts by < 0.1 V over the freewheel (1 F): 2.5e-4 relative of the slope
    assert np.allclose(i[k:z], expect, rtol=0, atol=1e-3 * i0)
    assert np.all(i[k:z] > 0.0)
    assert np.all(i[z:] == 0.0), i[z - 2:z + 4]     # stopped at zero, and held there
    # the switch node: the controller's command is the safe value, recorded; the plant saw
    # its gates blocked (energy back to nothing: no negative current)
    assert np.all(run.signals["u"][k:] == 0.0)
    assert i.min() >= 0.0


def test_zero_voltage_keeps_the_old_behaviour_a_current_that_reverses(tmp_path, blocked):
    sc, s, run = _run(tmp_path, "zv", extra='[safe_state]\naction = "zero_voltage"')
    assert s["safe_state"]["action"] == "zero_voltage"
    k = s["trip"]["tick"]
    assert k == blocked[1]["trip"]["tick"]
    i = run.signals["i_L1"]
    # 0 V applied: the inductor current falls through zero and reverses (the converter sinks)
    assert i[k:].min() < -100.0
    # identical up to the trip
    assert np.array_equal(i[:k + 1], blocked[2].signals["i_L1"][:k + 1])


def test_the_output_contactor_opens_after_its_delay(tmp_path):
    sc, s, run = _run(tmp_path, "ct", extra='[safe_state]\ncontactor_delay = "1 ms"')
    assert s["safe_state"]["contactor_delay_s"] == pytest.approx(1e-3)
    k = s["trip"]["tick"]
    n = int(round(1e-3 / sc.Ts))
    i_out = run.signals["i_out"]
    assert np.all(i_out[:k + n] == pytest.approx(250.0))
    assert np.all(i_out[k + n:] == 0.0)
    # the recorded load is the one at the output: disconnected
    assert np.all(run.signals["I_load"][k + n:] == 0.0) and run.signals["I_load"][k + n - 1] == 250.0


@pytest.mark.parametrize("bad, msg", [
    ('[safe_state]\naction = "gate_blok"', "did you mean 'gate_block'"),
    ('[safe_state]\ncontactor_delay = "-1 ms"', "safe_state.contactor_delay"),
    ('[safe_state]\nopen = 1', "unknown key 'safe_state.open'"),
])
def test_bad_safe_state_is_refused(bad, msg):
    with pytest.raises(ScenarioError, match=msg):
        parse_scenario(FREEWHEEL.format(duration="1 ms", extra=bad), name="safe.toml")


@pytest.mark.parametrize("bad", ["0.3", "3", "-1", '"one"', "true"])
def test_bad_actuation_delay_is_refused(bad):
    text = FREEWHEEL.format(duration="1 ms", extra="").replace(
        'substeps = 4', f'substeps = 4\nactuation_delay = {bad}')
    with pytest.raises(ScenarioError, match="timing.actuation_delay"):
        parse_scenario(text, name="safe.toml")


# -- the delay, against Radau on the recorded commands -------------------------------------

STEP = """
title = "actuation delay (demo data)"
demo_data = true
[timing]
Ts = "50 us"
substeps = 4
duration = "4 ms"
actuation_delay = {delay}
[plant]
plugin = "{plant}"
[controller]
plugin = "state_feedback"
[reference]
plugin = "profile"
points = [[0, "400 V"], ["1 ms", "400 V"], ["1 ms", "420 V"]]
[load]
[[load.points]]
t = 0
P = "50 kW"
"""


@pytest.mark.parametrize("plant, delay", [("two_stage_lc", 1), ("two_stage_lc", 0.5),
                                          ("two_stage_lc", 1.5), ("single_lc", 1)])
def test_delayed_command_acts_when_the_delay_says(tmp_path, plant, delay):
    sc = parse_scenario(STEP.format(delay=delay, plant=plant), name="delay.toml")
    s = run_scenario(sc, tmp_path / "r").summary
    assert s["actuation_delay_periods"] == delay
    run = open_run(tmp_path / "r")
    sig = run.signals
    names, rhs = ((("i_L1", "v_C1", "i_L2", "v_out"), _two_stage_rhs) if plant == "two_stage_lc"
                  else (("i_L1", "v_out"), _single_rhs))
    x = np.stack([sig[n] for n in names], axis=1)
    u = sig["u"]
    c = dict(sc.plant.values)
    n = x.shape[0]
    # the command in force over [t_k, t_k + Ts/2) and [t_k + Ts/2, t_k+1): u of tick
    # k - ceil(D), k - floor(D) (D in periods; before tick 0: u of tick 0)
    lag1, lag2 = int(np.ceil(delay)), int(np.floor(delay))
    worst = 0.0
    for k in range(n - 1):
        xk = x[k]
        for half, lag in ((0, lag1), (1, lag2)):
            uk = u[max(k - lag, 0)]
            sol = solve_ivp(rhs, (0.0, sc.Ts / 2), xk, method="Radau", rtol=1e-10, atol=1e-9,
                            args=(uk, float(sig["P_load"][k]), 0.0, 0.0, c))
            xk = sol.y[:, -1]
        worst = max(worst, float(np.max(np.abs(xk - x[k + 1]) / np.maximum(np.abs(x).max(0), 1.0))))
    assert worst < 1e-6, worst
    # and it is not the undelayed plant: on the tick whose command changed most, the same
    # check with no delay fails by far
    k = int(np.argmax(np.abs(np.diff(u)))) + 1
    sol = solve_ivp(rhs, (0.0, sc.Ts), x[k], method="Radau", rtol=1e-10, atol=1e-9,
                    args=(u[k], float(sig["P_load"][k]), 0.0, 0.0, c))
    assert np.max(np.abs(sol.y[:, -1] - x[k + 1])) > 1e3 * max(worst, 1e-9)
