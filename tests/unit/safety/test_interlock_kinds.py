"""Interlock kinds beyond above/below (magnitude, frozen), the derived signals p_out and
dv_out_dt, the watchdogs, and their scenario keys.

The kernels (protect, watch, supervise) are called tick by tick from Python on synthetic signals,
both compiled and as plain Python (for a Python traceback on failure). Expected trip ticks come
from the trip semantics written out in each test; derived signals are checked against
references computed here with numpy, independently of the kernel. Signal levels are demo data.
"""
import math
from importlib.resources import files

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.scenario import parse_scenario
from hilrig.safety.interlocks import (BIT_LATCHED, BIT_RESET_REFUSED, BIT_RESET_REQUESTED,
                                      BIT_WATCHDOG, CAUSE_CONTROLLER, CAUSE_NONFINITE,
                                      CAUSE_WATCHDOG, DERIVED, EVT_RESET_ACCEPTED,
                                      EVT_RESET_REFUSED, EVT_TRIP, HOST_GAP, HOST_LOST,
                                      HOST_STALE, L_CAUSE, L_TICK, L_TRIPPED, L_VALUE, SIDE_ABOVE,
                                      SIDE_BELOW, SIDE_FROZEN, SIDE_MAGNITUDE, W_CNT,
                                      W_FORCED, W_HOST_BITS, W_HOST_TIME, W_HOST_VALUE, Interlock,
                                      InterlockTable, new_event_log, new_latch, new_watchdog,
                                      protect, supervise, watch)

TS = 50e-6  # demo data: 20 kHz control
Y_NAMES = ["v_out", "i_out", "i_L1"]
U_NAMES = ["u"]
DERIVED_NAMES = [d[0] for d in DERIVED]
NAMES = Y_NAMES + U_NAMES + DERIVED_NAMES   # the protect vector, as runtime/run.py builds it
V_OUT, I_OUT, I_L1 = range(3)
P_OUT = len(Y_NAMES) + len(U_NAMES)         # derived signals follow [y..., u...]
DV_OUT_DT = P_OUT + 1
U_CMD = 350.0   # demo data: the controller's command before protect
SAFE_U = 7.5    # demo data: distinct from 0 and from U_CMD, so forcing it is visible
BIT50 = 1 << BIT_LATCHED


KERNELS = pytest.mark.parametrize("jit", [True, False], ids=["njit", "python"])


def _k(kernel, jit):
    """The compiled kernel, or its plain-Python form (under NUMBA_DISABLE_JIT=1 the same)."""
    return kernel if jit else getattr(kernel, "py_func", kernel)


def mag(signal, threshold, debounce=1, unit=""):
    return Interlock(signal, threshold, debounce=debounce, unit=unit, side=SIDE_MAGNITUDE)


def frozen(signal, ticks):
    return Interlock(signal, 0.0, debounce=ticks, side=SIDE_FROZEN)


class Rig:
    """The arrays the loop hands to watch and protect, for one interlock table."""

    def __init__(self, rows, jit=True, dix=(V_OUT, I_OUT), budget=0.0, wd_debounce=1):
        self.table = InterlockTable.build(rows, NAMES)
        self.cnt = np.zeros(len(rows), dtype=np.int64)
        self.latch = new_latch()
        m = len(Y_NAMES) + len(U_NAMES) + len(DERIVED)
        self.pv = np.zeros(2 * m)   # this tick's vector and the last tick's
        self.dix = np.array(dix, dtype=np.int64)
        self.safe_u = np.full(len(U_NAMES), SAFE_U)
        self.wd = new_watchdog(budget, wd_debounce)
        self.protect = _k(protect, jit)
        self.watch = _k(watch, jit)
        self.tick = 0

    def step(self, v_out=400.0, i_out=100.0, i_l1=100.0, u=U_CMD, code=0, with_watch=False):
        """One tick (watch first when asked, as in the loop); returns (word, u after protect)."""
        y = np.array([v_out, i_out, i_l1], dtype=np.float64)
        uu = np.array([u], dtype=np.float64)
        tb = self.table
        t = self.tick * TS
        word = self.watch(self.tick, t, self.wd, self.latch) if with_watch else 0
        word |= self.protect(self.tick, t, TS, y, uu, code, self.dix, tb.sig, tb.side, tb.thr,
                             tb.deb, self.cnt, self.latch, self.pv, self.safe_u)
        self.tick += 1
        return int(word), float(uu[0])

    @property
    def p_out(self):
        return float(self.pv[P_OUT])

    @property
    def dv_out_dt(self):
        return float(self.pv[DV_OUT_DT])

    @property
    def tripped(self):
        return self.latch[L_TRIPPED] != 0.0

    @property
    def cause(self):
        return int(self.latch[L_CAUSE])


