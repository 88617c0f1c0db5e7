"""The frozen check under a saturated command, and the cross-check interlock (two signals that
must agree within a band, optionally across a resistive-inductive drop).

The protect kernel is called tick by tick from Python on synthetic signals, compiled and as
plain Python. Expected trip ticks follow from the trip semantics written out in each test.
Signal levels are demo data. The drop model is Kirchhoff's voltage law over a series R-L branch,
v_in - v_out = R i + L di/dt (any circuits handbook); the synthetic currents and voltages below
are built to satisfy it exactly, in closed form, independently of the kernel.
"""
import math

import numpy as np
import pytest

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.scenario import parse_scenario
from hilrig.safety.errors import InterlockConfigError
from hilrig.safety.interlocks import (DERIVED, L_CAUSE, L_TICK, L_TRIPPED, L_VALUE, SIDE_CROSS,
                                      SIDE_FROZEN, XC_SIZE, Interlock, InterlockTable, new_latch,
                                      protect)

TS = 50e-6  # demo data: 20 kHz control
Y_NAMES = ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc"]
V_OUT, I_OUT, I_L1, V_C1, I_L2, V_DC = range(6)
NAMES = Y_NAMES + ["u"] + [d[0] for d in DERIVED]
V_DC_LEVEL = 800.0  # demo data
R2, L2 = 3e-3, 100e-6   # demo data: the demo plant's second stage

KERNELS = pytest.mark.parametrize("jit", [True, False], ids=["njit", "python"])


class Rig:
    def __init__(self, rows, jit=True, with_vdc=True):
        self.table = InterlockTable.build(rows, NAMES)
        self.cnt = np.zeros(len(rows), dtype=np.int64)
        self.latch = new_latch()
        self.pv = np.zeros(2 * len(NAMES))
        self.dix = np.array([V_OUT, I_OUT, V_DC if with_vdc else -1], dtype=np.int64)
        self.protect = protect if jit else protect.py_func
        self.tick = 0

    def step(self, u=401.0, **y):
        vals = dict(v_out=400.0, i_out=100.0, i_L1=100.0, v_C1=400.3, i_L2=100.0,
                    v_dc=V_DC_LEVEL)
        vals.update(y)
        yy = np.array([vals[n] for n in Y_NAMES], dtype=np.float64)
        uu = np.array([u], dtype=np.float64)
        tb = self.table
        w = self.protect(self.tick, self.tick * TS, TS, yy, uu, 0, self.dix, tb.sig, tb.side,
                         tb.thr, tb.deb, self.cnt, self.latch, self.pv, np.zeros(1))
        self.tick += 1
        return int(w)

    @property
    def trip_tick(self):
        return int(self.latch[L_TICK]) if self.latch[L_TRIPPED] else None


def frozen(signal, n):
    return Interlock(signal, 0.0, debounce=n, side=SIDE_FROZEN)


def cross(signal, partner, band, debounce=1, current="", R=0.0, L=0.0):
    return Interlock(signal, band, debounce=debounce, unit="V", side=SIDE_CROSS,
                     partner=partner, drop_current=current, drop_R=R, drop_L=L)


# --- frozen under saturation ---------------------------------------------------------------

@KERNELS
@pytest.mark.parametrize("n", [1, 3, 41])
@pytest.mark.parametrize("rail", [V_DC_LEVEL, 0.0, 900.0, -5.0], ids=["v_dc", "zero", "beyond_v_dc", "below_zero"])
def test_a_command_held_at_its_rail_counts_as_evidence_for_the_frozen_check(jit, n, rail):
    # the sensor sticks at 400 V on tick 10 and the controller's command sits at a rail of the
    # converter's range [0, v_dc] from then on: it never moves, yet the output must (common
    # practice, no source: a converter applying all it can is not at a steady state)
    rig = Rig([frozen("v_out", n)], jit)
    for k in range(10):
        rig.step(u=401.0, v_out=400.0 + 0.1 * k)   # moving measurement: never frozen
    for _ in range(n + 5):
        rig.step(u=rail, v_out=401.5)
    # tick 10 is the first with v_out unchanged (its value differs from tick 9's): ticks 11 ..
    # 10 + n are the n frozen ones
    assert rig.trip_tick == 10 + n


@KERNELS
def test_a_steady_command_inside_its_range_still_does_not_count(jit):
    # an unchanged measurement under an unchanged command inside (0, v_dc) is a steady state
    rig = Rig([frozen("v_out", 2)], jit)
    for _ in range(50):
        rig.step(u=401.0, v_out=400.0)
    assert rig.trip_tick is None


