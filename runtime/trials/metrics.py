"""Run metrics computed chunk by chunk (nothing is held in memory but running sums).

Tracking error e = v_ref - v_out [V] against the shaped reference:

- IAE = integral |e| dt [V s], ISE = integral e^2 dt [V^2 s] (rectangle rule at Ts),
- RMS error = sqrt(mean e^2) [V], max |e| [V],
- time in saturation [s]: ticks where the command u is at or beyond the converter's range
  [0, v_dc] (the converter cannot follow it).

A tick whose error is not finite (NaN or inf, e.g. a sensor dropout) is left out of these
sums and counted as a non-finite sample; the v_out range covers the finite samples only.

Per reference segment (computed once at the end of a run on the whole recorded signals; see
:func:`split_reference` for the rule that splits the reference into holds, steps and ramps).
The segments are cut on the *raw* reference ``v_ref_raw``, the one the scenario commands, not
on the shaped one the controller sees: shaping turns every step into a smooth, slew-limited
rise that would read as a ramp, and the trial asks how the whole chain (shaping, controller,
plant) answers the command. For the same reason the errors below are ``v_ref_raw - v_out``.

Step (``V1 -> V2``): the output from the step's first tick to the start of the next step or
ramp (or the end of the run), minus its value at that tick (``step_info`` measures from 0),
with the definitions of python-control's ``step_info`` on recorded data:

- rise time [s]: from the first sample at or beyond 10 % of the final change to the first at
  or beyond 90 % of it,
- settling time [s]: from the step to the first sample after which the output stays within 2 %
  of the final change around the final value,
- overshoot [%]: 100 (peak - final) / |final change|, 0 when there is none; undershoot [%]:
  100 times the largest excursion to the wrong side of the start over |final change|, 0 when
  there is none,
- peak: the output at its largest distance from the start [V] and when [s, from the step],
- steady-state value: the output's final value [V], and the steady-state error [V]: the raw
  reference minus the output at the end of the window.

The final value is the last sample of the window, as ``step_info`` takes it for recorded data.

Ramp (from ``V1`` to ``V2``, mean slope ``slope_V_per_s``): over the ramp and what follows it up
to the start of the next step or ramp (or the end of the run):

- tracking lag [s]: ``(v_ref_raw - v_out) / a`` at the ramp's last full-slope tick, a the slope
  over the ramp's last quarter (a battery model's ramps bend), the time by which the output
  trails the ramp; ``lag_steady_s`` says for how long before that tick the lag
  had stayed within 2 % of that value (the ramp's steady part; a short one means the loop had
  not reached its steady lag when the ramp ended, and the lag is the one at the ramp's end),
- largest error [V]: max ``|v_ref_raw - v_out|`` from the ramp's start until the output has
  settled after it (the settling instant below; the end of the window if it never settles),
  and when it occurred,
- settling time [s]: from the ramp's end until ``|v_ref_raw - v_out|`` stays below 2 % of
  |V2 - V1| (0 when it already did at the ramp's end); against the reference rather than the
  output's final value as for steps, because a battery model's reference keeps drifting after
  its ramps,
- overshoot [%]: 100 times the largest excursion of the output past the reference in the
  ramp's direction over |V2 - V1|, 0 when there is none; steady-state error [V] as for steps.

Hold: its raw reference range [V] and the largest ``|v_ref_raw - v_out|`` [V] (with its time)
from the instant the response to the preceding step or ramp settled (the hold's start if none
precedes it) to the hold's end: the tracking error while the command holds, load steps
included, without counting the preceding transient twice. NaN when that response never settled.

Samples whose output is not finite are left out of the largest errors.

Cut at the first trip or collapse: a run's segments are scored only on the samples before the
first trip (any latched trip: the safe output then drives the output, not the controller) or
the collapse that ended the run (``cut`` of :func:`segment_metrics`). A step or ramp whose
window reaches past that tick is scored on the part before it and says so (``cut_at_s``, and a
``note``); one that starts at or after it gets no metrics (NaN, null in summary.json) and a
``note``; so does a hold. A step cut before its output settled within 2 % of the step's size
around its reference ``V2`` gets no metrics either (its final value, step_info's reference for
rise and overshoot, would be the output as the trip found it).

A run that ended on a plant integration error (:func:`withhold_metrics`): every metric is
null, with ``summary["metrics_note"]`` saying why; a diverged state makes any number
meaningless (an IAE of 1e180).

Tracking band (:func:`band_check`, the outcomes "out of band" and "oscillating" of
``runtime/outcome.py``): the band at a sample is ``max(BAND_REL |v_ref_raw|, BAND_FLOOR_V)``
(5 %, at least 0.5 V). Settled windows start ``SETTLE_DELAY_S`` (10 ms, but at least
``SETTLE_TICKS`` = 100 ticks) after the run's start and after the end of each step or ramp, and end at the next step or ramp (its last hold tick),
at the run's end, or at the cut above, whichever comes first. In a settled window:

- out of band: ``|v_ref_raw - v_out|`` above the band (a non-finite output counts as above)
  on consecutive samples for longer than ``OUT_OF_BAND_S`` (2 ms, i.e. more than 2 ms / Ts
  samples, and more than ``OUT_OF_BAND_TICKS`` = 20);
- oscillating: with m the mean of v_out over the window and b the band at the window's mean
  |v_ref_raw|, each sample is high (v_out > m + b), low (v_out < m - b) or neither; a
  half-swing is a change from high to low or back, skipping the samples in between (a
  hysteresis of +-b, so each half-swing moves v_out by more than 2 b peak to peak). At least
  ``2 OSC_SWINGS`` half-swings (3 full periods) in the window, at least 2 of them in its last
  half (sustained, not a ringing that dies out), is an oscillation.

The 5 % band is the tracking band a trial of a voltage loop is judged by (common practice, no
source); 10 ms covers several closed-loop time constants of the shipped controllers (about
1 ms rise); 2 ms is a couple of those, so a load step's dip that recovers does not count. The
tick floors are for slow-sampled loops (a 1 kHz test loop): a digital loop's bandwidth is a
tenth to a twentieth of its sampling rate at best (common practice, no source), so its
settling spans some tens of ticks whatever its period; at the usual 20 kHz (50 us) the
millisecond figures rule (100 ticks = 5 ms, 20 ticks = 1 ms).

References
----------
K. J. Astrom and T. Hagglund, *Advanced PID Control*, ISA, 2006, sec. 4.2 (integral error
criteria IAE, ISE). python-control documentation, ``control.step_info`` (step-response
characteristics). F. R. Hampel, "The influence curve and its role in robust estimation",
J. Amer. Statist. Assoc. 69(346), 383-393, 1974 (the median absolute deviation as a robust
scale; from memory).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: segmentation rule (see :func:`split_reference`): a change counts when it exceeds the largest
#: of SEGMENT_FLOOR_V, SEGMENT_REL times the run's largest |raw reference| and NOISE_K times the
#: noise on the per-tick change (:func:`tick_noise`)
SEGMENT_FLOOR_V = 0.1
SEGMENT_REL = 0.0025
NOISE_K = 5.0
#: a per-tick change joins a run while within SLOPE_TOL of the run's mean slope (plus the noise
#: allowance NOISE_K sigma)
SLOPE_TOL = 0.20
#: a run of at least this many ticks at one slope is a ramp; a shorter one a step
RAMP_MIN_TICKS = 3
#: at most this many steps and ramps are listed (the largest changes); smaller ones join holds
MAX_CHANGES = 50
RISE_LIMITS = (0.1, 0.9)
SETTLING_BAND = 0.02
#: the tracking band and its windows (see the module docstring, "Tracking band")
BAND_REL = 0.05
BAND_FLOOR_V = 0.5
SETTLE_DELAY_S = 10e-3
OUT_OF_BAND_S = 2e-3
#: ... and never fewer ticks than these (a slow-sampled loop settles in ticks, not ms)
SETTLE_TICKS = 100
OUT_OF_BAND_TICKS = 20
OSC_SWINGS = 3
#: the metric keys of each segment kind (NaN when a segment is not scored)
_STEP_KEYS = ("rise_time_s", "settling_time_s", "overshoot_pct", "undershoot_pct", "peak_V",
              "peak_time_s", "steady_state_V", "steady_state_error_V")
_RAMP_KEYS = ("lag_s", "lag_steady_s", "max_abs_error_V", "time_of_max_abs_error_s",
              "settling_time_s", "overshoot_pct", "steady_state_error_V")
_HOLD_KEYS = ("settled_from_s", "max_abs_error_V", "time_of_max_abs_error_s")
#: MAD to standard deviation of Gaussian noise: 1 / Phi^-1(3/4)
_MAD_TO_SIGMA = 1.4826


def step_response_info(t: np.ndarray, y: np.ndarray) -> dict[str, float]:
    """Step-response characteristics of a response ``y`` that starts from 0.

    Same definitions as python-control's ``step_info(y, T)`` on recorded data: the final value
    is ``y[-1]``; sample indices, no interpolation; times measured from ``t[0]``. Keys:
    ``rise_time_s``, ``settling_time_s``, ``overshoot_pct``, ``undershoot_pct``, ``peak``
    (largest |y|, step_info's ``Peak``), ``peak_time_s``, ``steady_state`` (``y[-1]``) and
    ``settled_index`` (the first index of the settled tail; ``len(y)`` when it never settles).
    """
    t = np.asarray(t, dtype=float) - float(t[0])
    y = np.asarray(y, dtype=float)
    inf = float(y[-1])
    out = dict(rise_time_s=math.nan, settling_time_s=math.nan, overshoot_pct=math.nan,
               undershoot_pct=math.nan, peak=math.nan, peak_time_s=math.nan, steady_state=inf,
               settled_index=int(y.size))
    if not math.isfinite(inf) or inf == 0.0:
        return out
    sgn = math.copysign(1.0, inf)
    lo = np.flatnonzero(sgn * (y - RISE_LIMITS[0] * inf) >= 0)
    hi = np.flatnonzero(sgn * (y - RISE_LIMITS[1] * inf) >= 0)
    if lo.size and hi.size:
        out["rise_time_s"] = float(t[hi[0]] - t[lo[0]])
    # a NaN sample counts as outside the band (not (|y/inf - 1| < band))
    outside = np.flatnonzero(~(np.abs(y / inf - 1.0) < SETTLING_BAND))
    settled = 0 if outside.size == 0 else int(outside[-1]) + 1
    out["settled_index"] = settled
    if settled < t.size:
        out["settling_time_s"] = float(t[settled])
    if not np.isfinite(y).all():
        return out
    dy = abs(float(np.max(sgn * y))) - abs(inf)
    out["overshoot_pct"] = abs(100.0 * dy / inf) if dy > 0 else 0.0
    y_us = float(y[int(np.argmin(sgn * y))])
    out["undershoot_pct"] = -100.0 * y_us / inf if sgn * y_us < 0 else 0.0
    j = int(np.argmax(np.abs(y)))
    out["peak"], out["peak_time_s"] = abs(float(y[j])), float(t[j])
    return out


def change_threshold(v_ref_raw: np.ndarray) -> float:
    """The smallest change of the raw reference that makes a step or a ramp [V].

    ``max(SEGMENT_FLOOR_V, SEGMENT_REL * max |v_ref_raw|, NOISE_K * sigma)`` with sigma the
    noise of the per-tick change (:func:`tick_noise`).
    """
    r = np.asarray(v_ref_raw, dtype=float)
    return _threshold(r, tick_noise(r))


def _threshold(r: np.ndarray, sigma: float) -> float:
    fin = r[np.isfinite(r)]
    scale = float(np.max(np.abs(fin))) if fin.size else 0.0
    return max(SEGMENT_FLOOR_V, SEGMENT_REL * scale, NOISE_K * sigma)


def tick_noise(v_ref_raw: np.ndarray) -> float:
    """Robust estimate of the noise on a reference's per-tick change [V].

    ``1.4826 MAD(d[k+1] - d[k]) / sqrt(2)`` over the finite values, with ``d`` the per-tick
    change: the median absolute deviation, scaled to a standard deviation for Gaussian noise,
    of the change's tick-to-tick variation (the difference of two independent noisy changes
    has sqrt(2) times their spread). Piecewise-linear references give 0 (their change varies
    only at corners), so holds, steps and ramps of a profile are split exactly.
    """
    r = np.asarray(v_ref_raw, dtype=float)
    dd = np.diff(r, n=2)
    dd = dd[np.isfinite(dd)]
    if dd.size == 0:
        return 0.0
    return _MAD_TO_SIGMA * float(np.median(np.abs(dd - np.median(dd)))) / math.sqrt(2.0)


@dataclass
class Change:
    """A step or a ramp of the raw reference: it leaves ``V1 = r[a]`` after tick ``a`` and
    reaches ``V2 = r[b]`` at tick ``b``; a ramp's full-slope ticks end at ``core_end``."""

    kind: str
    a: int
    b: int
    slope: float = 0.0          # mean change per tick of a ramp's full-slope ticks [V]
    core_start: int = 0         # a ramp's full-slope ticks: core_start + 1 .. core_end
    core_end: int = 0


