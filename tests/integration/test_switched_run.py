"""The switching-level plant in a normal run: examples/switching/three_phase_20kHz.toml (invented
demo data: the demo's 100 V step at 50 kW on three interleaved phases at 20 kHz, 0.5 us dead
time) with cascaded_pi, next to the same scenario on the averaged plant.

* Reruns are bit-identical (a documented property of SIL runs).
* Switching instants: the fraction of each period that phase 1's switch node spent at V_dc is
  the command u / V_dc of that period minus t_dead f_sw (dead-time voltage error with a positive
  phase current, common practice, no source), on every tick.
* Averaged versus switched: two_stage_lc with L1 = L_phase / N and R1 = R_phase / N (the
  phases in parallel) and the same C1, L2, C2 is the switched circuit's average over a
  switching period (Erickson and Maksimovic, Fundamentals of Power Electronics, 2nd ed., ch. 3
  and 7, from memory). The switched run's per-period means of v_out and of the summed phase
  current are compared with the averaged run's means over the same periods (its states
  re-integrated within each period from the recording, 32 RK4 steps and the trapezoidal rule),
  with and without dead time. The dead time shifts the switched converter's mean voltage by
  t_dead f_sw V_dc = 8 V, which the controller's integrators take up; the tolerances (TOL) hold
  the measured errors with a margin of about 2.
"""
from pathlib import Path

import numpy as np
import pytest

from hilrig.plugins.plants import two_stage_lc
from hilrig.plugins.base import BuildContext
from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "examples" / "switching" / "three_phase_20kHz.toml"


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("switched")
    sc = load_scenario(SCENARIO)
    first = open_run(run_scenario(sc, tmp / "a").folder)
    again = open_run(run_scenario(load_scenario(SCENARIO), tmp / "b").folder)
    text = SCENARIO.read_text()
    head, rest = text.split("[plant]", 1)
    rest = rest.split("[controller]", 1)[1]
    # the averaged counterpart: the same scenario on two_stage_lc with the three phases in
    # parallel (450 uH and 15 mohm each); C1, L2, R2, C2 are the same defaults in both plants
    avg_path = tmp / "averaged.toml"
    avg_path.write_text(head + '[plant]\nplugin = "two_stage_lc"\nL1 = "150 uH"\nR1 = "5 mohm"\n\n'
                        "[controller]" + rest)
    # the same controller on every plant: the switched run's (designed for its plant) given to
    # the others, which would otherwise be designed for their own
    same = {f"controller.{k}": v for k, v in first.summary["controller_values"].items()}
    averaged = open_run(run_scenario(load_scenario(avg_path, overrides=same), tmp / "avg").folder)
    ideal = open_run(run_scenario(load_scenario(SCENARIO, overrides={"plant.t_dead": "0 s",
                                                                     **same}),
                                  tmp / "no_dead_time").folder)
    return sc, first, again, averaged, ideal


def test_reruns_are_bit_identical(runs):
    _, a, b, _, _ = runs
    assert a.summary["outcome"]["status"] == "completed"
    # the plant integrates each period itself: the summary says so, with the energy check on
    integ = a.summary["integration"]
    assert integ["rule"] == "plant" and integ["energy_check"] and integ["refined_steps"] == 0
    assert set(a.signals) == set(b.signals)
    for name in a.signals:
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name


def test_each_period_switches_at_the_commanded_duty(runs):
    sc, a, _, _, _ = runs
    values = sc.plant.values
    s = a.signals
    assert min(s["i_ph1"].min(), s["i_ph2"].min(), s["i_ph3"].min()) > 5.0  # never near zero
    assert not np.any(s["i_ph4"])  # the unused phase
    duty = np.clip(s["u"][:-1] / values["V_dc"], 0.0, 1.0)
    expected = duty - values["t_dead"] * values["f_sw"]
    assert np.max(np.abs(s["duty_1"][1:] - expected)) < 1e-9
    # the period's summed current is the sum of the phases' (its mean lies within their range)
    assert np.all(s["i_L1"] == s["i_ph1"] + s["i_ph2"] + s["i_ph3"] + s["i_ph4"])


def _averaged_period_means(run, values, ts, m=32):
    """Means of v_out and i_L1 of the averaged run over each period [t_k, t_k+1]: its recorded
    state at t_k re-integrated with the recorded command and load held (m RK4 steps of the
    plant's own kernel, the trapezoidal rule over them)."""
    p = two_stage_lc.DECLARATION.pack(values, BuildContext(Ts=ts))
    s = run.signals
    n = len(run.time) - 1
    out = np.zeros((n, 2))
    dt = ts / m
    for k in range(n):
        x = (s["i_L1"][k], s["v_C1"][k], s["i_L2"][k], s["v_out"][k])
        u = np.array([s["u"][k]])
        d = np.array([s["P_load"][k], s["G_load"][k], s["I_load"][k]])
        acc_v = 0.5 * x[3]
        acc_i = 0.5 * x[0]
        for j in range(m):
            x = two_stage_lc.rk4_step(dt, p, x, u, d)
            w = 0.5 if j == m - 1 else 1.0
            acc_v += w * x[3]
            acc_i += w * x[0]
        out[k] = acc_v / m, acc_i / m
    return out


@pytest.mark.parametrize("dead_time", [True, False], ids=["t_dead_0.5us", "t_dead_0"])
def test_averaged_versus_switched_per_period_means(runs, dead_time):
    sc, with_dead, _, avg, ideal = runs
    sw = with_dead if dead_time else ideal
    values = dict(two_stage_lc.DECLARATION.defaults())
    means = _averaged_period_means(avg, values, sc.Ts)
    v_err = sw.signals["v_out_mean"][1:] - means[:, 0]
    i_err = sw.signals["i_L1_mean"][1:] - means[:, 1]
    t = sw.time[1:]
    start = t < 0.01  # the settled start and the hold before the 100 V step at 10 ms
    tol = TOL[dead_time]
    assert np.max(np.abs(v_err[start])) < tol[0]
    assert np.max(np.abs(i_err[start])) < tol[1]
    assert np.max(np.abs(v_err[~start])) < tol[2]
    assert np.max(np.abs(i_err[~start])) < tol[3]


#: largest |error| allowed: v_out [V] and i_L1 [A] over the start (0-10 ms), then over the step
#: and the hold after it (10-30 ms). Measured (docs/design-notes.md): with 0.5 us dead time
#: 0.88 V, 3.24 A, 0.023 V, 0.059 A (the start: the averaged plant's equilibrium has no
#: dead-time loss, so the switched converter starts 8 V short until the integrators take it up);
#: without dead time 0.069 V, 0.21 A, 0.0063 V, 0.013 A. The tolerances are about 2x those.
TOL = {True: (1.8, 6.5, 0.05, 0.12), False: (0.15, 0.4, 0.015, 0.03)}
