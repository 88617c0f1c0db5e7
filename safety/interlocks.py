"""Interlocks evaluated every tick inside the compiled loop (the protect stage), and the latch.

An interlock is data: the signal it watches (a plant output or a controller output), the side
that trips (above or below a threshold in SI units) and a debounce count (the condition must
hold on that many consecutive ticks). Every comparison is written so that NaN trips:
``not (value <= threshold)`` rather than ``value > threshold``.

Plausibility checks that always run: a non-finite measurement or controller output, and a
non-zero fault code returned by the controller.

Trip semantics: on the tick where a (debounced) condition first holds, the safe output is forced
on that same tick and the trip latches with its first cause, tick, time and the offending value.
Later causes are not latched over the first. Only an explicit reset clears the latch.

These are monitoring functions of a test tool, not safety-rated functions (IEC 61508,
ISO 13849-1); hardware protection must stay in place.
"""
from __future__ import annotations

import difflib
import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .errors import InterlockConfigError

#: latch array layout (L_LOGGED: the trip is in the event log; L_REINIT: re-initialise the
#: controller on the next tick, after an accepted reset)
L_TRIPPED, L_CAUSE, L_TICK, L_TIME, L_VALUE, L_LOGGED, L_REINIT = range(7)
LATCH_SIZE = 7
#: cause codes: 1 + row for a limit row; these offsets for plausibility causes
CAUSE_NONFINITE = 1000   # + index into [y..., u...]
CAUSE_CONTROLLER = 2000  # + the controller's fault code if > 0; -CAUSE_CONTROLLER + code if < 0
#: bits of the interlock word
BIT_NONFINITE = 48
BIT_CONTROLLER = 49
BIT_LATCHED = 50
BIT_RESET_REQUESTED = 51
BIT_RESET_REFUSED = 52
MAX_ROWS = 40
#: the bits that say a condition holds now (rows, non-finite, controller fault)
CONDITIONS = ((1 << MAX_ROWS) - 1) | (1 << BIT_NONFINITE) | (1 << BIT_CONTROLLER)
#: event log: rows of (tick, kind, cause, value); kinds
EVT_TRIP, EVT_RESET_ACCEPTED, EVT_RESET_REFUSED, EVT_RESET_IDLE = 1, 2, 3, 4
EVENT_NAMES = {EVT_TRIP: "trip", EVT_RESET_ACCEPTED: "reset accepted",
               EVT_RESET_REFUSED: "reset refused", EVT_RESET_IDLE: "reset (nothing latched)"}
EVENT_LOG_SIZE = 256


@dataclass(frozen=True)
class Interlock:
    """One limit: ``signal`` trips when above (or below) ``threshold`` for ``debounce`` ticks."""

    signal: str
    threshold: float
    above: bool
    debounce: int = 1
    unit: str = ""

    def describe(self) -> str:
        side = ">" if self.above else "<"
        deb = f" for {self.debounce} ticks" if self.debounce > 1 else ""
        return f"{self.signal} {side} {self.threshold:g} {self.unit}{deb}".replace("  ", " ")


@dataclass
class InterlockTable:
    """Interlocks resolved against the protect vector [plant outputs..., controller outputs...]."""

    rows: list[Interlock]
    names: list[str]
    sig: np.ndarray
    above: np.ndarray
    thr: np.ndarray
    deb: np.ndarray

    @classmethod
    def build(cls, rows: list[Interlock], names: list[str]) -> "InterlockTable":
        if len(rows) > MAX_ROWS:
            raise InterlockConfigError(f"{len(rows)} interlocks; at most {MAX_ROWS} are supported")
        sig = []
        for r in rows:
            if r.signal not in names:
                close = difflib.get_close_matches(r.signal, names, n=3)
                hint = f"; did you mean {', '.join(close)}?" if close else f"; signals: {', '.join(names)}"
                raise InterlockConfigError(f"interlock on unknown signal {r.signal!r}{hint}")
            if not math.isfinite(r.threshold):
                # a NaN limit would trip on every tick (every comparison is written so NaN trips)
                raise InterlockConfigError(f"interlock on {r.signal}: threshold {r.threshold!r} "
                                           f"{r.unit} is not finite".replace("  ", " "))
            if r.debounce < 1:
                raise InterlockConfigError(f"interlock on {r.signal}: debounce {r.debounce} < 1 tick")
            sig.append(names.index(r.signal))
        return cls(rows=list(rows), names=list(names),
                   sig=np.array(sig, dtype=np.int64),
                   above=np.array([1 if r.above else 0 for r in rows], dtype=np.int64),
                   thr=np.array([r.threshold for r in rows], dtype=np.float64),
                   deb=np.array([r.debounce for r in rows], dtype=np.int64))

    def cause_text(self, cause: int, n_y: int) -> str:
        """Human-readable latched cause."""
        if cause <= -CAUSE_CONTROLLER:
            return f"controller fault code {cause + CAUSE_CONTROLLER}"
        if cause <= 0:
            return "none"
        if cause < CAUSE_NONFINITE:
            return "interlock " + self.rows[cause - 1].describe()
        if cause < CAUSE_CONTROLLER:
            j = cause - CAUSE_NONFINITE
            return f"non-finite value of {self.names[j] if j < len(self.names) else j}"
        return f"controller fault code {cause - CAUSE_CONTROLLER}"