def split_reference(v_ref_raw: np.ndarray) -> tuple[list[Change], float, int]:
    """Steps and ramps of a raw reference; everything between them is a hold.

    Rule, on the per-tick change ``d[k] = r[k+1] - r[k]``, with sigma the noise on it
    (:func:`tick_noise`; 0 for a piecewise-linear profile):

    1. Runs: consecutive ticks whose change stands out of the noise (``|d| > NOISE_K sigma``,
       ``NOISE_K`` = 5; for a profile: any change at all) and stays within ``SLOPE_TOL`` (20 %)
       of the run's mean change, plus ``NOISE_K`` sigma. A profile's ramps have equal changes
       to rounding; the battery model's ramps under a load ramp do not: on the demo scenario
       the per-tick change wobbles by about +-10 % around its mean as the output's dip feeds
       back through the load current P / v. A slope that moves by more than 20 % starts a new
       run (a smooth curve, such as an RC pair's relaxation, is cut into ramps of slowly
       changing slope).
    2. A run whose total change is not above the threshold of :func:`change_threshold` is no
       change: it stays in the hold around it. The threshold is 0.25 % of the run's largest
       |reference| (1 V at 400 V: finer than a 2 % settling band describes, and about the
       voltage accuracy of an emulator's measurement, a few tenths of a percent of full scale;
       common practice, no source), at least 0.1 V, and at least 5 sigma of the noise on the
       per-tick change, so that noise on a reference (a battery model driven by a noisy load
       current) makes no segments.
    3. A run of at least ``RAMP_MIN_TICKS`` (3) ticks is a ramp: three equal increments are a
       slope, one or two are an edge sampled by the ticks. One tick at either end of a ramp that
       moves the same way by no more than the ramp's slope (a ramp that starts or ends between
       ticks) belongs to the ramp. A shorter run is a step; steps that touch and move the same
       way merge while they span fewer than ``RAMP_MIN_TICKS`` ticks.
    4. At most ``MAX_CHANGES`` (50) steps and ramps are kept, the largest |V2 - V1| (a reference
       with more is a profile to track, which the whole-run tracking metrics describe); the
       others join the holds.

    Returns the kept changes in time order, the threshold [V] and how many were left out.
    """
    r = np.asarray(v_ref_raw, dtype=float)
    if r.size < 2:
        return [], change_threshold(r), 0
    d = np.diff(r)
    sigma = tick_noise(r)
    noise = NOISE_K * sigma
    thr = _threshold(r, sigma)
    dl = d.tolist()
    m = len(dl)
    runs = []   # [first change index, last change index, total change, ticks]
    i = 0
    while i < m:
        x = dl[i]
        if not (abs(x) > noise):      # still (within the noise), or NaN: no run starts here
            i += 1
            continue
        s, c, j = x, 1, i + 1
        while j < m:
            mean = s / c
            x = dl[j]
            if not (abs(x) > noise and abs(x - mean) <= SLOPE_TOL * abs(mean) + noise):
                break
            s += dl[j]
            c += 1
            j += 1
        runs.append([i, j - 1, s, c])
        i = j
    changes: list[Change] = []
    kinds = ["ramp" if c >= RAMP_MIN_TICKS and abs(s) > thr else "step" if abs(s) > thr else ""
             for _, _, s, c in runs]
    used = [False] * len(runs)

    def partial(q: int, slope: float) -> bool:
        # a one-tick run next to a ramp, moving the same way by at most the ramp's slope; not
        # a rounding residue (a profile's corner at t = k Ts computed 1e-13 V off): a ramp
        # that starts within a millionth of a tick of a tick starts there
        if q < 0 or q >= len(runs) or used[q] or kinds[q] == "ramp" or runs[q][3] != 1:
            return False
        x = runs[q][2]
        return (x * slope > 0 and abs(x) <= abs(slope) * (1.0 + SLOPE_TOL) + noise
                and abs(x) > 1e-6 * abs(slope))

    for q, (i0, i1, s, c) in enumerate(runs):
        if kinds[q] != "ramp":
            continue
        slope = s / c
        a, b, core_end = i0, i1 + 1, i1 + 1
        if partial(q - 1, slope) and runs[q - 1][1] == i0 - 1:
            used[q - 1] = True
            a -= 1
        if partial(q + 1, slope) and runs[q + 1][0] == i1 + 1:
            used[q + 1] = True
            b += 1
        used[q] = True
        changes.append(Change("ramp", a, b, slope, i0, core_end))
    for q, (i0, i1, s, c) in enumerate(runs):
        if kinds[q] == "step" and not used[q]:
            changes.append(Change("step", i0, i1 + 1))
    changes.sort(key=lambda ch: ch.a)
    merged: list[Change] = []
    for ch in changes:
        prev = merged[-1] if merged else None
        if (prev is not None and ch.kind == prev.kind == "step" and ch.a == prev.b
                and (r[ch.b] - r[ch.a]) * (r[prev.b] - r[prev.a]) > 0
                and ch.b - prev.a < RAMP_MIN_TICKS):
            prev.b = ch.b
        else:
            merged.append(ch)
    omitted = max(0, len(merged) - MAX_CHANGES)
    if omitted:
        keep = sorted(merged, key=lambda ch: -abs(r[ch.b] - r[ch.a]))[:MAX_CHANGES]
        merged = sorted(keep, key=lambda ch: ch.a)
    return merged, thr, omitted


