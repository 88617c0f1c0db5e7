"""Shared set-up of the analysis tests: the scenarios (the shipped demo and plants of the tests'
own, all demo data) and the sampled loop built independently with python-control from the
same continuous plant and discrete controller matrices."""
from __future__ import annotations

import functools
from importlib.resources import files

import control
import numpy as np
from scipy.optimize import linear_sum_assignment

from hilrig.runtime.analysis import linear
from hilrig.runtime.run import prepare
from hilrig.runtime.scenario import load_scenario, parse_scenario

DEMO_PATH = str(files("hilrig.runtime") / "data" / "demo.toml")

# DEMO DATA: invented plants of the tests' own, not measurements of any real equipment.
#: a 48 V-class single-stage emulator with a large output capacitor, 100 us control period
SINGLE_48V = """\
title = "demo data: 48 V-class single-stage emulator, large capacitor"
demo_data = true
mode = "sil"
seed = 1

[timing]
Ts = "100 us"
duration = "10 ms"

[plant]
plugin = "single_lc"
V_dc = "60 V"
L = "22 uH"
R = "4 mohm"
C = "4.7 mF"
v_load_min = "5 V"

[controller]
plugin = "cascaded_pi"

[reference]
plugin = "profile"

[[load.points]]
t = 0
P = "1 kW"

[limits]
v_collapse = "4 V"

[[interlocks]]
signal = "v_out"
above = "58 V"
"""

#: an 800 V-class two-stage emulator with small capacitors, 50 us control period
TWO_STAGE_800V = """\
title = "demo data: 800 V-class two-stage emulator, small capacitors"
demo_data = true
mode = "sil"
seed = 1

[timing]
Ts = "50 us"
duration = "10 ms"

[plant]
plugin = "two_stage_lc"
V_dc = "1000 V"
L1 = "300 uH"
R1 = "8 mohm"
C1 = "47 uF"
L2 = "60 uH"
R2 = "5 mohm"
C2 = "150 uF"

[controller]
plugin = "cascaded_pi"

[reference]
plugin = "profile"

[[load.points]]
t = 0
P = "50 kW"

[[interlocks]]
signal = "v_out"
above = "900 V"
"""

#: a 400 V-class single-stage emulator (the plant's default filter), for the closed forms
SINGLE_400V = SINGLE_48V.replace("48 V-class", "400 V-class").replace(
    'V_dc = "60 V"\nL = "22 uH"\nR = "4 mohm"\nC = "4.7 mF"',
    'V_dc = "800 V"\nL = "200 uH"\nR = "20 mohm"\nC = "500 uF"').replace(
    'above = "58 V"', 'above = "480 V"').replace('Ts = "100 us"', 'Ts = "50 us"')

TEXTS = {"single_48V": SINGLE_48V, "two_stage_800V": TWO_STAGE_800V, "single_400V": SINGLE_400V}


def scenario(plant: str = "demo", controller: str = "cascaded_pi", delay: float = 0.0,
             **extra):
    """The demo scenario or one of the tests' own, with the controller, the actuation delay
    [periods] and further dotted overrides (``extra``: "controller.V0" -> value, written with
    "__" for ".")."""
    ov = {"controller.plugin": controller, "timing.actuation_delay": delay}
    ov.update({k.replace("__", "."): v for k, v in extra.items()})
    if plant == "demo":
        return load_scenario(DEMO_PATH, ov)
    return parse_scenario(TEXTS[plant], name=f"{plant}.toml", overrides=ov)


#: controller gains of the tests' own for the 48 V-class plant (demo data: the defaults are
#: tuned for the 400 V-class demo filter and leave this one unstable)
GAINS = {"single_48V": {"cascaded_pi": dict(controller__Kp_i=0.1, controller__Ki_i=100.0,
                                            controller__Kp_v=10.0, controller__Ki_v=20000.0,
                                            controller__C_ff=4.7e-3)}}


@functools.lru_cache(maxsize=None)
def prepared(plant="demo", controller="cascaded_pi", delay=0.0, extra=()):
    ov = dict(GAINS.get(plant, {}).get(controller, {}))
    ov.update(dict(extra))
    return prepare(scenario(plant, controller, delay, **ov))


@functools.lru_cache(maxsize=None)
def model(plant="demo", controller="cascaded_pi", delay=0.0, v=400.0, p=50e3, extra=()):
    """(prep, LoopModel) at (v, p); ``extra``: a tuple of (key, value) overrides."""
    prep = prepared(plant, controller, delay, extra)
    return prep, linear.linearize(prep, v, p)


# -- the sampled loop, independently with python-control ---------------------------------------

