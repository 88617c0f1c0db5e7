"""The protect kernel, called tick by tick from Python on synthetic signals, and the table builder.

Expected trip ticks come from the trip semantics written out here (a limit is exceeded when the
value is strictly beyond it; debounce N means N consecutive ticks beyond; a trip latches its
first cause and forces the safe output on the same tick), checked against the compiled kernel
and, for a Python traceback on failure, against its pure-Python form.
"""
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hilrig.safety.errors import InterlockConfigError
from hilrig.safety.interlocks import (CAUSE_CONTROLLER, CAUSE_NONFINITE, L_CAUSE, L_TICK, L_TIME,
                                      L_TRIPPED, L_VALUE, MAX_ROWS, Interlock, InterlockTable,
                                      new_latch, protect)

TS = 50e-6  # demo data: 20 kHz control
Y_NAMES = ["v_out", "i_out", "i_L1"]
U_NAMES = ["u"]
NAMES = Y_NAMES + U_NAMES
V_OUT, I_OUT, I_L1 = range(3)
U_CMD = 350.0   # demo data: the controller's command before protect
SAFE_U = 7.5    # demo data: distinct from 0 and from U_CMD, so forcing it is visible
# interlock word layout as recorded (runtime/run.py, signal "interlock_word"): bit j for row j,
# bit 48 non-finite, bit 49 controller fault, bit 50 latched
BIT48, BIT49, BIT50 = 1 << 48, 1 << 49, 1 << 50

# the compiled kernel and its plain-Python form (which gives a Python traceback on failure);
# under NUMBA_DISABLE_JIT=1 protect is already the plain function
KERNELS = pytest.mark.parametrize("kernel", [protect, getattr(protect, "py_func", protect)],
                                  ids=["njit", "python"])


class Rig:
    """The arrays the loop hands to protect, for one interlock table."""

    def __init__(self, rows, kernel=protect):
        self.table = InterlockTable.build(rows, NAMES)
        self.cnt = np.zeros(len(rows), dtype=np.int64)
        self.latch = new_latch()
        self.pv = np.zeros(2 * (len(NAMES) + 2))  # this tick's and the last tick's vector
        self.dix = np.array([V_OUT, I_OUT], dtype=np.int64)
        self.safe_u = np.full(len(U_NAMES), SAFE_U)
        self.kernel = kernel
        self.tick = 0

    def step(self, v_out=400.0, i_out=100.0, i_l1=100.0, u=U_CMD, code=0):
        """One tick; returns (word, u after protect)."""
        y = np.array([v_out, i_out, i_l1], dtype=np.float64)
        uu = np.array([u], dtype=np.float64)
        tb = self.table
        word = self.kernel(self.tick, self.tick * TS, TS, y, uu, code, self.dix, tb.sig, tb.side,
                           tb.thr, tb.deb, self.cnt, self.latch, self.pv, self.safe_u)
        self.tick += 1
        return int(word), float(uu[0])

    @property
    def tripped(self):
        return self.latch[L_TRIPPED] != 0.0

    @property
    def cause(self):
        return int(self.latch[L_CAUSE])


@pytest.fixture(scope="module", autouse=True)
def compile_once():
    # one compile of the kernel for the whole module; every call below uses the same types
    Rig([Interlock("v_out", 480.0, above=True)]).step()


def run_until_trip(rig, **series):
    """Feed equally long series (keyword = Rig.step argument); return the trip tick or None."""
    n = len(next(iter(series.values())))
    for k in range(n):
        rig.step(**{name: s[k] for name, s in series.items()})
        if rig.tripped:
            return int(rig.latch[L_TICK])
    return None


# --- trip tick and debounce ----------------------------------------------------------------

@KERNELS
def test_above_trips_on_the_first_tick_strictly_beyond(kernel):
    rig = Rig([Interlock("v_out", 480.0, above=True, unit="V")], kernel)
    beyond = math.nextafter(480.0, math.inf)
    # at the limit is not beyond it (common practice, no source): tick 2 holds, tick 3 trips
    for v in (400.0, 479.9, 480.0):
        word, u = rig.step(v_out=v)
        assert not rig.tripped and word == 0 and u == U_CMD
    word, u = rig.step(v_out=beyond)
    assert rig.tripped
    assert rig.latch[:5].tolist() == [1.0, 1.0, 3.0, 3 * TS, beyond]  # cause 1 = row 0 + 1
    assert word == (1 << 0) | BIT50
    assert u == SAFE_U


