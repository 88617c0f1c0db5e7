"""The sensor chain: what the controller, the reference and the interlocks measure of a plant
output, when the scenario declares one (``[[sensors]]``, docs/scenarios.md).

Per measured signal, in this order:

1. sample offset - the sample is taken ``sample_offset`` [s] (0 <= it <= Ts) before the tick
   that uses it (the converter's sample instant inside its period: a reading taken before the
   computation starts);
2. anti-alias filter - a first-order low-pass, ``tau = 1 / (2 pi cutoff)``, on the continuous
   plant output;
3. measurement offset - a constant ``offset`` added (in the signal's unit; a transducer's or an
   ADC's offset error);
4. ADC - an ideal mid-tread quantiser with ``bits`` bits over ``range = [lo, hi]``:
   ``LSB = (hi - lo) / 2^bits``, codes ``n = 0 .. 2^bits - 1`` read as ``lo + n LSB``, the code
   the nearest to the input (``floor((v - lo) / LSB + 1/2)``); an input beyond the range is
   held at the end code (``lo`` below, ``hi - LSB`` above: a reading never leaves the codes),
   a NaN stays NaN (the non-finite check trips on it, as without a chain).

Where it sits (runtime/loop.py): right after the plant's outputs are sampled and their true
values kept for the recording, before the sensor faults. A sensor fault thus acts on the
reading the controller gets (a dropout's NaN or a stuck value is the reading of that tick and
ends with the fault; a NaN fed into the filter would stay in its state for good), and the
conditional faults and the collapse check keep reading the plant's true values.

Discretisation. The plant's output is a continuous signal known exactly at the ticks; between
two ticks it is taken as linear (first-order hold, as the shaping filter does:
:mod:`hilrig.runtime.shaping`), and the filter is advanced over that input by its exact
solution. Over an interval h with input going linearly from y0 to y1, a filter state f0 becomes

    f(h) = a f0 + (1 - a) y0 + (y1 - y0) (h - tau (1 - a)) / h_in,    a = exp(-h / tau)

(the step and the ramp responses of a first-order lag, any signals text), h_in the length over
which the input ramps (Ts). So the state at each tick is the continuous filter's output at that
instant, with no lag of half a period that a held input would add, and a cutoff far above the
sampling rate reads y itself (a -> 0). The reading of tick k is the filter's output at
``t_k - sample_offset`` (h = Ts - sample_offset from the last tick); the state moves on to t_k.
On tick 0 the filter starts settled on the first sample (the plant starts at its equilibrium).

Without a filter (no ``cutoff``), the reading is the sample itself (interpolated between the
ticks for a sample offset); without ``bits`` no quantisation. A scenario without
``[[sensors]]`` runs no chain at all: the measurements are the plant's outputs, bit for bit.

The run's recording keeps each chained signal's plant value beside the reading, as
``true_<name>`` (the same columns as for sensor faults, :func:`hilrig.safety.faults.keep_true`).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

#: columns of a row of the sensor table (s_tab): the signal's index in y; the state update
#: f_k = A f + P y_prev + Q y; the reading before offset and ADC m = AM f + PM y_prev + QM y;
#: the offset; the ADC's lower end, LSB and top code (LSB 0: no ADC); the true-value column
#: (-1: a sensor fault's keep_true already writes that signal's column)
S_SIG, S_A, S_P, S_Q, S_AM, S_PM, S_QM, S_OFF, S_LO, S_LSB, S_TOP, S_TRUE = range(12)
S_COLS = 12


@dataclass(frozen=True)
class Sensor:
    """One measured signal's chain, SI values (0 or None: that element is absent)."""

    signal: str
    cutoff: float = 0.0          # Hz; 0: no filter
    bits: int = 0                # 0: no ADC
    lo: float = 0.0              # ADC range, in the signal's unit
    hi: float = 0.0
    sample_offset: float = 0.0   # s, the sample taken this long before the tick
    offset: float = 0.0          # signal's unit

    @property
    def lsb(self) -> float:
        """The ADC's quantisation step, (hi - lo) / 2^bits (0 without an ADC)."""
        return (self.hi - self.lo) / 2.0 ** self.bits if self.bits else 0.0