@pytest.fixture(scope="module", autouse=True)
def compile_once():
    # one compile of each kernel for the whole module; every call below uses the same types
    rig = Rig([mag("v_out", 480.0)], budget=1e-4)
    rig.step(with_watch=True)
    log, n = new_event_log()
    supervise(0, 0.0, 0, rig.latch, np.zeros(0), np.zeros(1, dtype=np.int64), log, n)


def run_until_trip(rig, **series):
    """Feed equally long series (keyword = Rig.step argument); return the trip tick or None."""
    n = len(next(iter(series.values())))
    for k in range(n):
        rig.step(**{name: s[k] for name, s in series.items()})
        if rig.tripped:
            return int(rig.latch[L_TICK])
    return None


# --- magnitude side ------------------------------------------------------------------------

@KERNELS
@pytest.mark.parametrize("sign", [1.0, -1.0], ids=["positive", "negative"])
def test_magnitude_trips_on_the_first_tick_strictly_beyond_in_either_direction(jit, sign):
    rig = Rig([mag("i_out", 300.0, unit="A")], jit)
    # at the limit is not beyond it (common practice, no source): |+-300| holds, the next
    # representable value beyond trips
    for v in (0.0, -sign * 299.0, sign * 299.9, sign * 300.0, -sign * 300.0):
        word, u = rig.step(i_out=v)
        assert not rig.tripped and word == 0 and u == U_CMD
    beyond = sign * math.nextafter(300.0, math.inf)
    word, u = rig.step(i_out=beyond)
    assert rig.tripped and rig.cause == 1 and rig.latch[L_TICK] == 5.0
    assert rig.latch[L_VALUE] == beyond
    assert word == 1 | BIT50 and u == SAFE_U


@KERNELS
def test_magnitude_debounce_counts_ticks_beyond_on_either_side(jit):
    # |v| beyond on both sides in a row counts as one run: alternating sign trips on the 3rd
    rig = Rig([mag("i_out", 300.0, debounce=3)], jit)
    assert run_until_trip(rig, i_out=[0.0, 400.0, -400.0, 0.0, 400.0, -400.0, 400.0, 0.0]) == 6


@KERNELS
def test_magnitude_row_holds_on_nan(jit):
    # NaN is beyond every limit; here the non-finite plausibility check latches first (it is
    # evaluated before the rows), but the row's own bit shows that it holds as well
    rig = Rig([mag("i_out", 300.0, debounce=1)], jit)
    rig.step()
    word, u = rig.step(i_out=math.nan)
    assert rig.tripped and rig.latch[L_TICK] == 1.0 and u == SAFE_U
    assert rig.cause == CAUSE_NONFINITE + I_OUT
    assert word & 1 and word & BIT50


@KERNELS
def test_magnitude_on_a_derived_signal_trips_on_overflow_to_infinity(jit):
    # finite measurements whose product overflows: p_out is +inf, beyond any magnitude limit
    rig = Rig([mag("p_out", 1e6)], jit)
    # as plain Python the product is a numpy scalar, which warns on overflow
    with np.errstate(over="ignore"):
        word, u = rig.step(v_out=1e200, i_out=-1e200)
    assert rig.p_out == -math.inf  # IEEE 754 overflow rounds to infinity (from memory)
    assert rig.tripped and rig.cause == 1 and rig.latch[L_VALUE] == -math.inf and u == SAFE_U


# --- dv_out_dt -----------------------------------------------------------------------------

@KERNELS
def test_dv_out_dt_is_the_backward_difference(jit):
    rng = np.random.default_rng(7)
    v = 400.0 + rng.normal(0.0, 5.0, 50)   # demo data
    rig = Rig([], jit)
    got = []
    for x in v:
        rig.step(v_out=x)
        got.append(rig.dv_out_dt)
    # reference: numpy.diff (backward difference over one tick, divided by Ts), 0 on tick 0
    ref = np.concatenate([[0.0], np.diff(v) / TS])
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=0.0)
    assert got[0] == 0.0


@KERNELS
def test_dv_out_dt_is_zero_on_tick_zero_whatever_the_level(jit):
    # no previous sample on tick 0: a first value far from 0 is no step
    rig = Rig([mag("dv_out_dt", 1.0, unit="V/s")], jit)
    word, u = rig.step(v_out=1e4)
    assert rig.dv_out_dt == 0.0 and not rig.tripped and word == 0 and u == U_CMD


