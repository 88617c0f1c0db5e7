"""Run metrics computed chunk by chunk (nothing is held in memory but running sums).

Tracking error e = v_ref - v_out [V] against the shaped reference:

- IAE = integral |e| dt [V s], ISE = integral e^2 dt [V^2 s] (rectangle rule at Ts),
- RMS error = sqrt(mean e^2) [V], max |e| [V],
- time in saturation [s]: ticks where the command u is at or beyond the converter's range
  [0, v_dc] (the converter cannot follow it).

References
----------
K. J. Astrom and T. Hagglund, *Advanced PID Control*, ISA, 2006, sec. 4.2 (integral error
criteria IAE, ISE).
"""
from __future__ import annotations

import math

import numpy as np


class TrackingMetrics:
    """Running tracking and saturation metrics over chunks of a run."""

    def __init__(self, ts: float, settle_skip_s: float = 0.0):
        self.ts = ts
        self.n = 0
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
        e = v_ref - v_out
        a = np.abs(e)
        self.n += e.shape[0]
        self.sum_abs += float(a.sum())
        self.sum_sq += float((e * e).sum())
        j = int(np.argmax(a)) if np.all(np.isfinite(a)) else int(np.argmax(~np.isfinite(a)))
        if not (a[j] <= self.max_abs):
            self.max_abs = float(a[j])
            self.t_max_abs = float(t[j])
        hi = v_dc if v_dc is not None else np.inf
        self.sat_ticks += int(np.count_nonzero((u <= 0.0) | (u >= hi)))
        self.max_v_out = max(self.max_v_out, float(np.max(v_out)))
        self.min_v_out = min(self.min_v_out, float(np.min(v_out)))

    def result(self) -> dict[str, float]:
        n = max(self.n, 1)
        return {
            "iae_Vs": self.sum_abs * self.ts,
            "ise_V2s": self.sum_sq * self.ts,
            "rms_error_V": math.sqrt(self.sum_sq / n),
            "max_abs_error_V": self.max_abs,
            "time_of_max_abs_error_s": self.t_max_abs,
            "saturation_time_s": self.sat_ticks * self.ts,
            "v_out_min_V": self.min_v_out,
            "v_out_max_V": self.max_v_out,
        }