@KERNELS
def test_without_a_measured_v_dc_only_the_lower_rail_is_known(jit):
    rig = Rig([frozen("v_out", 3)], jit, with_vdc=False)
    for _ in range(20):
        rig.step(u=V_DC_LEVEL, v_out=400.0)
    assert rig.trip_tick is None
    for _ in range(5):
        rig.step(u=0.0, v_out=400.0)
    assert rig.trip_tick == 22


@KERNELS
def test_the_held_safe_output_is_no_saturation(jit):
    # once tripped, the command is the safe output (0 V here, the lower rail): a settled
    # measurement under it must not keep the frozen condition up (it would refuse every reset)
    rig = Rig([frozen("v_out", 2), Interlock("i_L1", 500.0)], jit)
    rig.step(u=401.0)
    rig.step(u=401.0, i_L1=600.0)     # trips on i_L1 (row 2)
    assert rig.trip_tick == 1 and rig.latch[L_CAUSE] == 2
    for _ in range(10):
        w = rig.step(u=401.0)
    assert w & 1 == 0


# --- cross-check ---------------------------------------------------------------------------

@KERNELS
def test_cross_check_trips_when_the_disagreement_leaves_the_band_for_its_debounce(jit):
    rig = Rig([cross("v_out", "v_C1", 20.0, debounce=4)], jit)
    for _ in range(5):
        rig.step(v_out=400.0, v_C1=415.0)        # 15 V apart: inside the band
    assert rig.trip_tick is None
    for _ in range(2):
        rig.step(v_out=400.0, v_C1=421.0)        # 21 V: beyond, but only 2 ticks
    rig.step(v_out=400.0, v_C1=410.0)            # back inside: the count restarts
    for _ in range(4):
        rig.step(v_out=400.0, v_C1=379.0)        # -21 V: beyond on both sides
    assert rig.trip_tick == 8 + 3
    # the value kept with the trip is the disagreement, signal - partner
    assert rig.latch[L_VALUE] == pytest.approx(400.0 - 379.0)


@KERNELS
def test_cross_check_with_an_rl_drop_follows_a_fast_current_swing(jit):
    # i_L2 swings by +-300 A at 500 Hz (demo data); KVL over R2, L2 gives the voltage across the
    # branch in closed form. Without the drop model the branch voltage (L2 di/dt up to 94 V)
    # is far outside a 10 V band; with it, the trapezoidal rule over one 50 us tick leaves a
    # residual of about L2 I w^3 Ts^2 / 12 (0.19 V here; the rule's error term, any numerical
    # analysis text), inside the band. Tick 0 has no last tick: a row with a drop is not judged.
    w, amp = 2 * math.pi * 500.0, 300.0

    def signals(k):
        t = k * TS
        i = 100.0 + amp * math.sin(w * t)
        di = amp * w * math.cos(w * t)
        v_out = 400.0
        return dict(v_out=v_out, v_C1=v_out + R2 * i + L2 * di, i_L2=i)

    plain = Rig([cross("v_out", "v_C1", 10.0, debounce=1)], jit)
    with_drop = Rig([cross("v_out", "v_C1", 10.0, debounce=1, current="i_L2", R=R2, L=L2)], jit)
    for k in range(400):
        plain.step(**signals(k))
        with_drop.step(**signals(k))
    assert plain.trip_tick is not None
    assert with_drop.trip_tick is None
    # a 12 V disagreement on top of the same swing trips on its first tick
    for k in range(400, 410):
        s = signals(k)
        s["v_out"] -= 12.0 if k >= 405 else 0.0
        with_drop.step(**s)
    # tick 405: the trapezoid mixes tick 404 (0 V off) and 405 (12 V off): 6 V; tick 406: 12 V
    assert with_drop.trip_tick == 406
    assert with_drop.latch[L_VALUE] == pytest.approx(-12.0, abs=0.5)


@KERNELS
def test_cross_check_on_a_nonfinite_side_is_beyond(jit):
    rig = Rig([cross("v_out", "v_C1", 50.0, debounce=2)], jit)
    rig.step()
    w1 = rig.step(v_C1=float("nan"))
    assert w1 & 1


