"""The sensor chain's kernel (runtime/sensors.py) against closed forms, and its scenario keys.

Outside references:
- first-order low-pass, tau = 1 / (2 pi f_c): unit step response y(t) = 1 - exp(-t / tau), unit
  ramp response y(t) = t - tau (1 - exp(-t / tau)) (any signals-and-systems text, e.g.
  Oppenheim and Willsky, Signals and Systems, the first-order system's step response; the
  ramp response is its integral);
- scipy.signal.lsim, which simulates a continuous LTI system on an input taken as linear
  between its samples;
- the ideal ADC: quantisation step LSB = FSR / 2^N over a full-scale range FSR, quantisation
  error of an ideal converter within +-LSB/2 inside the range (IEEE Std 1241, from memory).
"""
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal as sps

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.scenario import SENSOR_KEYS, parse_scenario
from hilrig.runtime.sensors import S_COLS, S_TRUE, Sensor, chain, quantise, table

TS = 50e-6


def _run_chain(sensor: Sensor, y: np.ndarray, f0=None, y_prev=None) -> np.ndarray:
    """The kernel over a sample sequence y (one signal), from tick 0 (settled on y[0]) or, with
    f0 / y_prev, from that filter state and previous sample (set after tick 0's start)."""
    tab = table([sensor], ["x"], TS, 0, [])
    s_x = np.zeros((1, 2))
    rec = np.zeros((len(y), 1))
    out = np.empty(len(y))
    for k, v in enumerate(y):
        yy = np.array([v])
        kk = k
        if f0 is not None:
            s_x[0] = (f0, y_prev) if k == 0 else s_x[0]
            kk = k + 1  # not tick 0: the given state is kept
        chain(kk, yy, tab, s_x, rec, k, 0)
        out[k] = yy[0]
    return out, rec[:, 0]


@pytest.mark.parametrize("fc", [1e3, 5e3, 20e3])
def test_step_response_is_the_closed_form_at_the_sample_instants(fc):
    # a unit step at t = 0 onto a filter at rest: the input is 1 from t = 0 on, so the
    # sample just after the step (the interpolation's left end) is 1 as well
    tau = 1.0 / (2.0 * math.pi * fc)
    n = 60
    got, _ = _run_chain(Sensor("x", cutoff=fc), np.ones(n), f0=0.0, y_prev=1.0)
    t = TS * np.arange(1, n + 1)
    np.testing.assert_allclose(got, 1.0 - np.exp(-t / tau), rtol=0, atol=1e-12)


def test_ramp_response_is_the_closed_form_no_lag_of_half_a_period():
    # a first-order hold reproduces a ramp input exactly: the output trails it by tau, not by
    # tau + Ts/2 as a held (zero-order) input would
    fc = 5e3
    tau = 1.0 / (2.0 * math.pi * fc)
    n = 80
    t = TS * np.arange(1, n + 1)
    got, _ = _run_chain(Sensor("x", cutoff=fc), t.copy(), f0=0.0, y_prev=0.0)
    np.testing.assert_allclose(got, t - tau * (1.0 - np.exp(-t / tau)), rtol=0, atol=1e-15)


def test_filter_and_sample_offset_agree_with_scipy_lsim_on_a_smooth_signal():
    fc, delta = 3e3, 20e-6
    tau = 1.0 / (2.0 * math.pi * fc)
    n = 200
    t = TS * np.arange(n)
    y = 400.0 + 30.0 * np.sin(2 * np.pi * 700.0 * t) + 5.0 * np.cos(2 * np.pi * 2300.0 * t)
    got, true = _run_chain(Sensor("x", cutoff=fc, sample_offset=delta), y)
    np.testing.assert_array_equal(true, y)  # the true value, before the chain
    # the reading of tick k is the filter output at t_k - delta (delta = 2/5 Ts): lsim on an
    # evenly spaced grid of Ts / 5 that holds those instants, the input linear between the
    # samples (np.interp), from rest at y[0]
    tg = TS / 5 * np.arange(5 * (n - 1) + 1)
    lag = sps.StateSpace([[-1.0 / tau]], [[1.0 / tau]], [[1.0]], [[0.0]])
    _, out, _ = sps.lsim(lag, np.interp(tg, t, y), tg, X0=[y[0]])
    want = out[5 * np.arange(1, n) - 2]
    np.testing.assert_allclose(got[1:], want, rtol=0, atol=1e-9)
    assert got[0] == pytest.approx(y[0], rel=1e-15)  # tick 0: settled on the first sample


