"""The blocked gates' RK4 step (runtime/loop.py ``blocked_step``): an inductor current that
reaches zero through a diode within a step stops there, also when RK4's stages straddle zero.

Found by a run: with the gates blocked the single-stage plant's current falls by about 5 A per
sub-step (di/dt = -v_out / L, 400 V across 1 mH, 12.5 us sub-steps); from 0.535 A the stages of
one RK4 step sit on both diodes (the half-step stages at -1.96 A and +3.03 A, the last at
-4.46 A), their slopes cancel, the step ended at 0.535 A, and the current hung there and crept
up instead of stopping at zero. The expected values are the closed form of an inductor with a
constant voltage across it (i falls linearly at v / L and stops at zero; Erickson and
Maksimovic, Fundamentals of Power Electronics, 2nd ed., ch. 2, from memory).
"""
import math

import numpy as np
import pytest

from hilrig.runtime import loop as loopgen
from hilrig.runtime import registry
from hilrig.runtime.run import prepare
from hilrig.runtime.scenario import parse_scenario

SCENARIO = """
title = "blocked step (test data)"
[plant]
plugin = "single_lc"
L = "1 mH"
R = "0 ohm"
C = "1 F"
[controller]
plugin = "cascaded_pi"
[reference]
plugin = "profile"
points = [[0, "400 V"]]
"""


@pytest.fixture(scope="module")
def blocked_step():
    sc = parse_scenario(SCENARIO, name="t.toml")
    path, _ = loopgen.generate(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin)
    mod = loopgen.load_module(path)
    pp = prepare(sc).args["pp"]
    return mod.blocked_step, pp


@pytest.mark.parametrize("i0", [0.535, 2.4, 4.99, 0.01])
def test_a_current_that_crosses_zero_within_the_step_stops_at_zero(blocked_step, i0):
    step, pp = blocked_step
    v, L, dt = 400.0, 1e-3, 12.5e-6
    assert i0 < v / L * dt                       # it reaches zero within the step
    s1 = step(0.0, dt, pp, (i0, v), np.array([math.nan]), np.zeros(3))
    assert s1[0] == 0.0
    assert s1[1] == pytest.approx(v, abs=1e-3)  # 1 F: the voltage hardly moves


@pytest.mark.parametrize("i0", [5.5, 20.0])
def test_a_current_that_does_not_reach_zero_falls_at_v_over_l(blocked_step, i0):
    step, pp = blocked_step
    v, L, dt = 400.0, 1e-3, 12.5e-6
    s1 = step(0.0, dt, pp, (i0, v), np.array([math.nan]), np.zeros(3))
    assert s1[0] == pytest.approx(i0 - v / L * dt, rel=1e-6)


def test_a_negative_current_returns_to_zero_through_the_upper_diode(blocked_step):
    """i < 0 flows back into the DC link: di/dt = (V_dc - v_out) / L (800 V link)."""
    step, pp = blocked_step
    v, L, dt, vdc = 400.0, 1e-3, 12.5e-6, 800.0
    i0 = -0.3 * (vdc - v) / L * dt
    s1 = step(0.0, dt, pp, (i0, v), np.array([math.nan]), np.zeros(3))
    assert s1[0] == 0.0