@KERNELS
@pytest.mark.parametrize("direction", [1.0, -1.0], ids=["rising", "falling"])
def test_ramp_trips_a_lower_rate_limit_on_the_first_tick_after_the_ramp_starts(jit, direction):
    slope = 1e6 * direction     # demo data: 1 MV/s, i.e. 50 V per 50 us tick
    k0 = 6                      # last flat tick; the ramp's first step is tick k0 + 1
    ticks = np.arange(20)
    v = 400.0 + slope * TS * np.clip(ticks - k0, 0, None)
    rig = Rig([mag("dv_out_dt", 0.9e6, unit="V/s")], jit)
    trip = run_until_trip(rig, v_out=v)
    assert trip == k0 + 1
    assert rig.latch[L_VALUE] == pytest.approx(slope, rel=1e-9)
    # a limit above the slope never trips on the same ramp
    rig2 = Rig([mag("dv_out_dt", 1.1e6, unit="V/s")], jit)
    assert run_until_trip(rig2, v_out=v) is None


def test_dv_out_dt_and_p_out_are_zero_when_the_plant_lacks_their_inputs():
    rig = Rig([], dix=(V_OUT, -1))
    rig.step(v_out=400.0, i_out=100.0)
    rig.step(v_out=410.0, i_out=100.0)
    assert rig.p_out == 0.0 and rig.dv_out_dt == pytest.approx(10.0 / TS, rel=1e-12)
    rig = Rig([], dix=(-1, -1))
    rig.step(v_out=400.0)
    rig.step(v_out=410.0)
    assert rig.p_out == 0.0 and rig.dv_out_dt == 0.0


# --- p_out ---------------------------------------------------------------------------------

@KERNELS
def test_p_out_is_v_times_i_and_trips_above(jit):
    rng = np.random.default_rng(3)
    v = rng.uniform(380.0, 420.0, 40)                  # demo data
    i = np.linspace(100.0, 250.0, 40)                  # demo data: a current ramp
    limit = 80e3                                       # demo data: 80 kW
    rig = Rig([Interlock("p_out", limit, above=True, unit="W")], jit)
    p = []
    for k in range(len(v)):
        rig.step(v_out=v[k], i_out=i[k])
        p.append(rig.p_out)
        if rig.tripped:
            break
    # electrical power P = V I (handbook formula)
    np.testing.assert_allclose(p, v[:len(p)] * i[:len(p)], rtol=1e-15, atol=0.0)
    first = int(np.argmax(v * i > limit))
    assert first > 0 and np.all(v[:first] * i[:first] <= limit)
    assert rig.tripped and rig.latch[L_TICK] == first and rig.cause == 1
    assert rig.latch[L_VALUE] == pytest.approx(v[first] * i[first], rel=1e-15)


# --- frozen --------------------------------------------------------------------------------

def _moving_u(n):
    return [U_CMD + 0.1 * k for k in range(n)]


@KERNELS
@pytest.mark.parametrize("n", [1, 3, 8])
def test_frozen_trips_after_exactly_n_unchanged_ticks_while_u_moves(jit, n):
    # i_L1 changes on ticks 0..4 and is unchanged from tick 5 on (equal to tick 4): the n-th
    # unchanged tick is 4 + n
    i_l1 = [100.0 + k for k in range(5)] + [104.0] * 20
    rig = Rig([frozen("i_L1", n)], jit)
    words = []
    for k in range(len(i_l1)):
        w, u = rig.step(i_l1=i_l1[k], u=_moving_u(len(i_l1))[k])
        words.append(w)
        if rig.tripped:
            break
    assert rig.latch[L_TICK] == 4 + n and rig.cause == 1 and u == SAFE_U
    assert rig.latch[L_VALUE] == 104.0
    # the row bit is set on every unchanged tick, also before the count is reached
    assert [w & 1 for w in words] == [0] * 5 + [1] * n


@KERNELS
def test_frozen_does_not_trip_while_u_is_constant(jit):
    # an unchanged measurement under an unchanged command is a steady state, not a frozen sensor
    rig = Rig([frozen("i_L1", 2)], jit)
    for k in range(30):
        word, u = rig.step(i_l1=104.0, u=U_CMD)
        assert word == 0
    assert not rig.tripped