def new_latch() -> np.ndarray:
    return np.zeros(LATCH_SIZE)


def new_event_log() -> tuple[np.ndarray, np.ndarray]:
    """(rows, count): the kernel appends (tick, kind, cause, value) rows; count may exceed the
    rows (then the later events were not kept, only counted)."""
    return np.zeros((EVENT_LOG_SIZE, 4)), np.zeros(1, dtype=np.int64)


@njit(cache=True)
def _log(evlog, evn, tick, kind, cause, value):
    n = evn[0]
    if n < evlog.shape[0]:
        evlog[n, 0] = tick
        evlog[n, 1] = kind
        evlog[n, 2] = cause
        evlog[n, 3] = value
    evn[0] = n + 1


@njit(cache=True)
def supervise(tick, t, word, latch, reset_t, reset_i, evlog, evn):
    """After the protect stage: log a trip latched on this tick, and handle a reset request.

    A reset (requested at a scheduled time) clears the latch only if no interlock condition
    holds on this tick; otherwise it is refused and the safe state stays (ISO 13849-1
    5.2.2.3: a stop is held until it is safe, and restarting needs a separate, intended reset).
    The output stays safe on the reset tick; the controller is re-initialised from the
    measurements on the next tick (bumpless restart). Returns the interlock word with the reset
    bits set.
    """
    if latch[L_TRIPPED] != 0.0 and latch[L_LOGGED] == 0.0:
        _log(evlog, evn, tick, EVT_TRIP, latch[L_CAUSE], latch[L_VALUE])
        latch[L_LOGGED] = 1.0
    i = reset_i[0]
    if i < reset_t.shape[0] and t >= reset_t[i]:
        reset_i[0] = i + 1
        word |= 1 << BIT_RESET_REQUESTED
        if latch[L_TRIPPED] == 0.0:
            _log(evlog, evn, tick, EVT_RESET_IDLE, 0.0, 0.0)
        elif (word & CONDITIONS) != 0:
            word |= 1 << BIT_RESET_REFUSED
            _log(evlog, evn, tick, EVT_RESET_REFUSED, latch[L_CAUSE], 0.0)
        else:
            _log(evlog, evn, tick, EVT_RESET_ACCEPTED, latch[L_CAUSE], 0.0)
            latch[L_TRIPPED] = 0.0
            latch[L_LOGGED] = 0.0
            latch[L_REINIT] = 1.0
            # the word says what holds at the end of the tick: no longer latched (this tick's
            # output is still the safe one)
            word &= ~(1 << BIT_LATCHED)
    return word


@njit(cache=True)
def _trip(latch, cause, tick, t, value):
    if latch[L_TRIPPED] == 0.0:
        latch[L_TRIPPED] = 1.0
        latch[L_CAUSE] = cause
        latch[L_TICK] = tick
        latch[L_TIME] = t
        latch[L_VALUE] = value


@njit(cache=True)
def protect(tick, t, y, u, code, sig, above, thr, deb, cnt, latch, pv, safe_u):
    """Evaluate every interlock on [y, u]; latch the first cause; force the safe output.

    Returns the interlock word: bit j set while row j's condition holds (before debounce),
    BIT_NONFINITE, BIT_CONTROLLER for the plausibility checks, BIT_LATCHED while tripped.
    """
    ny = y.shape[0]
    nu = u.shape[0]
    for j in range(ny):
        pv[j] = y[j]
    for j in range(nu):
        pv[ny + j] = u[j]
    word = 0
    # plausibility first: a non-finite value makes every limit on it meaningless
    for j in range(ny + nu):
        v = pv[j]
        # NaN or +-Inf; written without arithmetic because inf - inf warns when the kernel runs
        # as plain Python (NUMBA_DISABLE_JIT=1)
        if not (abs(v) < np.inf):
            word |= 1 << BIT_NONFINITE
            _trip(latch, CAUSE_NONFINITE + j, tick, t, v)
            break
    if code != 0:
        word |= 1 << BIT_CONTROLLER
        # a negative code (-1 is a common "failed") must not land in the non-finite cause range
        cause = CAUSE_CONTROLLER + code if code > 0 else -CAUSE_CONTROLLER + code
        _trip(latch, cause, tick, t, float(code))
    for k in range(sig.shape[0]):
        v = pv[sig[k]]
        if above[k] == 1:
            beyond = not (v <= thr[k])
        else:
            beyond = not (v >= thr[k])
        if beyond:
            word |= 1 << k
            cnt[k] += 1
            if cnt[k] >= deb[k]:
                _trip(latch, 1 + k, tick, t, v)
        else:
            cnt[k] = 0
    if latch[L_TRIPPED] != 0.0:
        word |= 1 << BIT_LATCHED
        for j in range(nu):
            u[j] = safe_u[j]
    return word