def delay_line(n: int, Ts: float) -> control.StateSpace:
    """z^-n as a state-space system (n unit delays in a row)."""
    if n == 0:
        return control.ss(np.zeros((0, 0)), np.zeros((0, 1)), np.zeros((1, 0)), [[1.0]], Ts)
    A = np.eye(n, k=-1)
    B = np.zeros((n, 1))
    B[0, 0] = 1.0
    C = np.zeros((1, n))
    C[0, -1] = 1.0
    return control.ss(A, B, C, [[0.0]], Ts)


def tapped_delay_line(l1: int, l2: int, Ts: float) -> control.StateSpace:
    """One input u_k, two outputs [u_{k-l1}, u_{k-l2}] from one shared queue (minimal)."""
    n = max(l1, l2)
    A = np.eye(n, k=-1)
    B = np.zeros((n, 1))
    if n:
        B[0, 0] = 1.0
    C = np.zeros((2, n))
    D = np.zeros((2, 1))
    for row, lag in enumerate((l1, l2)):
        if lag == 0:
            D[row, 0] = 1.0
        else:
            C[row, lag - 1] = 1.0
    return control.ss(A, B, C, D, Ts)


def selection(m, iyc) -> np.ndarray:
    """The matrix that picks the controller's reads (prep.args["iyc"]) out of y."""
    iyc = np.asarray(iyc)[:len(m.reads)]
    S = np.zeros((iyc.size, m.C.shape[0]))
    S[np.arange(iyc.size), iyc] = 1.0
    return S


def sampled_plant(m, iyc, delay_halves: int, *, lag_shift: int = 0, swap_halves: bool = False,
                  euler: bool = False) -> control.StateSpace:
    """The plant from the controller's command u_k to its reads at the next tick's start, with
    the actuation delay: python-control's c2d (ZOH) of ss(A, B, S C, 0); an integer delay of n
    periods as z^-n in series; a half-period delay from c2d at Ts/2 and two half steps composed
    here: x_{k+1} = Ph (Ph x_k + Gh u_{k-l1}) + Gh u_{k-l2}, l1 = ceil(dh/2), l2 = floor(dh/2)
    (the loop's ``actuate``: first half with the command of l1 ticks ago, second half l2).

    ``lag_shift``, ``swap_halves``, ``euler``: deliberately wrong variants, to show that the
    comparison sees a delay one tick off, the halves swapped, or forward Euler in place of ZOH.
    """
    Ts = m.Ts
    S = selection(m, iyc)
    C = S @ m.C
    # the measurement is taken at the tick's start: an output that depends on u directly
    # would read the previous command; none of the plants used here has one
    assert not np.any(S @ m.D), "feedthrough D: extend sampled_plant"
    cont = control.ss(m.A, m.B, C, np.zeros((C.shape[0], m.B.shape[1])))
    l1, l2 = (delay_halves + 1) // 2, delay_halves // 2
    if swap_halves:
        l1, l2 = l2, l1
    if l1 == l2:
        if euler:
            n = m.A.shape[0]
            Pd = control.ss(np.eye(n) + Ts * m.A, Ts * m.B, C, 0 * C[:, :1], Ts)
        else:
            Pd = control.c2d(cont, Ts, "zoh")
        return control.series(delay_line(l1 + lag_shift, Ts), Pd)
    half = control.c2d(cont, Ts / 2, "zoh")
    Ph, Gh = np.asarray(half.A), np.asarray(half.B)
    P2 = control.ss(Ph @ Ph, np.hstack([Ph @ Gh, Gh]), C, np.zeros((C.shape[0], 2)), Ts)
    return control.series(tapped_delay_line(l1 + lag_shift, l2, Ts), P2)


def loop_gain_system(m, iyc, delay: float, **wrong) -> control.StateSpace:
    """L(z) broken at the converter command, negative-feedback convention: L = -K(z) P(z);
    ``delay``: the scenario's actuation delay [periods] (the test's own value, not the
    model's)."""
    P = sampled_plant(m, iyc, int(round(2 * delay)), **wrong)
    K = control.ss(m.Ac, m.Bc, m.Cc, m.Dc, m.Ts)
    return -control.series(P, K)


def closed_loop_poles(m, iyc, delay: float, **wrong) -> np.ndarray:
    return np.asarray(control.poles(control.feedback(loop_gain_system(m, iyc, delay, **wrong),
                                                     1)))


def match_poles(a, b) -> float:
    """Largest relative distance between the two pole sets after an optimal one-to-one
    assignment (Hungarian method, scipy.optimize.linear_sum_assignment); inf if the counts
    differ."""
    a, b = np.asarray(a, dtype=complex), np.asarray(b, dtype=complex)
    if a.size != b.size:
        return np.inf
    r, c = linear_sum_assignment(np.abs(a[:, None] - b[None, :]))
    return float(np.max(np.abs(a[r] - b[c]) / np.maximum(np.abs(a[r]), 1e-12)))