@KERNELS
def test_frozen_ignores_command_changes_of_rounding_size(jit):
    # At a settled operating point an integrator moves the command by a few units in the last
    # place while the plant's output stays exactly put (seen with the demo plant at its start
    # equilibrium): no stuck sensor. A change of 1e-6 of the command, far below anything a
    # sensor resolves but far above rounding, does count. (Rounding: IEEE 754 double, unit
    # roundoff 2^-53, common practice, no source.)
    ulps = [U_CMD, np.nextafter(U_CMD, np.inf), np.nextafter(np.nextafter(U_CMD, np.inf), np.inf)]
    rig = Rig([frozen("i_L1", 2)], jit)
    for k in range(30):
        word, u = rig.step(i_l1=104.0, u=ulps[k % 3])
        assert word == 0
    assert not rig.tripped
    u_small = [U_CMD * (1.0 + 1e-6 * k) for k in range(10)]
    rig = Rig([frozen("i_L1", 2)], jit)
    assert run_until_trip(rig, i_l1=[104.0] * 10, u=u_small) == 2


@KERNELS
def test_a_single_changed_sample_resets_the_frozen_count(jit):
    n = 4
    # unchanged on ticks 1..3 (n - 1 ticks), changed on tick 4, unchanged from tick 5: the n-th
    # unchanged tick after the change is 4 + n (without the reset it would be tick 5)
    i_l1 = [100.0] * 4 + [101.0] + [101.0] * 10
    rig = Rig([frozen("i_L1", n)], jit)
    assert run_until_trip(rig, i_l1=i_l1, u=_moving_u(len(i_l1))) == 4 + n


@KERNELS
def test_frozen_is_not_fooled_by_a_value_returning_to_an_older_level(jit):
    # only the last tick counts: A, B, A, B ... is never frozen
    rig = Rig([frozen("v_out", 2)], jit)
    assert run_until_trip(rig, v_out=[400.0, 401.0] * 10, u=_moving_u(20)) is None


# --- watchdogs -----------------------------------------------------------------------------

BUDGET = 100e-6   # demo data: 100 us compute budget


@KERNELS
@pytest.mark.parametrize("slot", [W_HOST_TIME, W_FORCED], ids=["measured", "forced"])
@pytest.mark.parametrize("deb", [1, 3])
def test_overrun_trips_on_the_debounce_th_consecutive_tick_over_budget(jit, slot, deb):
    w = _k(watch, jit)
    wd, latch = new_watchdog(BUDGET, deb), new_latch()
    # at the budget is not over it; over from tick 3 on
    late = [50e-6, BUDGET, BUDGET, 120e-6, 130e-6, 140e-6, 150e-6, 160e-6]
    for k, x in enumerate(late):
        wd[slot] = x
        word = w(k, k * TS, wd, latch)
        assert word == ((1 << BIT_WATCHDOG) if x > BUDGET else 0)
        if latch[L_TRIPPED]:
            break
    assert latch[L_TICK] == 3 + deb - 1
    assert latch[L_CAUSE] == CAUSE_WATCHDOG + 0 and latch[L_VALUE] == late[3 + deb - 1]


@KERNELS
def test_overrun_takes_the_larger_of_measured_and_forced_time(jit):
    w = _k(watch, jit)
    wd, latch = new_watchdog(BUDGET, 1), new_latch()
    wd[W_HOST_TIME], wd[W_FORCED] = 20e-6, 90e-6
    assert w(0, 0.0, wd, latch) == 0 and not latch[L_TRIPPED]
    wd[W_HOST_TIME], wd[W_FORCED] = 130e-6, 110e-6
    assert w(1, TS, wd, latch) == 1 << BIT_WATCHDOG
    assert latch[L_TRIPPED] and latch[L_VALUE] == 130e-6


@KERNELS
def test_an_overrun_gap_resets_the_count(jit):
    w = _k(watch, jit)
    wd, latch = new_watchdog(BUDGET, 3), new_latch()
    late = [200e-6, 200e-6, 10e-6, 200e-6, 200e-6, 200e-6]
    for k, x in enumerate(late):
        wd[W_HOST_TIME] = x
        w(k, k * TS, wd, latch)
        if latch[L_TRIPPED]:
            break
    assert latch[L_TICK] == 5


@KERNELS
def test_budget_zero_is_off(jit):
    w = _k(watch, jit)
    wd, latch = new_watchdog(0.0, 1), new_latch()
    for k, x in enumerate([1.0, 1e3, math.inf, 10.0]):
        wd[W_HOST_TIME] = x
        wd[W_FORCED] = x
        assert w(k, k * TS, wd, latch) == 0
    assert not latch[L_TRIPPED] and wd[W_CNT] == 0.0