def _max_abs_error(t: np.ndarray, e: np.ndarray) -> tuple[float, float]:
    """Largest |e| over the finite samples and its time; NaN, NaN when none is finite."""
    a = np.abs(e)
    ok = np.isfinite(a)
    if not ok.any():
        return math.nan, math.nan
    j = int(np.flatnonzero(ok)[np.argmax(a[ok])])
    return float(a[j]), float(t[j])


def _step_segment(t, y, r, ch: Change, end: int) -> tuple[dict, int]:
    k = ch.a + 1
    seg = dict(kind="step", t_start_s=float(t[k]), t_end_s=float(t[ch.b]),
               v_from_V=float(r[ch.a]), v_to_V=float(r[ch.b]))
    if end - k < 3:     # no response to describe before the next change
        seg.update(dict.fromkeys(("rise_time_s", "settling_time_s", "overshoot_pct",
                                  "undershoot_pct", "peak_V", "peak_time_s", "steady_state_V",
                                  "steady_state_error_V"), math.nan))
        return seg, end
    base = float(y[k])
    info = step_response_info(t[k:end], y[k:end] - base)
    pk = math.nan
    if math.isfinite(info["peak"]):
        j = int(np.argmax(np.abs(y[k:end] - base)))
        pk = float(y[k + j])
    seg.update(rise_time_s=info["rise_time_s"], settling_time_s=info["settling_time_s"],
               overshoot_pct=info["overshoot_pct"], undershoot_pct=info["undershoot_pct"],
               peak_V=pk, peak_time_s=info["peak_time_s"],
               steady_state_V=float(y[end - 1]),
               steady_state_error_V=float(r[end - 1] - y[end - 1]))
    return seg, k + info["settled_index"]


