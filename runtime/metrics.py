"""Run metrics computed chunk by chunk (nothing is held in memory but running sums).

Tracking error e = v_ref - v_out [V] against the shaped reference:

- IAE = integral |e| dt [V s], ISE = integral e^2 dt [V^2 s] (rectangle rule at Ts),
- RMS error = sqrt(mean e^2) [V], max |e| [V],
- time in saturation [s]: ticks where the command u is at or beyond the converter's range
  [0, v_dc] (the converter cannot follow it).

A tick whose error is not finite (NaN or inf, e.g. a sensor dropout) is left out of these
sums and counted as a non-finite sample; the v_out range covers the finite samples only.

Per reference step (a jump of the raw reference larger than a threshold within one tick), on
the output measured from the step's start value, over the window up to the next step or the end
of the run, with the same definitions as python-control's ``step_info`` on recorded data:

- rise time [s]: from the first sample at or beyond 10 % of the final change to the first at
  or beyond 90 % of it,
- settling time [s]: from the step to the first sample after which the output stays within 2 %
  of the final change around the final value,
- overshoot [%]: 100 (peak - final) / |final change|, 0 when there is none,
- steady-state error [V]: the reference after the step minus the output's final value.

The final value is the last sample of the window, as ``step_info`` takes it for recorded data.

References
----------
K. J. Astrom and T. Hagglund, *Advanced PID Control*, ISA, 2006, sec. 4.2 (integral error
criteria IAE, ISE). python-control documentation, ``control.step_info`` (step-response
characteristics).
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

#: a raw-reference change larger than this within one tick counts as a step [V]
STEP_THRESHOLD_V = 1.0
RISE_LIMITS = (0.1, 0.9)
SETTLING_BAND = 0.02


@dataclass
class StepMetrics:
    """Characteristics of the response to one reference step."""

    t_step_s: float
    v_from_V: float
    v_to_V: float
    rise_time_s: float
    settling_time_s: float
    overshoot_pct: float
    steady_state_error_V: float

    def as_dict(self) -> dict:
        return asdict(self)


def step_response_info(t: np.ndarray, y: np.ndarray) -> dict[str, float]:
    """Rise time, settling time and overshoot of a response ``y`` that starts from 0.

    Same definitions as python-control's ``step_info(y, T)`` on recorded data: the final value
    is ``y[-1]``; sample indices, no interpolation; times measured from ``t[0]``.
    """
    t = np.asarray(t, dtype=float) - float(t[0])
    y = np.asarray(y, dtype=float)
    inf = float(y[-1])
    out = dict(rise_time_s=math.nan, settling_time_s=math.nan, overshoot_pct=math.nan)
    if not math.isfinite(inf) or inf == 0.0:
        return out
    sgn = math.copysign(1.0, inf)
    lo = np.flatnonzero(sgn * (y - RISE_LIMITS[0] * inf) >= 0)
    hi = np.flatnonzero(sgn * (y - RISE_LIMITS[1] * inf) >= 0)
    if lo.size and hi.size:
        out["rise_time_s"] = float(t[hi[0]] - t[lo[0]])
    outside = np.flatnonzero(np.abs(y / inf - 1.0) >= SETTLING_BAND)
    settled = 0 if outside.size == 0 else int(outside[-1]) + 1
    if settled < t.size:
        out["settling_time_s"] = float(t[settled])
    dy = abs(float(np.max(sgn * y))) - abs(inf)
    out["overshoot_pct"] = abs(100.0 * dy / inf) if dy > 0 else 0.0
    return out


def find_steps(v_ref_raw: np.ndarray, threshold: float = STEP_THRESHOLD_V) -> np.ndarray:
    """Tick indices where the raw reference jumps by more than ``threshold`` [V]."""
    if v_ref_raw.size < 2:
        return np.zeros(0, dtype=np.int64)
    return np.flatnonzero(np.abs(np.diff(v_ref_raw)) > threshold) + 1


def step_metrics(t: np.ndarray, v_out: np.ndarray, v_ref_raw: np.ndarray,
                 threshold: float = STEP_THRESHOLD_V) -> list[StepMetrics]:
    """Metrics of every reference step in a run (see the module docstring)."""
    steps = find_steps(v_ref_raw, threshold)
    out = []
    for j, k in enumerate(steps):
        end = int(steps[j + 1]) if j + 1 < steps.size else t.size
        if end - k < 3:
            continue
        base = float(v_out[k])
        info = step_response_info(t[k:end], v_out[k:end] - base)
        out.append(StepMetrics(
            t_step_s=float(t[k]), v_from_V=float(v_ref_raw[k - 1]), v_to_V=float(v_ref_raw[k]),
            rise_time_s=info["rise_time_s"], settling_time_s=info["settling_time_s"],
            overshoot_pct=info["overshoot_pct"],
            steady_state_error_V=float(v_ref_raw[end - 1] - v_out[end - 1])))
    return out


def largest_step(steps: list[StepMetrics]) -> StepMetrics | None:
    """The step with the largest change of reference (the one a comparison reports)."""
    return max(steps, key=lambda s: abs(s.v_to_V - s.v_from_V)) if steps else None


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