@KERNELS
def test_nan_compute_time_counts_as_an_overrun(jit):
    # as for the limits, the comparison is written so that NaN trips
    w = _k(watch, jit)
    wd, latch = new_watchdog(BUDGET, 1), new_latch()
    wd[W_HOST_TIME] = math.nan
    assert w(0, 0.0, wd, latch) == 1 << BIT_WATCHDOG and latch[L_TRIPPED]


@KERNELS
@pytest.mark.parametrize("bit, index, name", [(HOST_STALE, 1, "watchdog stale"),
                                              (HOST_GAP, 2, "watchdog sequence gap"),
                                              (HOST_LOST, 3, "watchdog peer lost")])
def test_host_bits_trip_with_their_cause_and_value(jit, bit, index, name):
    w = _k(watch, jit)
    wd, latch = new_watchdog(0.0, 1), new_latch()
    assert w(0, 0.0, wd, latch) == 0
    wd[W_HOST_BITS] = bit
    wd[W_HOST_VALUE] = 0.125   # demo data: seconds since the last fresh sample
    word = w(1, TS, wd, latch)
    assert word == 1 << (BIT_WATCHDOG + index)
    assert latch[:5].tolist() == [1.0, CAUSE_WATCHDOG + index, 1.0, TS, 0.125]
    assert InterlockTable.build([], NAMES).cause_id(int(latch[L_CAUSE])) == name


@KERNELS
def test_watchdog_and_limit_on_the_same_tick_keep_the_watchdog_as_first_cause(jit):
    # watch runs before protect in the loop: a watchdog firing on the same tick as a limit is
    # the first cause; the safe output is still forced on that tick by protect
    rig = Rig([Interlock("v_out", 480.0, above=True)], jit, budget=BUDGET, wd_debounce=1)
    rig.step(with_watch=True)
    rig.wd[W_FORCED] = 150e-6
    word, u = rig.step(v_out=500.0, with_watch=True)
    assert rig.cause == CAUSE_WATCHDOG and rig.latch[L_TICK] == 1.0
    assert rig.latch[L_VALUE] == 150e-6
    assert word == (1 << BIT_WATCHDOG) | 1 | BIT50 and u == SAFE_U
    assert rig.table.cause_id(rig.cause) == "watchdog overrun"


@KERNELS
def test_watchdog_trip_alone_forces_the_safe_output(jit):
    rig = Rig([], jit)
    rig.wd[W_HOST_BITS] = HOST_LOST
    word, u = rig.step(with_watch=True)
    assert rig.cause == CAUSE_WATCHDOG + 3 and u == SAFE_U
    assert word == (1 << (BIT_WATCHDOG + 3)) | BIT50


# --- reset while a watchdog condition holds ------------------------------------------------

@KERNELS
def test_reset_is_refused_while_a_watchdog_holds_and_accepted_after(jit):
    sup = _k(supervise, jit)
    rig = Rig([], jit)
    reset_t = np.array([2 * TS, 4 * TS])
    reset_i = np.zeros(1, dtype=np.int64)
    log, n = new_event_log()
    words = []
    for k in range(6):
        # the link is stale on ticks 0..2, fresh from tick 3
        rig.wd[W_HOST_BITS] = HOST_STALE if k <= 2 else 0.0
        rig.wd[W_HOST_VALUE] = 0.06
        t = k * TS
        word, _ = rig.step(with_watch=True)
        words.append(int(sup(k, t, word, rig.latch, reset_t, reset_i, log, n)))
    events = [(int(r[0]), int(r[1]), int(r[2])) for r in log[:n[0]]]
    assert events == [(0, EVT_TRIP, CAUSE_WATCHDOG + 1), (2, EVT_RESET_REFUSED, CAUSE_WATCHDOG + 1),
                      (4, EVT_RESET_ACCEPTED, CAUSE_WATCHDOG + 1)]
    assert words[2] & (1 << BIT_RESET_REQUESTED) and words[2] & (1 << BIT_RESET_REFUSED)
    assert words[2] & (1 << (BIT_WATCHDOG + 1)) and words[2] & BIT50
    assert words[3] == BIT50                                   # latched, no condition
    assert words[4] & (1 << BIT_RESET_REQUESTED) and not words[4] & (1 << BIT_RESET_REFUSED)
    assert not words[4] & BIT50 and not rig.latch[L_TRIPPED]
    assert words[5] == 0