@KERNELS
def test_below_trips_on_the_first_tick_strictly_beyond(kernel):
    rig = Rig([Interlock("v_out", 300.0, above=False, unit="V")], kernel)
    assert run_until_trip(rig, v_out=[400.0, 300.0, math.nextafter(300.0, 0.0), 250.0]) == 2
    assert rig.latch[L_VALUE] == math.nextafter(300.0, 0.0)


@KERNELS
def test_debounce_n_trips_on_the_nth_consecutive_tick(kernel):
    rig = Rig([Interlock("i_L1", 500.0, above=True, debounce=4, unit="A")], kernel)
    # beyond from tick 2 on: the 4th consecutive tick beyond is tick 5
    series = [100.0, 100.0, 600.0, 600.0, 600.0, 600.0, 600.0]
    for k in range(5):
        word, u = rig.step(i_l1=series[k])
        assert not rig.tripped and u == U_CMD
        assert word == (1 if series[k] > 500.0 else 0)  # row bit set before the debounce is met
    word, u = rig.step(i_l1=series[5])
    assert rig.tripped and rig.latch[L_TICK] == 5.0 and u == SAFE_U


@KERNELS
def test_a_gap_resets_the_debounce_count(kernel):
    rig = Rig([Interlock("i_L1", 500.0, above=True, debounce=3, unit="A")], kernel)
    # beyond, beyond, gap, beyond x3: without the reset it would trip at tick 3 (3rd beyond)
    assert run_until_trip(rig, i_l1=[600.0, 600.0, 500.0, 600.0, 600.0, 600.0, 600.0]) == 5


def test_debounce_one_is_no_debounce():
    rig = Rig([Interlock("i_L1", 500.0, above=True, debounce=1)])
    assert run_until_trip(rig, i_l1=[100.0, 501.0]) == 1


# --- latch and safe output -----------------------------------------------------------------

@KERNELS
def test_safe_output_is_forced_on_the_trip_tick_and_held(kernel):
    rig = Rig([Interlock("v_out", 480.0, above=True)], kernel)
    assert rig.step(v_out=400.0)[1] == U_CMD
    word, u = rig.step(v_out=500.0)
    assert u == SAFE_U and word == 1 | BIT50
    # back in range: the latch holds and the safe output stays (a stop is held until a separate
    # reset: ISO 13849-1:2023, 5.2.2.3, secondary source)
    word, u = rig.step(v_out=400.0)
    assert u == SAFE_U and word == BIT50 and rig.latch[L_TICK] == 1.0


@KERNELS
def test_first_cause_is_latched_and_not_overwritten(kernel):
    rig = Rig([Interlock("v_out", 480.0, above=True), Interlock("i_L1", 500.0, above=True),
               Interlock("v_out", 470.0, above=True)], kernel)
    rig.step()
    rig.step(i_l1=600.0)                   # tick 1: only row 1
    assert rig.latch[:5].tolist() == [1.0, 2.0, 1.0, TS, 600.0]
    rig.step(v_out=490.0, i_l1=700.0)      # tick 2: rows 0, 1, 2
    rig.step(v_out=math.nan, code=9)       # tick 3: plausibility causes
    assert rig.latch[:5].tolist() == [1.0, 2.0, 1.0, TS, 600.0]


@KERNELS
def test_rows_firing_together_latch_the_lowest_row(kernel):
    rig = Rig([Interlock("i_L1", 500.0, above=True), Interlock("v_out", 480.0, above=True),
               Interlock("v_out", 470.0, above=True)], kernel)
    word, _ = rig.step(v_out=490.0, i_l1=600.0)
    assert rig.cause == 1 and rig.latch[L_VALUE] == 600.0
    assert word == 0b111 | BIT50


@KERNELS
@pytest.mark.parametrize("nan_at, code, expected", [
    # non-finite first, then the controller code, then rows in order
    ("y", 5, CAUSE_NONFINITE + I_OUT),
    (None, 5, CAUSE_CONTROLLER + 5),
    (None, 0, 1),
])
def test_cause_priority_within_one_tick(kernel, nan_at, code, expected):
    rig = Rig([Interlock("v_out", 480.0, above=True)], kernel)
    rig.step(v_out=500.0, i_out=math.nan if nan_at else 100.0, code=code)
    assert rig.cause == expected and rig.latch[L_TICK] == 0.0