def test_no_filter_reads_the_sample_itself_bit_for_bit():
    y = np.array([1.0, 2.5, -3.25, 1e-300, 7e12])
    got, _ = _run_chain(Sensor("x", offset=0.0, sample_offset=0.0, cutoff=0.0), y)
    assert got.tobytes() == y.tobytes()


@pytest.mark.parametrize("bits,lo,hi", [(12, 0.0, 1000.0), (8, -500.0, 500.0), (16, -1.0, 3.0)])
def test_adc_step_is_range_over_two_to_the_bits_and_error_within_half_an_lsb(bits, lo, hi):
    lsb = (hi - lo) / 2 ** bits            # IEEE Std 1241 (from memory): Q = FSR / 2^N
    s = Sensor("x", bits=bits, lo=lo, hi=hi)
    assert s.lsb == lsb
    v = np.linspace(lo, hi - lsb / 2, 4 * 2 ** bits + 1)  # finer than one LSB
    got = np.array([quantise(x, lo, lsb, 2.0 ** bits - 1) for x in v])
    # every reading is a code lo + n LSB, n in 0 .. 2^bits - 1
    n = (got - lo) / lsb
    np.testing.assert_allclose(n, np.round(n), rtol=0, atol=1e-6)
    assert n.min() >= -1e-9 and n.max() <= 2 ** bits - 1 + 1e-9
    # the quantisation error is within LSB / 2 inside the range
    assert np.max(np.abs(got - v)) <= lsb / 2 * (1 + 1e-9)
    # consecutive readings differ by 0 or exactly one LSB (the step of an ideal converter)
    steps = np.unique(np.round(np.diff(got) / lsb, 9))
    assert set(steps.tolist()) <= {0.0, 1.0} and 1.0 in steps
    # mid-tread: an input on a code reads as that code, and the code edges lie half an LSB
    # away on either side
    assert quantise(lo + 3 * lsb, lo, lsb, 2.0 ** bits - 1) == lo + 3 * lsb
    assert quantise(lo + 3.49 * lsb, lo, lsb, 2.0 ** bits - 1) == lo + 3 * lsb
    assert quantise(lo + 3.51 * lsb, lo, lsb, 2.0 ** bits - 1) == lo + 4 * lsb


def test_out_of_range_reads_the_end_codes_and_nan_stays_nan():
    lo, hi, bits = 0.0, 1000.0, 10
    lsb, top = (hi - lo) / 2 ** bits, 2.0 ** bits - 1
    assert quantise(1e6, lo, lsb, top) == hi - lsb
    assert quantise(np.inf, lo, lsb, top) == hi - lsb
    assert quantise(-5.0, lo, lsb, top) == lo
    assert quantise(-np.inf, lo, lsb, top) == lo
    assert math.isnan(quantise(np.nan, lo, lsb, top))


def test_the_table_numbers_true_columns_after_the_faults_and_skips_kept_ones():
    sensors = [Sensor("a", cutoff=1e3), Sensor("b", bits=8, lo=0.0, hi=1.0),
               Sensor("c", offset=1.0)]
    tab = table(sensors, ["c", "b", "a"], TS, 2, ["b"])
    assert tab.shape == (3, S_COLS)
    assert tab[:, S_TRUE].tolist() == [2.0, -1.0, 3.0]


BASE = """title = "sensor keys"
[timing]
Ts = "50 us"
duration = "1 ms"
[[interlocks]]
signal = "v_out"
above = "480 V"
"""


def _parse(extra: str):
    return parse_scenario(BASE + extra, name="s.toml")


def test_a_full_chain_is_read_in_si_units():
    sc = _parse('[[sensors]]\nsignal = "v_out"\ncutoff = "20 kHz"\nbits = 12\n'
                'range = ["0 V", "1 kV"]\nsample_offset = "10 us"\noffset = "500 mV"\n'
                '[[sensors]]\nsignal = "i_L1"\ncutoff = 5000\n')
    assert sc.sensors == [Sensor("v_out", cutoff=20e3, bits=12, lo=0.0, hi=1000.0,
                                 sample_offset=10e-6, offset=0.5), Sensor("i_L1", cutoff=5e3)]
    assert _parse("").sensors == []