@KERNELS
@pytest.mark.parametrize("index", range(4))
def test_every_watchdog_bit_blocks_a_reset(jit, index):
    sup = _k(supervise, jit)
    latch = new_latch()
    latch[L_TRIPPED], latch[L_CAUSE] = 1.0, CAUSE_WATCHDOG + index
    log, n = new_event_log()
    word = (1 << (BIT_WATCHDOG + index)) | BIT50
    out = int(sup(3, 3 * TS, word, latch, np.array([0.0]), np.zeros(1, dtype=np.int64), log, n))
    assert out & (1 << BIT_RESET_REFUSED) and latch[L_TRIPPED]
    # the same request without the watchdog bit is accepted
    log, n = new_event_log()
    out = int(sup(3, 3 * TS, BIT50, latch, np.array([0.0]), np.zeros(1, dtype=np.int64), log, n))
    assert not out & (1 << BIT_RESET_REFUSED) and not latch[L_TRIPPED]


# --- cause names ---------------------------------------------------------------------------

def test_cause_ids_name_signal_and_side():
    tb = InterlockTable.build([Interlock("v_out", 480.0, above=True),
                               mag("dv_out_dt", 1e6, unit="V/s"),
                               frozen("v_out", 5),
                               Interlock("v_out", 300.0, above=False),
                               Interlock("p_out", 80e3, above=True, unit="W")], NAMES)
    assert tb.side.tolist() == [SIDE_ABOVE, SIDE_MAGNITUDE, SIDE_FROZEN, SIDE_BELOW, SIDE_ABOVE]
    assert tb.sig.tolist() == [V_OUT, DV_OUT_DT, V_OUT, V_OUT, P_OUT]
    assert [tb.cause_id(c) for c in range(1, 6)] == [
        "v_out above", "dv_out_dt magnitude_above", "v_out frozen", "v_out below", "p_out above"]
    assert tb.cause_id(CAUSE_WATCHDOG) == "watchdog overrun"
    assert tb.cause_id(CAUSE_WATCHDOG + 1) == "watchdog stale"
    assert tb.cause_id(CAUSE_NONFINITE + V_OUT) == "non-finite v_out"
    assert tb.cause_id(CAUSE_CONTROLLER + 5) == "controller fault"
    assert tb.cause_id(-CAUSE_CONTROLLER - 1) == "controller fault"
    assert tb.cause_text(2) == "interlock |dv_out_dt| > 1e+06 V/s"
    assert tb.cause_text(3) == "interlock v_out frozen for 5 ticks"


def test_frozen_on_a_derived_signal_is_refused_by_the_table():
    from hilrig.safety.errors import InterlockConfigError
    for sig in DERIVED_NAMES:
        with pytest.raises(InterlockConfigError, match="derived, not measured"):
            InterlockTable.build([frozen(sig, 3)], NAMES)


# --- property: a tighter magnitude limit never trips later (common practice, no source) -----

def oracle_magnitude_trip(values, threshold, debounce):
    """First non-finite value, or the tick where the run of |v| > threshold reaches debounce."""
    run = 0
    for k, v in enumerate(values):
        if not math.isfinite(v):
            return k
        run = run + 1 if abs(v) > threshold else 0
        if run >= debounce:
            return k
    return math.inf


def kernel_magnitude_trip(values, threshold, debounce):
    rig = Rig([mag("i_out", threshold, debounce=debounce)])
    tick = run_until_trip(rig, i_out=values)
    return math.inf if tick is None else tick


_level = st.floats(min_value=-1000.0, max_value=1000.0, allow_nan=False)
_limit = st.floats(min_value=0.0, max_value=1000.0, allow_nan=False)
_signal = st.lists(_level | st.sampled_from([math.nan, math.inf, -math.inf, 0.0, 300.0, -300.0]),
                   min_size=1, max_size=40)


@settings(max_examples=60, deadline=None)
@given(values=_signal, a=_limit, b=_limit, debounce=st.integers(1, 5))
def test_tighter_magnitude_limit_never_trips_later(values, a, b, debounce):
    tight, loose = min(a, b), max(a, b)
    t_tight = kernel_magnitude_trip(values, tight, debounce)
    t_loose = kernel_magnitude_trip(values, loose, debounce)
    assert t_tight <= t_loose
    assert t_tight == oracle_magnitude_trip(values, tight, debounce)
    assert t_loose == oracle_magnitude_trip(values, loose, debounce)


# --- scenario keys -------------------------------------------------------------------------

DEMO = (files("hilrig.runtime") / "data" / "demo.toml").read_text(encoding="utf-8")
NAME = "kinds.toml"
N_DEMO_INTERLOCKS = DEMO.count("[[interlocks]]")


def expect_error(text, *fragments, name=NAME, path=""):
    with pytest.raises(ScenarioError) as info:
        parse_scenario(text, name=name, path=path)
    msg = str(info.value)
    assert msg.startswith(f"{name}: "), msg
    for frag in fragments:
        assert frag in msg, f"{frag!r} missing from {msg!r}"
    return msg