def _ramp_segment(t, y, r, ch: Change, end: int, ts: float) -> tuple[dict, int]:
    a, b, c = ch.a, ch.b, ch.core_end
    seg = dict(kind="ramp", t_start_s=float(t[a]), t_end_s=float(t[b]),
               v_from_V=float(r[a]), v_to_V=float(r[b]), slope_V_per_s=ch.slope / ts)
    # lag: error over the slope at the last full-slope tick (the slope of the ramp's last
    # quarter, at least RAMP_MIN_TICKS ticks), and for how long before that tick it had stayed
    # within 2 % of that value
    k0 = c - max(RAMP_MIN_TICKS, (c - ch.core_start) // 4)
    slope = float((r[c] - r[k0]) / (t[c] - t[k0]))
    lag_t = (r[a:c + 1] - y[a:c + 1]) / slope
    lag = float(lag_t[-1])
    steady = math.nan
    if math.isfinite(lag):
        out = np.flatnonzero(~(np.abs(lag_t - lag) <= SETTLING_BAND * abs(lag)))
        first = a if out.size == 0 else a + int(out[-1]) + 1
        steady = float(t[c] - t[first])
    # settling and overshoot against the reference, not the output's final value: a battery
    # model's reference keeps drifting after its ramps
    e = r[a:end] - y[a:end]
    band = SETTLING_BAND * abs(float(r[b] - r[a]))
    out = np.flatnonzero(~(np.abs(e) < band))
    settled = a if out.size == 0 else a + int(out[-1]) + 1
    settle = math.nan if settled >= end else max(0.0, float(t[settled] - t[b]))
    upto = max(settled, b) if settled < end else end - 1
    emax, temax = _max_abs_error(t[a:upto + 1], e[:upto + 1 - a])
    ahead = -math.copysign(1.0, slope) * e           # > 0: the output past the reference
    ahead = ahead[np.isfinite(ahead)]
    over = float(np.max(ahead)) if ahead.size else math.nan
    seg.update(lag_s=lag, lag_steady_s=steady, max_abs_error_V=emax,
               time_of_max_abs_error_s=temax, settling_time_s=settle,
               overshoot_pct=100.0 * over / abs(float(r[b] - r[a])) if over > 0 else
               (0.0 if math.isfinite(over) else math.nan),
               steady_state_error_V=float(r[end - 1] - y[end - 1]))
    return seg, settled


def _hold_segment(t, y, r, i0: int, i1: int, t0: float, t1: float, settled: int,
                  i_score: int | None = None) -> dict:
    """A hold over ticks i0..i1 (inclusive), shown from t0 to t1; its error is measured from
    tick ``settled`` (where the preceding response settled; past i1 when it never did) to
    ``i_score`` (i1 unless the run is cut before it)."""
    rf = r[i0:i1 + 1]
    rf = rf[np.isfinite(rf)]
    seg = dict(kind="hold", t_start_s=t0, t_end_s=t1, v_from_V=float(r[i0]),
               v_to_V=float(r[i1]), v_ref_min_V=float(rf.min()) if rf.size else math.nan,
               v_ref_max_V=float(rf.max()) if rf.size else math.nan)
    if i_score is not None:
        i1 = min(i1, i_score)
    lo = max(i0, settled)
    if lo <= i1:
        emax, temax = _max_abs_error(t[lo:i1 + 1], r[lo:i1 + 1] - y[lo:i1 + 1])
        seg.update(settled_from_s=float(t[lo]), max_abs_error_V=emax,
                   time_of_max_abs_error_s=temax)
    else:
        seg.update(settled_from_s=math.nan, max_abs_error_V=math.nan,
                   time_of_max_abs_error_s=math.nan)
    return seg


def segment_metrics(t: np.ndarray, v_out: np.ndarray, v_ref_raw: np.ndarray, *,
                    cut: int | None = None, cut_reason: str = "the first trip"
                    ) -> tuple[list[dict], dict]:
    """Every segment of a run's reference (holds, steps, ramps) with its metrics, in time order.

    See the module docstring for the metrics and :func:`split_reference` for the rule. Returns
    the segments (dicts with ``kind``, ``t_start_s``, ``t_end_s``, ``v_from_V``, ``v_to_V`` and
    the kind's metrics) and a dict with the rule's ``threshold_V``, ``changes_found`` and
    ``changes_listed`` (and ``cut_at_s``, ``cut_reason`` when cut).

    ``cut``: the index of the first sample not to score (the tick of the first trip, or of the
    collapse that ended the run; ``cut_reason`` names it in the notes): the segments are still
    listed whole, but scored only on the samples before it. A scored segment that reaches past
    it gets ``cut_at_s`` and a ``note``; one that starts at or after it gets NaN metrics and a
    ``note``.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(v_out, dtype=float)
    r = np.asarray(v_ref_raw, dtype=float)
    n = t.size
    changes, thr, omitted = split_reference(r)
    info = dict(threshold_V=thr, changes_found=len(changes) + omitted,
                changes_listed=len(changes))
    if n == 0:
        return [], info
    ts = float(t[1] - t[0]) if n > 1 else 0.0
    t_run_end = float(t[-1] + ts)
    lim = n if cut is None else max(0, min(int(cut), n))
    t_cut = float(t[lim]) if lim < n else t_run_end
    if lim < n:
        info.update(cut_at_s=t_cut, cut_reason=cut_reason)
    when = f"{cut_reason} at {t_cut * 1e3:.4g} ms"

    # samples from the cut on are not the controller's doing: NaN for every scoring function
    # (a NaN sample never settles and is left out of the largest errors)
    yc = y
    if lim < n:
        yc = y.copy()
        yc[lim:] = math.nan

    def scored(seg, first, end, keys):
        # a segment whose scoring window [first, end) reaches the cut says so
        if first >= lim:
            seg.update(dict.fromkeys(keys, math.nan))
            seg["note"] = f"not scored: starts at or after {when}"
        elif end > lim:
            seg["cut_at_s"] = t_cut
            seg["note"] = f"scored only up to {when}"
            span = abs(seg["v_to_V"] - seg["v_from_V"])
            if seg["kind"] == "step" and not (
                    math.isfinite(seg.get("settling_time_s", math.nan))
                    and abs(float(y[lim - 1]) - seg["v_to_V"]) <= SETTLING_BAND * span):
                # step_info's final value would be the output as the trip found it: a rise
                # or an overshoot against it describes nothing the loop did
                seg.update(dict.fromkeys(_STEP_KEYS, math.nan))
                seg["note"] = f"not scored: cut by {when} before it settled"
        return seg

    segs: list[dict] = []
    hold_from, shown_from, settled = 0, float(t[0]), 0
    for j, ch in enumerate(changes):
        start = ch.a if ch.kind == "ramp" else ch.a + 1
        # the hold before this change: ticks hold_from..ch.a
        if ch.a >= hold_from and float(t[start]) > shown_from:
            seg = _hold_segment(t, yc, r, hold_from, ch.a, shown_from, float(t[start]), settled,
                                i_score=lim - 1)
            segs.append(scored(seg, hold_from, ch.a + 1, _HOLD_KEYS))
        end = changes[j + 1].a + 1 if j + 1 < len(changes) else n
        cend = max(min(end, lim), start + 1)
        if ch.kind == "step":
            seg, settled = _step_segment(t, yc, r, ch, cend)
        else:
            seg, settled = _ramp_segment(t, yc, r, ch, cend, ts)
        if end > lim:
            settled = n     # nothing after the cut settles
        segs.append(scored(seg, start, end, _STEP_KEYS if ch.kind == "step" else _RAMP_KEYS))
        hold_from, shown_from = ch.b + 1, float(t[ch.b])
    if hold_from < n:
        seg = _hold_segment(t, yc, r, hold_from, n - 1, shown_from, t_run_end, settled,
                            i_score=lim - 1)
        segs.append(scored(seg, hold_from, n, _HOLD_KEYS))
    return segs, info


def band_check(t: np.ndarray, v_out: np.ndarray, v_ref_raw: np.ndarray, *,
               cut: int | None = None, changes: list[Change] | None = None) -> dict:
    """The tracking-band verdict of a run (the module docstring's "Tracking band"), on whole
    recorded signals, vectorized per settled window.

    Returns a dict for ``summary["tracking"]``: the rule's constants (``band_rel``,
    ``band_floor_V``, ``settle_delay_s``, ``out_of_band_limit_s``, ``oscillation_swings``),
    ``windows`` (``[from_s, to_s]`` each), ``checked_s``, ``out_of_band`` and
    ``out_of_band_run`` (the longest run outside the band: ``from_s``, ``duration_s``,
    ``max_error_V``, ``band_V``; None when there is none), ``oscillating`` and ``oscillation``
    (the window with the most half-swings: ``from_s``, ``to_s``, ``swings`` (full periods),
    ``mean_V``, ``peak_to_peak_V``, ``band_V``; None when no window has a half-swing).
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(v_out, dtype=float)
    r = np.asarray(v_ref_raw, dtype=float)
    n = t.size
    out = dict(band_rel=BAND_REL, band_floor_V=BAND_FLOOR_V, settle_delay_s=SETTLE_DELAY_S,
               out_of_band_limit_s=OUT_OF_BAND_S, oscillation_swings=OSC_SWINGS, windows=[],
               checked_s=0.0, out_of_band=False, out_of_band_run=None, oscillating=False,
               oscillation=None)
    if n < 2:
        return out
    ts = float(t[1] - t[0])
    lim = n if cut is None else max(0, min(int(cut), n))
    if changes is None:
        changes = split_reference(r)[0]
    starts = [0] + [ch.b for ch in changes]
    ends = [ch.a + 1 for ch in changes] + [n]
    delay = max(int(math.ceil(SETTLE_DELAY_S / ts - 1e-9)), SETTLE_TICKS)
    limit = max(int(math.floor(OUT_OF_BAND_S / ts + 1e-9)), OUT_OF_BAND_TICKS)   # more than
    out.update(settle_delay_s=delay * ts, out_of_band_limit_s=limit * ts)
    err = np.abs(r - y)
    band = np.maximum(BAND_REL * np.abs(r), BAND_FLOOR_V)
    outside = ~(err <= band)                             # NaN counts as outside
    best_run, best_osc = None, None
    for s0, e0 in zip(starts, ends):
        i0, i1 = s0 + delay, min(e0, lim)
        if i1 - i0 < 2:
            continue
        out["windows"].append([float(t[i0]), float(t[i1 - 1] + ts)])
        out["checked_s"] += (i1 - i0) * ts
        # runs of consecutive samples outside the band: rising and falling edges
        o = np.concatenate(([False], outside[i0:i1], [False])).astype(np.int8)
        d = np.diff(o)
        up, down = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
        if up.size:
            lens = down - up
            q = int(np.argmax(lens))
            if best_run is None or lens[q] > best_run[1]:
                a = i0 + int(up[q])
                seg_err = err[a:a + int(lens[q])]
                fin = seg_err[np.isfinite(seg_err)]
                best_run = (a, int(lens[q]), float(fin.max()) if fin.size else math.nan,
                            float(band[a]))
        # half-swings across the window's mean, with a hysteresis of +-band
        yw = y[i0:i1]
        fin = np.isfinite(yw)
        if fin.sum() < 2:
            continue
        m = float(np.mean(yw[fin]))
        b = max(BAND_REL * abs(float(np.mean(np.abs(r[i0:i1])))), BAND_FLOOR_V)
        side = np.where(yw > m + b, 1, np.where(yw < m - b, -1, 0))
        k = np.flatnonzero(side != 0)
        flips = k[1:][np.diff(side[k]) != 0] if k.size > 1 else k[:0]
        late = int(np.count_nonzero(flips >= (i1 - i0) // 2))
        osc = dict(from_s=float(t[i0]), to_s=float(t[i1 - 1] + ts), swings=flips.size / 2.0,
                   mean_V=m, peak_to_peak_V=float(np.max(yw[fin]) - np.min(yw[fin])), band_V=b,
                   late_half_swings=late)
        sustained = flips.size >= 2 * OSC_SWINGS and late >= 2
        if flips.size and (best_osc is None or (sustained, flips.size) >
                           (best_osc[0], best_osc[1]["swings"] * 2)):
            best_osc = (sustained, osc)
    if best_run is not None:
        a, length, emax, b = best_run
        out["out_of_band_run"] = dict(from_s=float(t[a]), duration_s=length * ts,
                                      max_error_V=emax, band_V=b)
        out["out_of_band"] = length > limit
    if best_osc is not None:
        out["oscillating"], out["oscillation"] = best_osc
    return out


def withhold_metrics(summary: dict, reason: str) -> None:
    """Null every metric of a run's summary (a run that ended on a plant integration error):
    the tracking metrics but the event counts (``trips``, ``warnings``), every segment's
    metrics (the segments stay listed, each with a ``note``), the band check and the units'
    sharing metrics; and say why in ``summary["metrics_note"]``. In place."""
    keep = {"trips", "warnings"}
    summary["metrics"] = {k: (v if k in keep else None)
                          for k, v in (summary.get("metrics") or {}).items()}
    ident = {"kind", "t_start_s", "t_end_s", "v_from_V", "v_to_V", "v_ref_min_V", "v_ref_max_V",
             "slope_V_per_s"}
    summary["segments"] = [dict({k: (v if k in ident else None) for k, v in seg.items()},
                                note="not scored: " + reason)
                           for seg in summary.get("segments") or []]
    summary["tracking"] = None
    if "sharing" in summary:  # paralleled units (runtime/trials/sharing.py)
        summary["sharing"] = None
    summary["metrics_note"] = reason


def largest_step(segments: list[dict]) -> dict | None:
    """The step with the largest change of reference (the one compare's main table shows)."""
    steps = [s for s in segments if s.get("kind") == "step"]
    return max(steps, key=lambda s: abs(s["v_to_V"] - s["v_from_V"])) if steps else None


def largest_change(segments: list[dict]) -> dict | None:
    """The step or ramp with the largest change of reference (where compare's plots zoom)."""
    moves = [s for s in segments if s.get("kind") in ("step", "ramp")]
    return max(moves, key=lambda s: abs(s["v_to_V"] - s["v_from_V"])) if moves else None


class TrackingMetrics:
    """Running tracking and saturation metrics over chunks of a run.

    A tick whose error v_ref - v_out is not finite (a sensor dropout, a diverged plant) is left
    out of IAE, ISE, RMS and max error and counted in ``nonfinite_samples``; the v_out range
    covers the finite v_out samples. The metrics then describe the finite part of the run, and
    a metric with no finite sample to describe is NaN (null in summary.json). A run whose
    samples are all finite takes the same arithmetic, in the same order, as without the check.
    """

    def __init__(self, ts: float, settle_skip_s: float = 0.0):
        self.ts = ts
        self.n = 0
        self.nonfinite = 0
        self.sum_abs = 0.0
        self.sum_sq = 0.0
        self.max_abs = 0.0
        self.t_max_abs = 0.0
        self.sat_ticks = 0
        self.max_v_out = -math.inf
        self.min_v_out = math.inf

    def update(self, t: np.ndarray, v_out: np.ndarray, v_ref: np.ndarray, u: np.ndarray,
               v_dc: np.ndarray | None) -> None:
        if t.shape[0] == 0:
            return
        hi = v_dc if v_dc is not None else np.inf
        # saturation is judged on every tick (a non-finite command is at no rail)
        self.sat_ticks += int(np.count_nonzero((u <= 0.0) | (u >= hi)))
        e = v_ref - v_out
        ok = np.isfinite(e)
        if not ok.all():
            self.nonfinite += int(e.shape[0] - np.count_nonzero(ok))
            e, t = e[ok], t[ok]
        if e.shape[0]:
            a = np.abs(e)
            self.n += e.shape[0]
            self.sum_abs += float(a.sum())
            self.sum_sq += float((e * e).sum())
            j = int(np.argmax(a))
            if not (a[j] <= self.max_abs):
                self.max_abs = float(a[j])
                self.t_max_abs = float(t[j])
        fin = np.isfinite(v_out)
        v = v_out if fin.all() else v_out[fin]
        if v.shape[0]:
            self.max_v_out = max(self.max_v_out, float(np.max(v)))
            self.min_v_out = min(self.min_v_out, float(np.min(v)))

    def result(self) -> dict[str, float]:
        if self.n == 0:
            # nothing finite to describe (or no tick at all)
            err = dict.fromkeys(("iae_Vs", "ise_V2s", "rms_error_V", "max_abs_error_V",
                                 "time_of_max_abs_error_s"), math.nan)
        else:
            err = {
                "iae_Vs": self.sum_abs * self.ts,
                "ise_V2s": self.sum_sq * self.ts,
                "rms_error_V": math.sqrt(self.sum_sq / self.n),
                "max_abs_error_V": self.max_abs,
                "time_of_max_abs_error_s": self.t_max_abs,
            }
        seen = self.min_v_out <= self.max_v_out
        return {
            **err,
            "saturation_time_s": self.sat_ticks * self.ts,
            "v_out_min_V": self.min_v_out if seen else math.nan,
            "v_out_max_V": self.max_v_out if seen else math.nan,
            "nonfinite_samples": self.nonfinite,
        }