@KERNELS
def test_lowest_non_finite_index_is_the_cause(kernel):
    rig = Rig([], kernel)
    word, u = rig.step(i_out=math.inf, i_l1=math.nan, u=math.nan)
    assert rig.cause == CAUSE_NONFINITE + I_OUT and rig.latch[L_VALUE] == math.inf
    assert word == BIT48 | BIT50 and u == SAFE_U


# --- NaN and infinity ----------------------------------------------------------------------

@KERNELS
@pytest.mark.parametrize("value, above_bit, below_bit", [
    (math.nan, True, True),     # NaN is beyond every limit: no comparison with NaN is true
    (math.inf, True, False),
    (-math.inf, False, True),
])
def test_non_finite_measurement_trips_on_its_tick(kernel, value, above_bit, below_bit):
    rig = Rig([Interlock("v_out", 480.0, above=True), Interlock("v_out", 300.0, above=False)],
              kernel)
    rig.step()
    word, u = rig.step(v_out=value)
    assert rig.tripped and rig.latch[L_TICK] == 1.0 and u == SAFE_U
    assert rig.cause == CAUSE_NONFINITE + V_OUT
    assert rig.latch[L_VALUE] == value or (math.isnan(value) and math.isnan(rig.latch[L_VALUE]))
    assert word == BIT48 | BIT50 | (1 if above_bit else 0) | (2 if below_bit else 0)


@KERNELS
def test_non_finite_command_trips_and_is_replaced(kernel):
    rig = Rig([], kernel)
    word, u = rig.step(u=-math.inf)
    assert rig.cause == CAUSE_NONFINITE + len(Y_NAMES) and u == SAFE_U
    assert rig.table.cause_text(rig.cause, len(Y_NAMES)) == "non-finite value of u"


# --- controller fault code -----------------------------------------------------------------

@KERNELS
@pytest.mark.parametrize("code", [3, -1])
def test_non_zero_controller_code_trips(kernel, code):
    rig = Rig([], kernel)
    assert rig.step(code=0)[0] == 0 and not rig.tripped
    word, u = rig.step(code=code)
    assert rig.tripped and u == SAFE_U and word == BIT49 | BIT50
    assert rig.latch[L_VALUE] == float(code) and rig.latch[L_TICK] == 1.0
    # -1 is a common "failed" return; it must not read as a non-finite signal (cause 1999)
    assert rig.table.cause_text(rig.cause, len(Y_NAMES)) == f"controller fault code {code}"


# --- word bits -----------------------------------------------------------------------------

def test_word_has_one_bit_per_row_beyond_before_debounce():
    rows = [Interlock("v_out", 480.0, above=True, debounce=100),
            Interlock("i_L1", 500.0, above=True, debounce=100),
            Interlock("v_out", 300.0, above=False, debounce=100)]
    rig = Rig(rows)
    assert rig.step(v_out=490.0)[0] == 0b001
    assert rig.step(v_out=200.0, i_l1=600.0)[0] == 0b110
    assert rig.step()[0] == 0 and not rig.tripped


def test_highest_row_bit_stays_below_the_status_bits():
    rows = [Interlock("v_out", 480.0 + k, above=True, debounce=10) for k in range(MAX_ROWS)]
    rig = Rig(rows)
    word, _ = rig.step(v_out=1000.0)
    assert word == (1 << MAX_ROWS) - 1 and word < BIT48


# --- property: tighter limits never trip later (common practice, no source) -----------------

def oracle_trip_tick(values, threshold, above, debounce):
    """Trip tick by the written-out semantics: the first non-finite value, or the tick where the
    run of consecutive values strictly beyond the threshold reaches ``debounce``."""
    run = 0
    for k, v in enumerate(values):
        if not math.isfinite(v):
            return k
        run = run + 1 if ((v > threshold) if above else (v < threshold)) else 0
        if run >= debounce:
            return k
    return math.inf


def kernel_trip_tick(values, threshold, above, debounce):
    rig = Rig([Interlock("v_out", threshold, above=above, debounce=debounce)])
    tick = run_until_trip(rig, v_out=values)
    return math.inf if tick is None else tick