def test_new_interlock_watchdog_and_fault_keys_parse_to_si_values():
    sc = parse_scenario(DEMO + """
[[interlocks]]
signal = "dv_out_dt"
magnitude_above = "1 MV/s"
[[interlocks]]
signal = "i_L1"
frozen = 5
[[interlocks]]
signal = "p_out"
above = "90 kW"
debounce = 2
[watchdogs]
overrun_budget = "40 us"
overrun_ticks = 3
[[faults]]
kind = "offset"
signal = "v_out"
value = "5 V"
start = "0.1 s"
duration = "10 ms"
when = { signal = "i_out", above = "100 A" }
[[faults]]
kind = "overrun"
start = "0.2 s"
value = "80 us"
""", name=NAME)
    new = sc.interlocks[N_DEMO_INTERLOCKS:]
    assert new == [
        Interlock("dv_out_dt", 1e6, above=True, debounce=1, unit="V/s", side=SIDE_MAGNITUDE),
        Interlock("i_L1", 0.0, debounce=5, unit="A", side=SIDE_FROZEN),
        Interlock("p_out", 90e3, above=True, debounce=2, unit="W", side=SIDE_ABOVE)]
    assert sc.watchdogs["overrun_budget"] == pytest.approx(40e-6, rel=1e-15)
    assert sc.watchdogs["overrun_ticks"] == 3
    cond, over = sc.faults
    assert (cond.kind, cond.signal, cond.value, cond.start) == ("offset", "v_out", 5.0, 0.1)
    assert (cond.when_signal, cond.when_side, cond.when_threshold) == ("i_out", "above", 100.0)
    assert cond.duration == pytest.approx(0.01, rel=1e-15) and cond.end == math.inf
    assert cond.conditional and not over.conditional
    assert (over.kind, over.start) == ("overrun", 0.2)
    assert over.value == pytest.approx(80e-6, rel=1e-15)


def _interlock(body):
    return DEMO + "\n[[interlocks]]\n" + body + "\n"


def _fault(body):
    return DEMO + "\n[[faults]]\n" + body + "\n"


WHERE = f"interlocks[{N_DEMO_INTERLOCKS}]"


@pytest.mark.parametrize("text, fragments", [
    (_interlock('signal = "v_out"\nabove = "480 V"\nfrozen = 5'),
     [WHERE, "needs exactly one of 'above', 'below', 'magnitude_above', 'frozen' or 'cross_check'"]),
    (_interlock('signal = "v_out"'),
     [WHERE, "needs exactly one of"]),
    (_interlock('signal = "p_out"\nfrozen = 5'),
     [f"{WHERE}.signal = 'p_out'", "only a measured signal can be frozen"]),
    (_interlock('signal = "u"\nfrozen = 5'),
     [f"{WHERE}.signal = 'u'", "only a measured signal can be frozen"]),
    (_interlock('signal = "v_out"\nfrozen = 5\ndebounce = 2'),
     [WHERE, "'frozen' is itself the tick count; remove 'debounce'"]),
    (_interlock('signal = "v_out"\nfrozen = 0'),
     [f"{WHERE}.frozen = 0", "whole number of ticks"]),
    (_interlock('signal = "dv_out_dt"\nmagnitude_above = "-1 V/s"'),
     [f"{WHERE}.magnitude_above", "outside [0, 1e+09] V/s"]),
    (_interlock('signal = "dv_out_dt"\nmagnitude_above = "5 V"'),
     [f"{WHERE}.magnitude_above", "expected V/s"]),
    (_interlock('signal = "p_outt"\nabove = "90 kW"'),
     [f"{WHERE}.signal = 'p_outt'", "did you mean 'p_out'"]),
    (_fault('kind = "offset"\nsignal = "v_out"\nvalue = "5 V"\nstart = "0.1 s"\nend = "0.2 s"\n'
            'when = { signal = "i_out", above = "100 A" }'),
     ["faults[0].end", "a conditional fault has no fixed end; give its 'duration' instead"]),
    (_fault('kind = "offset"\nsignal = "v_out"\nvalue = "5 V"\nstart = "0.1 s"\nduration = "10 ms"'),
     ["faults[0].duration", "only a conditional fault (with 'when') takes a duration"]),
    (_fault('kind = "offset"\nsignal = "v_out"\nvalue = "5 V"\n'
            'when = { signal = "i_outt", above = "100 A" }'),
     ["faults[0].when.signal = 'i_outt' is not a measured signal", "did you mean 'i_out'"]),
    (_fault('kind = "offset"\nsignal = "v_out"\nvalue = "5 V"\n'
            'when = { signal = "u", above = "100 V" }'),
     ["faults[0].when.signal = 'u' is not a measured signal"]),
    (_fault('kind = "offset"\nsignal = "v_out"\nvalue = "5 V"\n'
            'when = { signal = "i_out", above = "100 A", below = "10 A" }'),
     ["faults[0].when", "needs exactly one of 'above' or 'below'"]),
    (_fault('kind = "offset"\nsignal = "v_out"\nvalue = "5 V"\n'
            'when = { signal = "i_out", above = "100 V" }'),
     ["faults[0].when.above", "expected A"]),
    (_fault('kind = "offset"\nsignal = "v_out"\nvalue = "5 V"\nwhen = "i_out > 100"'),
     ["faults[0].when = 'i_out > 100' is not a table"]),
    (_fault('kind = "overrun"\nstart = "0.1 s"\nvalue = "0 s"'),
     ["faults[0].value", "outside (0, 1e+09] s"]),
    (_fault('kind = "overrun"\nstart = "0.1 s"'),
     ["faults[0] (overrun) needs a value"]),
    (DEMO + '\n[watchdogs]\noverrun_budget = "50 V"\n',
     ["watchdogs.overrun_budget", "expected s"]),
    (DEMO + '\n[watchdogs]\noverrun_tick = 3\n',
     ["unknown key 'watchdogs.overrun_tick'", "did you mean 'overrun_ticks'"]),
], ids=["above and frozen", "no side", "frozen on p_out", "frozen on a controller output",
        "debounce with frozen", "frozen zero", "negative magnitude", "magnitude unit",
        "derived name typo", "conditional with end", "duration without when", "bad when signal",
        "when on a controller output", "when with both sides", "when threshold unit",
        "when not a table", "overrun zero", "overrun without value", "watchdog budget unit",
        "watchdog key typo"])