def test_cross_check_rows_carry_their_partner_and_drop_after_the_thresholds():
    tb = InterlockTable.build([Interlock("v_out", 480.0),
                               cross("v_out", "v_C1", 15.0, 3, "i_L2", R2, L2)], NAMES)
    assert tb.thr.shape == (2 * (1 + XC_SIZE),)
    assert tb.thr[:2].tolist() == [480.0, 15.0]
    assert tb.thr[2:6].tolist() == [-1, -1, 0.0, 0.0]
    assert tb.thr[6:].tolist() == [V_C1, I_L2, R2, L2]
    assert tb.rows[1].cause_id() == "v_out cross_check"
    assert tb.cause_text(2) == ("interlock |v_out - (v_C1 - 0.003 ohm * i_L2 - 0.0001 H * "
                                "di_L2/dt)| > 15 V for 3 ticks")
    # a table without a cross-check keeps one threshold per row
    assert InterlockTable.build([Interlock("v_out", 480.0)], NAMES).thr.shape == (1,)
    with pytest.raises(InterlockConfigError, match="unknown signal 'v_C2'"):
        InterlockTable.build([cross("v_out", "v_C2", 15.0)], NAMES)
    with pytest.raises(InterlockConfigError, match="against itself"):
        InterlockTable.build([cross("v_out", "v_out", 15.0)], NAMES)


# --- scenario keys -------------------------------------------------------------------------

BASE = """
title = "cross-check keys (demo data)"
demo_data = true
[timing]
Ts = "50 us"
duration = "10 ms"
[plant]
plugin = "two_stage_lc"
[controller]
plugin = "cascaded_pi"
[reference]
plugin = "profile"
points = [[0, 400]]
[load]
[[load.points]]
t = 0
P = "20 kW"
"""


def _parse(row: str):
    return parse_scenario(BASE + "[[interlocks]]\n" + row, name="x.toml")


def test_cross_check_scenario_keys_with_units_and_defaults():
    sc = _parse('signal = "v_out"\ncross_check = "v_C1"\nband = "15 V"\n'
                'drop = { current = "i_L2", R = "3 mohm", L = "100 uH" }\ndebounce = 3\n')
    r = sc.interlocks[0]
    assert (r.side, r.signal, r.partner, r.threshold, r.debounce) == (SIDE_CROSS, "v_out", "v_C1", 15.0, 3)
    assert (r.drop_current, r.drop_R, r.drop_L) == ("i_L2", pytest.approx(3e-3), pytest.approx(100e-6))
    # defaults: debounce 1, no drop (R and L 0)
    r = _parse('signal = "v_out"\ncross_check = "v_C1"\nband = "50 V"\n').interlocks[0]
    assert (r.debounce, r.drop_current, r.drop_R, r.drop_L) == (1, "", 0.0, 0.0)
    r = _parse('signal = "v_out"\ncross_check = "v_C1"\nband = "50 V"\ndrop = { current = "i_L2", L = "100 uH" }\n').interlocks[0]
    assert (r.drop_R, r.drop_L) == (0.0, pytest.approx(100e-6))


@pytest.mark.parametrize("row,fragment", [
    ('signal = "v_out"\ncross_check = "v_C1"\n', "a cross-check needs 'band'"),
    ('signal = "v_out"\ncross_check = "i_L2"\nband = "5 V"\n', "compares signals of one unit"),
    ('signal = "v_out"\ncross_check = "v_out"\nband = "5 V"\n', "is not another signal"),
    ('signal = "v_out"\ncross_check = "v_C2"\nband = "5 V"\n', "is not another signal"),
    ('signal = "v_out"\nabove = "480 V"\nband = "5 V"\n', "belongs to a cross-check"),
    ('signal = "v_out"\nfrozen = 5\nband = "5 V"\n', "belongs to a cross-check"),
    ('signal = "v_out"\nfrozen = 5\ndrop = { current = "i_L2" }\n', "belongs to a cross-check"),
    ('signal = "i_L1"\ncross_check = "i_L2"\nband = "5 A"\ndrop = { current = "i_out", R = "1 ohm" }\n',
     "needs voltages"),
    ('signal = "v_out"\ncross_check = "v_C1"\nband = "5 A"\n', "interlocks[0].band"),
    ('signal = "v_out"\ncross_check = "v_C1"\nband = "5 V"\ndrop = { current = "v_C1" }\n',
     "is not a measured current"),
    ('signal = "v_out"\ncross_check = "v_C1"\nband = "5 V"\ndrop = { current = "i_L2", C = "1 F" }\n',
     "interlocks[0].drop"),
])
def test_bad_cross_check_keys_are_one_clear_error(row, fragment):
    with pytest.raises(ScenarioError) as info:
        _parse(row)
    assert fragment in str(info.value), str(info.value)