def hold_coefficients(tau: float, h: float, ts: float) -> tuple[float, float, float]:
    """(a, p, q) with f(h) = a f0 + p y0 + q y1: the first-order lag (time constant tau, 0 for
    none) over h of an input that ramps from y0 at 0 to y1 at ts (first-order hold)."""
    if tau <= 0.0:
        # no filter: the input itself, interpolated at h
        return 0.0, 1.0 - h / ts, h / ts
    x = h / tau
    b = -math.expm1(-x)  # 1 - a without cancellation for a slow filter
    # x - (1 - exp(-x)), the ramp's part, by its series where the difference would cancel
    g = x * x * (0.5 - x * (1.0 / 6.0 - x / 24.0)) if x < 1e-3 else x - b
    q = tau * g / ts
    return 1.0 - b, b - q, q


def table(sensors: list[Sensor], outputs: list[str], ts: float,
          true_first: int, kept_by_faults: list[str]) -> np.ndarray:
    """The sensor table for the loop: one row per sensor (S_COLS columns). ``true_first`` is
    the number of the first true-value column this chain writes (after the faults' ones);
    a signal in ``kept_by_faults`` already has its column."""
    tab = np.zeros((len(sensors), S_COLS))
    q = true_first
    for r, s in enumerate(sensors):
        tau = 1.0 / (2.0 * math.pi * s.cutoff) if s.cutoff > 0.0 else 0.0
        a, p, qq = hold_coefficients(tau, ts, ts)
        am, pm, qm = hold_coefficients(tau, ts - s.sample_offset, ts)
        tab[r, S_SIG] = outputs.index(s.signal)
        tab[r, S_A:S_QM + 1] = (a, p, qq, am, pm, qm)
        tab[r, S_OFF] = s.offset
        tab[r, S_LO] = s.lo
        tab[r, S_LSB] = s.lsb
        tab[r, S_TOP] = 2.0 ** s.bits - 1.0 if s.bits else 0.0
        if s.signal in kept_by_faults:
            tab[r, S_TRUE] = -1.0
        else:
            tab[r, S_TRUE] = q
            q += 1
    return tab


def true_signals(sensors: list[Sensor], kept_by_faults: list[str]) -> list[str]:
    """The chained signals that get a true-value column of their own (in table order)."""
    return [s.signal for s in sensors if s.signal not in kept_by_faults]


@njit(cache=True)
def quantise(v, lo, lsb, top):
    """The ideal mid-tread ADC's reading of v: lo + n LSB, n the nearest code, held at the
    end codes 0 and ``top`` outside the range; NaN stays NaN."""
    if v != v:
        return v
    n = np.floor((v - lo) / lsb + 0.5)
    if n < 0.0:
        n = 0.0
    elif n > top:
        n = top
    return lo + n * lsb


@njit(cache=True)
def chain(kk, y, s_tab, s_x, rec, i, c0):
    """The sensor chain on the sampled outputs y (in place), tick kk: first each chained
    signal's true value into row i of rec (column c0 + its true column, when it has one of its
    own), then the reading. s_x[r] holds the filter state and the last sample."""
    for r in range(s_tab.shape[0]):
        j = int(s_tab[r, S_SIG])
        v = y[j]
        q = s_tab[r, S_TRUE]
        if q >= 0.0:
            rec[i, c0 + int(q)] = v
        if kk == 0:
            s_x[r, 0] = v
            s_x[r, 1] = v
        f, yp = s_x[r, 0], s_x[r, 1]
        m = s_tab[r, S_AM] * f + s_tab[r, S_PM] * yp + s_tab[r, S_QM] * v + s_tab[r, S_OFF]
        s_x[r, 0] = s_tab[r, S_A] * f + s_tab[r, S_P] * yp + s_tab[r, S_Q] * v
        s_x[r, 1] = v
        if s_tab[r, S_LSB] > 0.0:
            m = quantise(m, s_tab[r, S_LO], s_tab[r, S_LSB], s_tab[r, S_TOP])
        y[j] = m