def test_bad_new_keys_are_refused_clearly(text, fragments):
    expect_error(text, *fragments)


V_ONLY_PLANT = '''
"""First-order test plant that measures v_out only (test data)."""
import numpy as np
from numba import njit
from hilrig.plugins.base import Declaration, Param, Signal

def _equilibrium(values, v_out, d):
    return np.array([v_out])

DECLARATION = Declaration(
    kind="plant", name="v_only", summary="first-order test plant, v_out only",
    params=(Param("tau", "s", 1e-3, (0.0, 1.0), "time constant", lower_open=True),),
    states=(Signal("v_out", "V"),), inputs=(Signal("u", "V"),),
    outputs=(Signal("v_out", "V"),), source="test only", equilibrium=_equilibrium)

@njit
def derivs(t, p, x, u, d):
    return ((u[0] - x[0]) / p[0],)

@njit
def outputs(t, p, x, u, d, y):
    y[0] = x[0]
'''

V_ONLY_SCENARIO = '''
title = "v_out-only plant (test data)"
[timing]
Ts = "100 us"
duration = "10 ms"
[plant]
plugin = "v_only.py"
[reference]
plugin = "profile"
points = [[0, 400]]
[[interlocks]]
signal = "{signal}"
{side}
'''


def test_p_out_needs_a_plant_that_measures_i_out(tmp_path):
    (tmp_path / "v_only.py").write_text(V_ONLY_PLANT)
    path = str(tmp_path / NAME)
    # dv_out_dt needs v_out only: accepted on this plant (so the refusal below is about i_out)
    ok = parse_scenario(V_ONLY_SCENARIO.format(signal="dv_out_dt", side='magnitude_above = "1 MV/s"'),
                        name=NAME, path=path)
    assert ok.interlocks[0].signal == "dv_out_dt"
    msg = expect_error(V_ONLY_SCENARIO.format(signal="p_out", side='above = "10 kW"'),
                       "interlocks[0].signal = 'p_out' is not a signal of this plant",
                       "dv_out_dt", path=path)
    signals = msg.split("(signals: ")[1]
    assert "p_out" not in signals


@KERNELS
def test_frozen_command_comparison_does_not_overflow(jit):
    # commands of opposite sign near the largest double: their difference overflows, so the
    # comparison works on halves (plain Python would warn, and warnings are errors here)
    big = np.finfo(np.float64).max
    rig = Rig([frozen("i_L1", 2)], jit)
    assert run_until_trip(rig, i_l1=[104.0] * 4, u=[big, -big, big, -big]) == 2
