"""Interlocks evaluated every tick inside the compiled loop (the protect stage), and the latch.

An interlock is data: the signal it watches, the side that trips and a debounce count (the
condition must hold on that many consecutive ticks). Signals are the plant's measured outputs,
the controller's outputs, and two derived signals: ``p_out`` = v_out * i_out [W] (when the plant
measures both) and ``dv_out_dt`` [V/s], the backward difference of the measured v_out over one
tick (0 on tick 0). Sides: above or below a threshold in SI units, magnitude above a threshold
(|value| > threshold, for a rate in either direction), frozen (the measured value exactly
unchanged from the previous tick while the controller's command moved or sat at the
converter's range; the debounce is then the tick count), or cross-check (two signals that must
agree, |value - partner| beyond a band, e.g. redundant measurements of one quantity). Every
comparison is written so that NaN trips: ``not (value <= threshold)`` rather than
``value > threshold``.

Frozen and saturation: a command that sits at the converter's range [0, v_dc] (the first
controller output at or below 0, or at or above the measured v_dc when the plant measures it; the
same rule as the saturation-time metric) stops moving, yet it is itself evidence that the output
should be moving: the converter applies all it can. Such a tick counts as a frozen tick like one
where the command moved, so a stuck sensor that drives the controller into its rail still trips
after the row's tick count. A run whose command stays at a rail until the plant's output is
settled to the last bit (an unreachable reference) trips it too; give such a run a longer count.
While a trip is latched the command is the safe output, and saturation does not count.

Plausibility checks that always run: a non-finite measurement or controller output, and a
non-zero fault code returned by the controller.

Watchdogs (:func:`watch`, evaluated before the interlocks of a tick) are about time, so the host
measures what they need and hands it over in the ``wd`` array: the compute time of the last tick
(overrun, against a budget and its own debounce), and the link conditions a bridge session
detects (stale samples, a sequence gap beyond its limit, the peer lost). A forced-overrun fault
adds a modelled compute time, so overrun trips are testable in SIL too. An overrun can only be
known once the tick is over: the overrun of tick k trips on tick k+1.

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
#: controller on the next tick, after an accepted reset; L_RESET_NOW: an operator's reset
#: request from the live view, taken on the next tick)
L_TRIPPED, L_CAUSE, L_TICK, L_TIME, L_VALUE, L_LOGGED, L_REINIT, L_RESET_NOW = range(8)
#: the last tick's interlock word (to log conditions as they start) and the mask of the rows
#: whose action is "warn" (they log, never trip); both fit float64 exactly (bits below 53)
L_PREV_WORD, L_WARN_MASK = 8, 9
#: the controller's last non-zero fault code (as judged by protect), so that a controller fault
#: that starts while another cause is latched is logged with its own code
L_CODE = 10
LATCH_SIZE = 11
#: cause codes: 1 + row for a limit row; these offsets for plausibility causes
CAUSE_NONFINITE = 1000   # + index into [y..., u...]
CAUSE_CONTROLLER = 2000  # + the controller's fault code if > 0; -CAUSE_CONTROLLER + code if < 0
#: the fault code the loop substitutes when a controller returns 0 with a non-finite state (a
#: NaN in an integrator that a clamp keeps out of the command)
CODE_NONFINITE_STATE = -999
#: + watchdog index (WD_NAMES)
CAUSE_WATCHDOG = 3000
#: the largest positive controller code with a cause of its own (CAUSE_CONTROLLER + code
#: stays below CAUSE_WATCHDOG)
CONTROLLER_CODE_MAX = CAUSE_WATCHDOG - CAUSE_CONTROLLER - 1
#: bits of the interlock word. The word is recorded as float64, which holds integers exactly only
#: up to 2**53: every bit must stay below 53.
BIT_WATCHDOG = 40        # + watchdog index: 40 overrun, 41 stale, 42 sequence gap, 43 peer lost,
                         # 44 stop requested by the operator, 45 bridge protocol error,
                         # 46 bridge sequence error
BIT_NONFINITE = 48
BIT_CONTROLLER = 49
BIT_LATCHED = 50
BIT_RESET_REQUESTED = 51
BIT_RESET_REFUSED = 52
MAX_ROWS = 40
#: the bits that say a condition holds now (rows, non-finite, controller fault)
WD_NAMES = ("overrun", "stale", "sequence gap", "peer lost", "stop requested", "protocol error",
            "sequence error")
CONDITIONS = (((1 << MAX_ROWS) - 1) | (1 << BIT_NONFINITE) | (1 << BIT_CONTROLLER)
              | (((1 << len(WD_NAMES)) - 1) << BIT_WATCHDOG))
#: interlock sides
SIDE_BELOW, SIDE_ABOVE, SIDE_MAGNITUDE, SIDE_FROZEN, SIDE_CROSS = 0, 1, 2, 3, 4
#: when a table has a cross-check row, its threshold array ``thr`` (one band or limit per row)
#: goes on with XC_SIZE numbers per row: partner index, drop current index (-1: none), drop
#: resistance [ohm], drop inductance [H] (-1, -1, 0, 0 for a row that is no cross-check)
XC_PARTNER, XC_CURRENT, XC_R, XC_L = range(4)
XC_SIZE = 4

#: the frozen check counts a tick only while a controller output changes by more than this
#: fraction of its magnitude since the last tick: well above rounding (about 1e-16 per
#: operation, accumulated over a controller's arithmetic) and far below any change a sensor
#: could show (1e-9 of 400 V is 0.4 uV). Per tick: a command drifting by less than this each
#: tick (8 mV/s at 400 V and 20 kHz) does not count; a command near 0 whose rounding comes
#: from operands far larger than itself can still count as moving.
U_MOVED_REL = 1e-9
#: added to a row's side code when its action is "warn"
SIDE_WARN = 8
SIDE_WORDS = {SIDE_BELOW: "below", SIDE_ABOVE: "above", SIDE_MAGNITUDE: "magnitude_above",
              SIDE_FROZEN: "frozen", SIDE_CROSS: "cross_check"}
#: derived signals appended to the protect vector: name, unit, description
DERIVED = (("p_out", "W", "output power v_out * i_out"),
           ("dv_out_dt", "V/s", "rate of change of v_out over one tick"))
#: watchdog array layout (float64): overrun budget [s] (0: off), debounce [ticks], count,
#: host-measured compute time of the last tick [s], host-raised condition bits (1 stale,
#: 2 sequence gap, 4 peer lost), the value that goes with them, forced-overrun seconds of the
#: last tick (written by the fault stage after watch has read it)
#: and (paced loop) this tick's work time, which becomes the next tick's W_HOST_TIME
W_BUDGET, W_DEB, W_CNT, W_HOST_TIME, W_HOST_BITS, W_HOST_VALUE, W_FORCED, W_LAST_WORK = range(8)
#: then the safe state's configuration (not watchdog state, kept here because the loop already
#: carries this array): the trip's safe action (SAFE_ZERO_VOLTAGE or SAFE_GATE_BLOCK), the
#: output contactor's opening delay after a trip [s] (negative: it never opens), and the
#: sample-to-actuation delay in half control periods (0-4)
W_SAFE_ACTION, W_CONTACTOR, W_DELAY = 8, 9, 10
WD_SIZE = 11
SAFE_ZERO_VOLTAGE, SAFE_GATE_BLOCK = 0.0, 1.0
SAFE_ACTIONS = {"zero_voltage": SAFE_ZERO_VOLTAGE, "gate_block": SAFE_GATE_BLOCK}
HOST_STALE, HOST_GAP, HOST_LOST, HOST_STOP, HOST_PROTOCOL, HOST_SEQUENCE = 1, 2, 4, 8, 16, 32
#: event log: rows of (tick, kind, cause, value); kinds
EVT_TRIP, EVT_RESET_ACCEPTED, EVT_RESET_REFUSED, EVT_RESET_IDLE, EVT_WARN, EVT_ALSO = range(1, 7)
EVENT_NAMES = {EVT_TRIP: "trip", EVT_RESET_ACCEPTED: "reset accepted",
               EVT_RESET_REFUSED: "reset refused", EVT_RESET_IDLE: "reset (nothing latched)",
               EVT_WARN: "warning", EVT_ALSO: "also beyond while tripped"}
#: cause code logged for "a non-finite value" when the signal is not known (a later cause)
CAUSE_NONFINITE_ANY = CAUSE_NONFINITE + 999
EVENT_LOG_SIZE = 256


@dataclass(frozen=True)
class Interlock:
    """One limit: ``signal`` trips when above (or below) ``threshold`` for ``debounce`` ticks."""

    signal: str
    threshold: float
    above: bool = True
    debounce: int = 1
    unit: str = ""
    side: int = -1   # SIDE_*; -1: from ``above``
    action: str = "trip"   # or "warn": logged when it starts, never latched
    partner: str = ""      # cross-check: the signal that must agree within ``threshold``
    drop_current: str = ""  # cross-check: the current whose drop separates the two signals
    drop_R: float = 0.0     # [ohm]
    drop_L: float = 0.0     # [H]

    def __post_init__(self):
        if self.side < 0:
            object.__setattr__(self, "side", SIDE_ABOVE if self.above else SIDE_BELOW)

    @property
    def side_code(self) -> int:
        return self.side

    def describe(self) -> str:
        deb = f" for {self.debounce} ticks" if self.debounce > 1 else ""
        sc = self.side_code
        if sc == SIDE_FROZEN:
            return f"{self.signal} frozen for {self.debounce} ticks"
        if sc == SIDE_CROSS:
            other = self.partner
            if self.drop_current:
                other = (f"({self.partner} - {self.drop_R:g} ohm * {self.drop_current} - "
                         f"{self.drop_L:g} H * d{self.drop_current}/dt)")
            return (f"|{self.signal} - {other}| > {self.threshold:g} {self.unit}{deb}"
                    .replace("  ", " "))
        if sc == SIDE_MAGNITUDE:
            return f"|{self.signal}| > {self.threshold:g} {self.unit}{deb}".replace("  ", " ")
        side = ">" if sc == SIDE_ABOVE else "<"
        return f"{self.signal} {side} {self.threshold:g} {self.unit}{deb}".replace("  ", " ")

    def cause_id(self) -> str:
        """Short name of this cause, as interlock test suites write it: 'v_out above'."""
        return f"{self.signal} {SIDE_WORDS[self.side_code]}"


@dataclass
class InterlockTable:
    """Interlocks resolved against the protect vector [plant outputs..., controller outputs...]."""

    rows: list[Interlock]
    names: list[str]
    sig: np.ndarray
    side: np.ndarray
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
            if r.side_code == SIDE_FROZEN and r.signal in [d[0] for d in DERIVED]:
                raise InterlockConfigError(f"a frozen check on {r.signal} makes no sense: it is "
                                           f"derived, not measured")
            if r.side_code == SIDE_CROSS:
                if r.partner not in names:
                    close = difflib.get_close_matches(r.partner, names, n=3)
                    hint = (f"; did you mean {', '.join(close)}?" if close
                            else f"; signals: {', '.join(names)}")
                    raise InterlockConfigError(f"cross-check of {r.signal} against unknown "
                                               f"signal {r.partner!r}{hint}")
                if r.partner == r.signal:
                    raise InterlockConfigError(f"cross-check of {r.signal} against itself: name "
                                               f"another signal")
                if not r.threshold >= 0.0:
                    raise InterlockConfigError(f"cross-check of {r.signal}: band {r.threshold!r} "
                                               f"{r.unit} is negative".replace("  ", " "))
                if r.drop_current and r.drop_current not in names:
                    raise InterlockConfigError(f"cross-check of {r.signal}: drop current "
                                               f"{r.drop_current!r} is not a signal; signals: "
                                               f"{', '.join(names)}")
                if not (math.isfinite(r.drop_R) and math.isfinite(r.drop_L)):
                    raise InterlockConfigError(f"cross-check of {r.signal}: drop R and L must "
                                               f"be finite")
            if not math.isfinite(r.threshold):
                # a NaN limit would trip on every tick (every comparison is written so NaN trips)
                raise InterlockConfigError(f"interlock on {r.signal}: threshold {r.threshold!r} "
                                           f"{r.unit} is not finite".replace("  ", " "))
            if r.action not in ("trip", "warn"):
                raise InterlockConfigError(f"interlock on {r.signal}: action {r.action!r}; "
                                           f"actions: trip, warn")
            if r.debounce < 1:
                raise InterlockConfigError(f"interlock on {r.signal}: debounce {r.debounce} < 1 tick")
            sig.append(names.index(r.signal))
        thr = [r.threshold for r in rows]
        if any(r.side_code == SIDE_CROSS for r in rows):
            for r in rows:
                if r.side_code == SIDE_CROSS:
                    thr += [names.index(r.partner),
                            names.index(r.drop_current) if r.drop_current else -1,
                            r.drop_R, r.drop_L]
                else:
                    thr += [-1, -1, 0.0, 0.0]
        return cls(rows=list(rows), names=list(names),
                   sig=np.array(sig, dtype=np.int64),
                   side=np.array([r.side_code + (SIDE_WARN if r.action == "warn" else 0)
                                  for r in rows], dtype=np.int64),
                   thr=np.array(thr, dtype=np.float64),
                   deb=np.array([r.debounce for r in rows], dtype=np.int64))

    def warn_mask(self) -> int:
        return sum(1 << j for j, r in enumerate(self.rows) if r.action == "warn")

    def cause_text(self, cause: int, n_y: int = 0) -> str:
        """Human-readable latched cause."""
        if cause >= CAUSE_WATCHDOG:
            name = WD_NAMES[cause - CAUSE_WATCHDOG]
            return name if name == "stop requested" else f"watchdog {name}"
        if cause == -CAUSE_CONTROLLER + CODE_NONFINITE_STATE:
            return "non-finite controller state"
        if cause <= -CAUSE_CONTROLLER:
            return f"controller fault code {cause + CAUSE_CONTROLLER}"
        if cause <= 0:
            return "none"
        if cause < CAUSE_NONFINITE:
            return "interlock " + self.rows[cause - 1].describe()
        if cause < CAUSE_CONTROLLER:
            j = cause - CAUSE_NONFINITE
            return f"non-finite value of {self.names[j] if j < len(self.names) else 'a signal'}"
        code = cause - CAUSE_CONTROLLER
        more = " or above (the trip's value holds the code)" if code == CONTROLLER_CODE_MAX else ""
        return f"controller fault code {code}{more}"

    def cause_id(self, cause: int) -> str:
        """Short name of a cause: 'v_out above', 'non-finite v_out', 'controller fault',
        'watchdog stale', ... (the names interlock test suites expect)."""
        if cause >= CAUSE_WATCHDOG:
            name = WD_NAMES[cause - CAUSE_WATCHDOG]
            return name if name == "stop requested" else f"watchdog {name}"
        if cause == -CAUSE_CONTROLLER + CODE_NONFINITE_STATE:
            return "non-finite controller state"
        if cause <= -CAUSE_CONTROLLER or cause >= CAUSE_CONTROLLER:
            return "controller fault"
        if cause <= 0:
            return "none"
        if cause < CAUSE_NONFINITE:
            return self.rows[cause - 1].cause_id()
        j = cause - CAUSE_NONFINITE
        return f"non-finite {self.names[j] if j < len(self.names) else 'value'}"


def new_watchdog(budget_s: float = 0.0, debounce: int = 1, safe_action: str = "zero_voltage",
                 contactor_s: float | None = None, delay_halves: int = 0) -> np.ndarray:
    wd = np.zeros(WD_SIZE)
    wd[W_BUDGET] = budget_s
    wd[W_DEB] = debounce
    wd[W_SAFE_ACTION] = SAFE_ACTIONS[safe_action]
    wd[W_CONTACTOR] = -1.0 if contactor_s is None else contactor_s
    wd[W_DELAY] = delay_halves
    return wd


@njit(cache=True)
def contactor(t, latch, wd, d):
    """The output contactor: once it has opened (``wd[W_CONTACTOR]`` seconds after the latched
    trip; never when negative) the load is disconnected: d = 0 (no power, conductance or
    current). Closed again when an accepted reset clears the latch."""
    if latch[L_TRIPPED] != 0.0 and wd[W_CONTACTOR] >= 0.0:
        if t >= latch[L_TIME] + wd[W_CONTACTOR] - 1e-9 * (1.0 + abs(t)):
            d[0] = 0.0
            d[1] = 0.0
            d[2] = 0.0


@njit(cache=True)
def follow_enable(t, enable, latch):
    """The stand-in simulator's view of the runtime's trip: its actuation frames carry the
    output-enable flag (off while a trip is latched). The first disabled actuation latches
    (at t, the trip tick's time, as the runtime's latch has it); an enabled one clears it."""
    if not enable:
        if latch[L_TRIPPED] == 0.0:
            latch[L_TRIPPED] = 1.0
            latch[L_TIME] = t
    else:
        latch[L_TRIPPED] = 0.0


@njit(cache=True)
def gates_blocked(latch, wd):
    """True while a latched trip blocks the converter's gates (safe action gate_block)."""
    return latch[L_TRIPPED] != 0.0 and wd[W_SAFE_ACTION] == SAFE_GATE_BLOCK


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

    A reset (requested at a scheduled time, or by the operator from the live view through
    ``latch[L_RESET_NOW]``) clears the latch only if no interlock condition
    holds on this tick; otherwise it is refused and the safe state stays (ISO 13849-1
    5.2.2.3: a stop is held until it is safe, and restarting needs a separate, intended reset).
    The output stays safe on the reset tick; the controller is re-initialised from the
    measurements on the next tick (bumpless restart). Returns the interlock word with the reset
    bits set.
    """
    warn_mask = int(latch[L_WARN_MASK])
    newly = (word & ~int(latch[L_PREV_WORD])) & CONDITIONS
    latch[L_PREV_WORD] = float(word & CONDITIONS)
    if latch[L_TRIPPED] != 0.0 and latch[L_LOGGED] == 0.0:
        _log(evlog, evn, tick, EVT_TRIP, latch[L_CAUSE], latch[L_VALUE])
        latch[L_LOGGED] = 1.0
    if newly != 0:
        # conditions that start now: warnings always; anything else while a trip is latched
        # (the first cause stays latched; the later ones are logged)
        for b in range(53):
            if not (newly >> b) & 1:
                continue
            if b < MAX_ROWS:
                cause = 1.0 + b
            elif b == BIT_NONFINITE:
                cause = float(CAUSE_NONFINITE_ANY)
            elif b == BIT_CONTROLLER:
                # the code protect saw on this tick: a non-finite controller state, or the code
                # the controller returned (never "code 0": the bit is set only for a non-zero one)
                cause = float(controller_cause(int(latch[L_CODE])))
            else:
                cause = float(CAUSE_WATCHDOG + b - BIT_WATCHDOG)
            lc = latch[L_CAUSE]
            same = (cause == lc
                    or (b == BIT_NONFINITE and CAUSE_NONFINITE <= lc < CAUSE_CONTROLLER)
                    or (b == BIT_CONTROLLER and (CAUSE_CONTROLLER <= lc < CAUSE_WATCHDOG
                                                 or lc <= -CAUSE_CONTROLLER)))
            if b < MAX_ROWS and (warn_mask >> b) & 1:
                _log(evlog, evn, tick, EVT_WARN, cause, 0.0)
            elif latch[L_TRIPPED] != 0.0 and not same:
                _log(evlog, evn, tick, EVT_ALSO, cause, 0.0)
    i = reset_i[0]
    due = i < reset_t.shape[0] and t >= reset_t[i]
    live = latch[L_RESET_NOW] != 0.0
    if due or live:
        if due:
            reset_i[0] = i + 1
        latch[L_RESET_NOW] = 0.0
        word |= 1 << BIT_RESET_REQUESTED
        if latch[L_TRIPPED] == 0.0:
            _log(evlog, evn, tick, EVT_RESET_IDLE, 0.0, 0.0)
        elif (word & CONDITIONS & ~warn_mask) != 0:
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
def controller_cause(code):
    """The cause code of a non-zero controller fault code. A negative code (-1 is a common
    "failed") must not land in the non-finite cause range, nor a code of 1000 or more in the
    watchdog range: those share the cause of code 999 (the trip's value keeps the code)."""
    return CAUSE_CONTROLLER + min(code, CONTROLLER_CODE_MAX) if code > 0 else -CAUSE_CONTROLLER + code


@njit(cache=True)
def _trip(latch, cause, tick, t, value):
    if latch[L_TRIPPED] == 0.0:
        latch[L_TRIPPED] = 1.0
        latch[L_CAUSE] = cause
        latch[L_TICK] = tick
        latch[L_TIME] = t
        latch[L_VALUE] = value


@njit(cache=True)
def watch(tick, t, wd, latch):
    """The watchdogs of one tick, before the interlocks: trip on an overrun of the last tick
    (host-measured or forced, beyond the budget for the debounce count of ticks in a row) and on
    the link conditions the host raised. Returns their bits of the interlock word."""
    word = 0
    late = wd[W_HOST_TIME]
    if wd[W_FORCED] > late:
        late = wd[W_FORCED]
    if wd[W_BUDGET] > 0.0 and not (late <= wd[W_BUDGET]):
        word |= 1 << BIT_WATCHDOG
        wd[W_CNT] += 1.0
        if wd[W_CNT] >= wd[W_DEB]:
            _trip(latch, CAUSE_WATCHDOG, tick, t, late)
    else:
        wd[W_CNT] = 0.0
    hb = int(wd[W_HOST_BITS])
    for b in range(len(WD_NAMES) - 1):
        if hb & (1 << b):
            word |= 1 << (BIT_WATCHDOG + 1 + b)
            _trip(latch, CAUSE_WATCHDOG + 1 + b, tick, t, wd[W_HOST_VALUE])
    return word


@njit(cache=True)
def state_code(code, xc):
    """The controller's fault code; CODE_NONFINITE_STATE if it returned 0 with a non-finite
    state. A NaN in a controller state need not reach the command (a clamp written with min and
    max turns it into a rail value), but the controller is broken from then on."""
    if code == 0:
        for j in range(xc.shape[0]):
            if not (abs(xc[j]) < np.inf):
                return CODE_NONFINITE_STATE
    return code


@njit(cache=True)
def _cross(k, nr, ny, nu, m, held, first, ts, pv, sig, thr):
    """Cross-check row k: (disagreement, beyond the band). The disagreement is
    signal - partner; with a drop current i, R and L it is signal - (partner - R i - L di/dt),
    both taken over the last tick by the trapezoidal rule (the mean of this tick's and the last
    one's values, di/dt the backward difference), which keeps the L di/dt of a load step out of
    the disagreement; on tick 0 (no last tick) such a row is not judged. A non-finite value is
    beyond (the plausibility check trips on it too)."""
    x = nr + XC_SIZE * k
    p = int(thr[x + XC_PARTNER])
    c = int(thr[x + XC_CURRENT])
    j = sig[k]
    if held and (ny <= p < ny + nu or ny <= j < ny + nu):
        return 0.0, False  # the command that is not applied
    a = pv[j]
    b = pv[p]
    if not (abs(a) < np.inf and abs(b) < np.inf):
        return a, True
    if c < 0:
        d = a - b
    elif first:
        return 0.0, False
    else:
        a0 = pv[m + j]
        b0 = pv[m + p]
        i1 = pv[c]
        i0 = pv[m + c]
        if not (abs(a0) < np.inf and abs(b0) < np.inf and abs(i1) < np.inf
                and abs(i0) < np.inf):
            return a, True
        d = (0.5 * (a + a0) - 0.5 * (b + b0) + thr[x + XC_R] * 0.5 * (i1 + i0)
             + thr[x + XC_L] * (i1 - i0) / ts)
    return d, not (abs(d) <= thr[k])


@njit(cache=True)
def protect(tick, t, ts, y, u, code, dix, sig, side, thr, deb, cnt, latch, pv, safe_u):
    """Evaluate every interlock on [y, u, derived]; latch the first cause; force the safe output.

    ``dix`` holds the indices of v_out, i_out and (optional third entry) v_dc in y (-1 when
    absent); ``pv`` has room for the protect vector of this tick and of the last one. Returns the interlock word: bit j set
    while row j's condition holds (before debounce), BIT_NONFINITE, BIT_CONTROLLER for the
    plausibility checks, BIT_LATCHED while tripped.
    """
    ny = y.shape[0]
    nu = u.shape[0]
    m = ny + nu + 2
    # the last tick's vector moves to the second half (on tick 0 there is none: it is this one)
    first = tick == 0
    if not first:
        for j in range(m):
            pv[m + j] = pv[j]
    for j in range(ny):
        pv[j] = y[j]
    for j in range(nu):
        pv[ny + j] = u[j]
    iv = dix[0]
    ii = dix[1]
    # derived signals; a non-finite input trips the non-finite check below, and the guard keeps
    # inf * 0 and inf - inf (which warn when the kernel runs as plain Python) out of the way
    pv[ny + nu] = 0.0
    pv[ny + nu + 1] = 0.0
    if iv >= 0 and ii >= 0 and abs(y[iv]) < np.inf and abs(y[ii]) < np.inf:
        pv[ny + nu] = y[iv] * y[ii]
    if first:
        for j in range(m):
            pv[m + j] = pv[j]
    elif iv >= 0 and abs(y[iv]) < np.inf and abs(pv[m + iv]) < np.inf:
        pv[ny + nu + 1] = (y[iv] - pv[m + iv]) / ts
    word = 0
    # while a trip is latched the controller's command is not applied, so it is not judged:
    # a controller whose state a bad measurement poisoned (NaN) must not block the reset that
    # re-initialises it; after the reset it is judged again from its first tick
    held = latch[L_TRIPPED] != 0.0
    n_judged = ny if held else ny + nu
    # plausibility first: a non-finite value makes every limit on it meaningless
    for j in range(n_judged):
        v = pv[j]
        # NaN or +-Inf; written without arithmetic because inf - inf warns when the kernel runs
        # as plain Python (NUMBA_DISABLE_JIT=1)
        if not (abs(v) < np.inf):
            word |= 1 << BIT_NONFINITE
            _trip(latch, CAUSE_NONFINITE + j, tick, t, v)
            break
    if code != 0 and not held:
        word |= 1 << BIT_CONTROLLER
        latch[L_CODE] = code
        _trip(latch, controller_cause(code), tick, t, float(code))
    # did any controller output change since the last tick (for the frozen check)? A change
    # of rounding size is not a change: at a settled operating point an integrator moves the
    # command by a few units in the last place while the plant's output stays exactly put,
    # which is no sign of a stuck sensor (see U_MOVED_REL)
    u_moved = False
    for j in range(nu):
        a = pv[ny + j]
        b = pv[m + ny + j]
        if abs(a) < np.inf and abs(b) < np.inf:
            # halves: a - b itself could overflow (and warn, run as plain Python)
            if abs(0.5 * a - 0.5 * b) > 0.5 * U_MOVED_REL * abs(a):
                u_moved = True
        elif a != b:
            u_moved = True
    # a command at the converter's range [0, v_dc] counts like a moving one for the frozen
    # check (see the module docstring); not while the safe output is held
    u_sat = False
    if nu > 0 and not held:
        a = pv[ny]
        ivdc = dix[2] if dix.shape[0] > 2 else -1
        if a <= 0.0 or (ivdc >= 0 and a >= y[ivdc]):
            u_sat = True
    for k in range(sig.shape[0]):
        if held and ny <= sig[k] < ny + nu:
            cnt[k] = 0  # a limit on the command that is not applied
            continue
        v = pv[sig[k]]
        sk = side[k]
        warn = sk >= SIDE_WARN
        if warn:
            sk -= SIDE_WARN
        if sk == SIDE_ABOVE:
            beyond = not (v <= thr[k])
        elif sk == SIDE_BELOW:
            beyond = not (v >= thr[k])
        elif sk == SIDE_MAGNITUDE:
            beyond = not (abs(v) <= thr[k])
        elif sk == SIDE_CROSS:
            v, beyond = _cross(k, sig.shape[0], ny, nu, m, held, first, ts, pv, sig, thr)
        else:
            beyond = (u_moved or u_sat) and v == pv[m + sig[k]]
        if beyond:
            word |= 1 << k
            cnt[k] += 1
            if cnt[k] >= deb[k] and not warn:
                _trip(latch, 1 + k, tick, t, v)
        else:
            cnt[k] = 0
    if latch[L_TRIPPED] != 0.0:
        word |= 1 << BIT_LATCHED
        for j in range(nu):
            # a NaN entry keeps the controller's value: a column written for the record, not
            # a command (paralleled units' trip causes and corrections)
            if safe_u[j] == safe_u[j]:
                u[j] = safe_u[j]
    return word