_level = st.floats(min_value=-1000.0, max_value=1000.0, allow_nan=False)
_signal = st.lists(_level | st.sampled_from([math.nan, math.inf, -math.inf, 0.0, 480.0]),
                   min_size=1, max_size=40)


@settings(max_examples=60, deadline=None)
@given(values=_signal, a=_level, b=_level, debounce=st.integers(1, 5))
def test_tighter_above_limit_never_trips_later(values, a, b, debounce):
    tight, loose = min(a, b), max(a, b)
    t_tight = kernel_trip_tick(values, tight, True, debounce)
    t_loose = kernel_trip_tick(values, loose, True, debounce)
    assert t_tight <= t_loose
    assert t_tight == oracle_trip_tick(values, tight, True, debounce)


@settings(max_examples=60, deadline=None)
@given(values=_signal, a=_level, b=_level, debounce=st.integers(1, 5))
def test_tighter_below_limit_never_trips_later(values, a, b, debounce):
    tight, loose = max(a, b), min(a, b)
    t_tight = kernel_trip_tick(values, tight, False, debounce)
    t_loose = kernel_trip_tick(values, loose, False, debounce)
    assert t_tight <= t_loose
    assert t_loose == oracle_trip_tick(values, loose, False, debounce)


@settings(max_examples=60, deadline=None)
@given(values=_signal, threshold=_level, above=st.booleans(), d1=st.integers(1, 6),
       d2=st.integers(1, 6))
def test_shorter_debounce_never_trips_later(values, threshold, above, d1, d2):
    short, long_ = min(d1, d2), max(d1, d2)
    t_short = kernel_trip_tick(values, threshold, above, short)
    assert t_short <= kernel_trip_tick(values, threshold, above, long_)
    assert t_short == oracle_trip_tick(values, threshold, above, short)


# --- table building ------------------------------------------------------------------------

def test_build_resolves_rows_against_the_signal_names():
    tb = InterlockTable.build([Interlock("i_L1", 500.0, above=True, debounce=1),
                               Interlock("u", -10.0, above=False, debounce=7)], NAMES)
    assert tb.sig.tolist() == [2, 3] and tb.side.tolist() == [1, 0]
    assert tb.thr.tolist() == [500.0, -10.0] and tb.deb.tolist() == [1, 7]
    assert (tb.sig.dtype, tb.side.dtype, tb.thr.dtype, tb.deb.dtype) == (
        np.int64, np.int64, np.float64, np.int64)
    # cause 2 = row 1 + 1; these rows carry no unit, so none is printed
    assert tb.cause_text(2, len(Y_NAMES)) == "interlock u < -10 for 7 ticks"


def test_build_rejects_unknown_signal_with_a_suggestion():
    with pytest.raises(InterlockConfigError) as info:
        InterlockTable.build([Interlock("v_ot", 480.0, above=True)], NAMES)
    assert isinstance(info.value, ValueError)
    assert "'v_ot'" in str(info.value) and "did you mean v_out" in str(info.value)


def test_build_lists_the_signals_when_nothing_is_close():
    with pytest.raises(InterlockConfigError, match="signals: v_out, i_out, i_L1, u"):
        InterlockTable.build([Interlock("temperature", 80.0, above=True)], NAMES)


@pytest.mark.parametrize("debounce", [0, -3])
def test_build_rejects_debounce_below_one(debounce):
    with pytest.raises(InterlockConfigError, match=f"debounce {debounce} < 1 tick"):
        InterlockTable.build([Interlock("v_out", 480.0, above=True, debounce=debounce)], NAMES)


@pytest.mark.parametrize("threshold", [math.nan, math.inf])
def test_build_rejects_non_finite_threshold(threshold):
    # a NaN limit trips on every tick, since every comparison is written so that NaN trips
    with pytest.raises(InterlockConfigError, match="not finite"):
        InterlockTable.build([Interlock("v_out", threshold, above=True, unit="V")], NAMES)


def test_build_rejects_more_rows_than_the_word_has_bits_for():
    rows = [Interlock("v_out", 480.0, above=True)] * (MAX_ROWS + 1)
    with pytest.raises(InterlockConfigError, match=f"at most {MAX_ROWS}"):
        InterlockTable.build(rows, NAMES)
