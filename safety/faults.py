"""Scheduled fault injection: sensor faults, load faults and controller faults.

A fault is data: what it hits (a plant output, the load, or the controller's output), its kind,
when it is active (from ``start`` to ``end`` [s], end open by default) and a value. The kernel
:func:`apply` runs at three places of a tick, always in the same order, so runs stay
bit-identical:

- load faults, right after the load profile is sampled (stage 1): ``power_step`` adds P [W];
  ``short_circuit`` adds a conductance 1/R [S] (R the value in ohm); ``open_circuit`` removes the
  whole load;
- sensor faults, in the inject stage (stage 2), on the measured signal only (the plant is
  unchanged): ``offset`` adds the value (signal's unit), ``gain`` multiplies by it [-],
  ``stuck`` holds the signal's value from the fault's first tick, ``noise`` adds zero-mean
  Gaussian noise of that standard deviation, ``dropout`` makes it NaN;
- controller faults, right after the controller's step (stage 4): ``nan_output`` makes the
  command NaN.

Noise comes from numba's generator seeded with the scenario's seed on tick 0.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

#: kinds and where they act
SENSOR_KINDS = ("offset", "gain", "stuck", "noise", "dropout")
LOAD_KINDS = ("power_step", "short_circuit", "open_circuit")
CONTROLLER_KINDS = ("nan_output",)
KINDS = SENSOR_KINDS + LOAD_KINDS + CONTROLLER_KINDS
STAGE_LOAD, STAGE_SENSOR, STAGE_CONTROLLER = 0, 1, 2
#: value units by kind ("" = the signal's own unit)
VALUE_UNITS = {"offset": "", "gain": "-", "stuck": None, "noise": "", "dropout": None,
               "power_step": "W", "short_circuit": "ohm", "open_circuit": None,
               "nan_output": None}


@dataclass(frozen=True)
class Fault:
    kind: str
    start: float
    end: float = float("inf")
    signal: str = ""
    value: float = 0.0


def stage_of(kind: str) -> int:
    if kind in LOAD_KINDS:
        return STAGE_LOAD
    if kind in SENSOR_KINDS:
        return STAGE_SENSOR
    return STAGE_CONTROLLER


def table(faults: list[Fault], outputs: list[str]) -> dict[str, np.ndarray]:
    """Arrays for the kernel: stage, kind code, signal index, start, end, value, stuck-hold."""
    n = len(faults)
    tab = dict(f_stage=np.zeros(n, np.int64), f_kind=np.zeros(n, np.int64),
               f_sig=np.zeros(n, np.int64), f_t0=np.zeros(n), f_t1=np.zeros(n),
               f_val=np.zeros(n), f_hold=np.full(n, np.nan))
    for i, f in enumerate(faults):
        tab["f_stage"][i] = stage_of(f.kind)
        tab["f_kind"][i] = KINDS.index(f.kind)
        tab["f_sig"][i] = outputs.index(f.signal) if f.kind in SENSOR_KINDS else -1
        tab["f_t0"][i], tab["f_t1"][i] = f.start, f.end
        tab["f_val"][i] = 1.0 / f.value if f.kind == "short_circuit" else f.value
    return tab


@njit(cache=True)
def apply(stage, kk, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, y, u, d):
    """Apply every active fault of ``stage`` at time t (see the module docstring)."""
    if stage == 1 and kk == 0 and f_stage.shape[0] > 0:
        np.random.seed(seed)
    for i in range(f_stage.shape[0]):
        if f_stage[i] != stage or not (f_t0[i] <= t < f_t1[i]):
            continue
        k = f_kind[i]
        if stage == 1:
            j = f_sig[i]
            if k == 0:
                y[j] += f_val[i]
            elif k == 1:
                y[j] *= f_val[i]
            elif k == 2:
                if f_hold[i] != f_hold[i]:  # NaN: not held yet
                    f_hold[i] = y[j]
                y[j] = f_hold[i]
            elif k == 3:
                y[j] += f_val[i] * np.random.standard_normal()
            else:
                y[j] = np.nan
        elif stage == 0:
            if k == 5:
                d[0] += f_val[i]
            elif k == 6:
                d[1] += f_val[i]
            else:
                d[0] = 0.0
                d[1] = 0.0
                d[2] = 0.0
        else:
            for j in range(u.shape[0]):
                u[j] = np.nan