@pytest.mark.parametrize("extra,fragments", [
    ('signal = "v_out"\ncutoff = "-20 kHz"', ["sensors[0].cutoff", "-20000 Hz", "(0,"]),
    ('signal = "v_out"\ncutoff = "20 kV"', ["sensors[0].cutoff", "Hz"]),
    ('signal = "v_out"\nbits = 0\nrange = ["0 V", "1000 V"]', ["sensors[0].bits = 0", "[1, 32]"]),
    ('signal = "v_out"\nbits = 40\nrange = ["0 V", "1000 V"]', ["sensors[0].bits = 40", "[1, 32]"]),
    ('signal = "v_out"\nbits = 12\nrange = ["1000 V", "0 V"]',
     ["sensors[0].range", "reversed", "[0 V, 1000 V]"]),
    ('signal = "v_out"\nbits = 12\nrange = ["5 A", "10 A"]', ["sensors[0].range[0]", "V"]),
    ('signal = "v_out"\nbits = 12', ["sensors[0]", "no 'range'"]),
    ('signal = "v_uot"\ncutoff = "20 kHz"',
     ["sensors[0].signal", "'v_uot'", "did you mean 'v_out'"]),
    ('signal = "v_out"\ncutof = "20 kHz"',
     ["unknown key 'sensors[0].cutof'", "did you mean 'cutoff'"]),
    ('signal = "v_out"\nsample_offset = "60 us"', ["sensors[0].sample_offset", "[0, 5e-05] s"]),
    ('signal = "v_out"', ["sensors[0]", "declares no part of a chain"]),
    ('signal = "v_out"\ncutoff = "20 kHz"\n[[sensors]]\nsignal = "v_out"\nbits = 8\n'
     'range = ["0 V", "1 kV"]', ["sensors[1].signal", "already has a chain in sensors[0]"]),
    # the demo's 480 V limit is beyond a 400 V ADC's top code: it could never trip
    ('signal = "v_out"\nbits = 12\nrange = ["0 V", "400 V"]',
     ["sensors[0].range", "v_out > 480 V can never trip", "widen the range"]),
])
def test_bad_sensor_entries_are_one_clear_error(extra, fragments):
    with pytest.raises(ScenarioError) as exc:
        _parse("[[sensors]]\n" + extra + "\n")
    msg = str(exc.value)
    assert msg.startswith("s.toml: ")
    for f in fragments:
        assert f in msg, (f, msg)


# --- property: any value in a sensor entry gives a Scenario or a ScenarioError ------------------

_scalars = (st.booleans() | st.integers(-2**63, 2**63 - 1) | st.floats()
            | st.sampled_from(["", "20 kHz", "-1 Hz", "0 Hz", "1e999 Hz", "10 us", "60 us",
                               "0 V", "1000 V", "nan V", "inf V", "-5 A", "v_out", "i_L1"])
            | st.text(max_size=6))
_values = st.recursive(_scalars, lambda inner: st.lists(inner, max_size=3), max_leaves=4)
_entry = st.dictionaries(st.sampled_from(sorted(SENSOR_KEYS) + ["x"]), _values, max_size=4)


@settings(max_examples=200, deadline=None)
@given(entries=st.lists(_entry, max_size=2), signal=st.sampled_from(["v_out", "i_L1", "v_dc"]))
def test_any_sensor_entry_is_a_scenario_or_one_scenario_error(entries, signal):
    entries = [{"signal": signal, **e} if i == 0 and "signal" not in e else e
               for i, e in enumerate(entries)]
    try:
        sc = parse_scenario(BASE, name="s.toml", overrides={"sensors": entries})
    except ScenarioError as exc:
        assert str(exc).startswith("s.toml: ")
        return
    # accepted: every coefficient of the loop's table is finite and the ADC's step positive
    tab = table(sc.sensors, ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc"], sc.Ts, 0, [])
    assert np.all(np.isfinite(tab))
    for s in sc.sensors:
        assert s.bits == 0 or (s.lsb > 0 and s.hi > s.lo)


@pytest.mark.parametrize("fc", [1e-3, 1e-2])
def test_a_slow_filter_follows_the_ramp_response_without_cancellation(fc):
    # x = Ts / tau is tiny: the ramp response t - tau (1 - exp(-t / tau)) = tau (x^2/2 - x^3/6
    # + ...) with x = t / tau (its Taylor series), about 1.6e-7 of Ts after one tick at 1 mHz
    tau = 1.0 / (2.0 * math.pi * fc)
    n = 5
    t = TS * np.arange(1, n + 1)
    got, _ = _run_chain(Sensor("x", cutoff=fc), t.copy(), f0=0.0, y_prev=0.0)
    x = t / tau
    want = tau * x * x * (0.5 - x / 6.0 + x * x / 24.0)
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=0)
