"""Scheduled fault injection: sensor faults, load faults and controller faults.

A fault is data: what it hits (a plant output, the load, or the controller's output), its kind,
when it is active (from ``start`` to ``end`` [s], end open by default) and a value. A
conditional fault waits, from ``start`` on, for a condition on a measured signal (above or
below a threshold); it is active from the tick the condition first holds, for ``duration``
(open by default). Conditions are evaluated on the plant's true outputs, before sensor faults,
by :func:`trigger`. The kernel
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
  command NaN; ``overrun`` adds its value [s] to the tick's modelled compute time, which the
  overrun watchdog checks on the next tick (:func:`hilrig.safety.interlocks.watch`; a bridge
  session also spends that time for real before it answers).

A conditional load fault that triggers on tick k acts from tick k+1 (the load is sampled at the
start of a tick, before the measurement the condition is evaluated on); sensor and controller
faults act from tick k.

Noise comes from numba's generator seeded with the scenario's seed on tick 0.

The true value of every signal a sensor fault hits is recorded beside the measurement, as
``true_<name>`` (:func:`true_signals`, :func:`keep_true`): the plant's output before injection,
on every tick of the run (with no sensor fault the recording has no such column).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

#: kinds and where they act
SENSOR_KINDS = ("offset", "gain", "stuck", "noise", "dropout")
LOAD_KINDS = ("power_step", "short_circuit", "open_circuit")
CONTROLLER_KINDS = ("nan_output", "overrun")
#: faults of the link to an external simulator: the stand-in simulator applies them (bridge
#: runs); the compiled loop never sees them, and a SIL run has no link
LINK_KINDS = ("link_loss", "link_delay", "link_freeze", "link_disconnect")
KINDS = SENSOR_KINDS + LOAD_KINDS + CONTROLLER_KINDS + LINK_KINDS
STAGE_LOAD, STAGE_SENSOR, STAGE_CONTROLLER = 0, 1, 2
K_OVERRUN = KINDS.index("overrun")
#: value units by kind ("" = the signal's own unit)
VALUE_UNITS = {"offset": "", "gain": "-", "stuck": None, "noise": "", "dropout": None,
               "power_step": "W", "short_circuit": "ohm", "open_circuit": None,
               "nan_output": None, "overrun": "s",
               "link_loss": "-", "link_delay": "s", "link_freeze": None, "link_disconnect": None}


@dataclass(frozen=True)
class Fault:
    kind: str
    start: float
    end: float = float("inf")
    signal: str = ""
    value: float = 0.0
    #: conditional: the measured signal, side ("above"/"below") and threshold that start it;
    #: ``start`` is then the time from which the condition is watched, ``end`` unused and
    #: ``duration`` how long the fault lasts once started
    when_signal: str = ""
    when_side: str = ""
    when_threshold: float = 0.0
    duration: float = float("inf")

    @property
    def conditional(self) -> bool:
        return bool(self.when_signal)


def stage_of(kind: str) -> int:
    if kind in LOAD_KINDS:
        return STAGE_LOAD
    if kind in SENSOR_KINDS:
        return STAGE_SENSOR
    return STAGE_CONTROLLER


#: columns of a fault's condition row (f_cond): signal index (-1: timed), 1 above / 0 below,
#: threshold, watched from, duration, and the fault's true-value column (C_TRUE: the number q of
#: ``true_<name>`` among those columns when this is the first sensor fault on its signal, else -1)
C_TRUE = 5
COND_COLS = 6


def true_signals(faults: list[Fault]) -> list[str]:
    """The signals whose true value is recorded: those a sensor fault hits, in order of first
    appearance."""
    out: list[str] = []
    for f in faults:
        if f.kind in SENSOR_KINDS and f.signal not in out:
            out.append(f.signal)
    return out


def table(faults: list[Fault], outputs: list[str]) -> dict[str, np.ndarray]:
    """Arrays for the kernel: stage, kind code, signal index, start, end, value, stuck-hold, and
    per fault its condition row [signal index (-1: timed), 1 above / 0 below, threshold, watched
    from, duration, true-value column] (a conditional fault's start and end are +inf until it
    triggers)."""
    faults = [f for f in faults if f.kind not in LINK_KINDS]
    n = len(faults)
    tab = dict(f_stage=np.zeros(n, np.int64), f_kind=np.zeros(n, np.int64),
               f_sig=np.zeros(n, np.int64), f_t0=np.zeros(n), f_t1=np.zeros(n),
               f_val=np.zeros(n), f_hold=np.full(n, np.nan),
               f_cond=np.zeros((max(n, 1), COND_COLS)))
    tab["f_cond"][:, 0] = -1.0
    tab["f_cond"][:, C_TRUE] = -1.0
    kept: list[str] = []
    for i, f in enumerate(faults):
        if f.kind in SENSOR_KINDS and f.signal not in kept:
            tab["f_cond"][i, C_TRUE] = len(kept)
            kept.append(f.signal)
        tab["f_stage"][i] = stage_of(f.kind)
        tab["f_kind"][i] = KINDS.index(f.kind)
        tab["f_sig"][i] = outputs.index(f.signal) if f.kind in SENSOR_KINDS else -1
        tab["f_t0"][i], tab["f_t1"][i] = f.start, f.end
        tab["f_val"][i] = 1.0 / f.value if f.kind == "short_circuit" else f.value
        if f.conditional:
            tab["f_t0"][i] = tab["f_t1"][i] = np.inf
            tab["f_cond"][i, :C_TRUE] = (outputs.index(f.when_signal),
                                         1.0 if f.when_side == "above" else 0.0,
                                         f.when_threshold, f.start, f.duration)
    return tab


@njit(cache=True)
def trigger(t, y, f_t0, f_t1, f_cond):
    """Start every armed conditional fault whose condition holds on y at time t."""
    for i in range(f_t0.shape[0]):
        j = int(f_cond[i, 0])
        if j < 0 or f_t0[i] != np.inf or t < f_cond[i, 3]:
            continue
        v = y[j]
        hit = v > f_cond[i, 2] if f_cond[i, 1] == 1.0 else v < f_cond[i, 2]
        if hit:
            f_t0[i] = t
            f_t1[i] = t + f_cond[i, 4]


@njit(cache=True)
def keep_true(y, f_sig, f_cond, rec, i, c0):
    """Before the inject stage: write the true value of each signal a sensor fault hits into
    row i of rec, column c0 + q (q from the fault's C_TRUE column)."""
    for f in range(f_sig.shape[0]):
        q = f_cond[f, 5]
        if q >= 0.0:
            rec[i, c0 + int(q)] = y[f_sig[f]]


@njit(cache=True)
def apply(stage, kk, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd,
          y, u, d):
    """Apply every active fault of ``stage`` at time t (see the module docstring)."""
    if stage == 1:
        if kk == 0 and f_stage.shape[0] > 0:
            np.random.seed(seed)
        trigger(t, y, f_t0, f_t1, f_cond)
    elif stage == 2:
        wd[6] = 0.0  # interlocks.W_FORCED: this tick's forced overrun, none unless active
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
        elif k == K_OVERRUN:
            wd[6] += f_val[i]
        else:
            for j in range(u.shape[0]):
                u[j] = np.nan
