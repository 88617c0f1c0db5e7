"""Switching-level buck output stage: N interleaved half-bridge phases with PWM and dead time,
feeding the two-stage LC filter of :mod:`hilrig.plugins.plants.two_stage_lc`, with a summed load.

.. math::

    L_{ph} \\frac{di_k}{dt} = v_{sw,k} - R_{ph} i_k - v_{C1} \\quad (k = 1..N), \\qquad
    C_1 \\frac{dv_{C1}}{dt} = \\sum_k i_k - i_{L2},

    L_2 \\frac{di_{L2}}{dt} = v_{C1} - R_2 i_{L2} - v_{out}, \\qquad
    C_2 \\frac{dv_{out}}{dt} = i_{L2} - i_{load}(v_{out})

Switch node v_sw,k of phase k: V_dc while its high-side switch conducts, 0 V while its low-side
switch conducts. Gate commands come from a triangular carrier at f_sw (phase k's carrier
shifted by k/N of a period, 360/N degrees) compared with the duty D = u / V_dc clamped to
[0, 1]; the command is high while the carrier is below D, centred on the carrier's valley. Each
switch turns on t_dead after its command (dead time); during dead time the node follows the
diodes by the sign of the phase current (i > 0: low-side diode, 0 V; i < 0: high-side diode,
V_dc); a current that reaches zero in dead time stays zero until a switch turns on.

Integration (``advance_period``, the loop's optional per-period kernel): the switching
instants of the period are solved for from the carrier (closed form), so the period is a
sequence of intervals on which the circuit is smooth; each interval is integrated with RK4
steps, one when it is short against the filter's rates and the load's, more where it is not
(the stiffness rule of runtime/loop.py: dt * linear rate <= 0.5, dt * load rate <= 0.2). A
phase current that reaches zero in dead time ends its interval at that instant, located by
bracketed root finding on the RK4 step (never past it). The cost per period grows with the
number of switching instants in it, not with a time resolution.

The state also carries five period records written by ``advance_period``, not integrated by
the generic loop: the previous period's duty (the dead-time logic needs the command of the
last t_dead before the period), the fraction of the period phase 1's switch node was at V_dc,
and the means over the period of the DC-link power, of the summed phase current and of v_out.

Limits of validity: ideal switches and diodes (no forward drop, no switching loss, no
recovery), ideal DC link, linear inductors and capacitors; at most 4 phases; t_dead shorter
than the control period; the constant-power load is replaced below ``v_load_min``.

References
----------
R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*, 2nd ed., Springer, 2001,
ch. 2 (buck converter, inductor current ripple) and ch. 3 (averaged equivalent circuit).
"""
import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, Param, Signal
from hilrig.plugins.plants.loads import load_current

#: the most phases the state holds (the loop needs a fixed state count)
MAX_PHASES = 4
# indices into p
(V_DC, F_SW, T_SW, INV_LP, RP, INV_C1, INV_L2, R2, INV_C2, V_LOAD_MIN, NPH, DELTA,
 LIN_K, SRC_K, VOUT_K, HLP, HC1, HL2, HC2) = range(19)
# indices into the state
I1, I2, I3, I4, VC1, IL2, VOUT, D_PREV, DUTY1, P_DC, IL1_MEAN, VOUT_MEAN = range(12)
#: the stiffness rule (the same constants as runtime/loop.py Z_LINEAR and Z_FAST): an RK4 step
#: dt keeps dt * linear_rate <= Z_LIN and dt * fast_rate <= Z_FST
Z_LIN = 0.5
Z_FST = 0.2
#: at most this many RK4 steps in one call of advance_period (else the state becomes NaN and
#: the loop ends the run with a plant integration error)
MAX_STEPS = 2_000_000
#: carrier positions closer than this (in carrier periods) count as the same instant
EPS = 1e-12


def _rates(values) -> tuple[float, float, float, float]:
    v = values
    n = int(round(v["phases"]))
    wp = 1.0 / np.sqrt(v["L_phase"] * v["C1"])
    w21 = 1.0 / np.sqrt(v["L2"] * v["C1"])
    w22 = 1.0 / np.sqrt(v["L2"] * v["C2"])
    return n, wp, w21, w22


def linear_rate(values) -> float:
    """A bound [1/s] on every eigenvalue of the filter's linear part with every phase
    conducting (Gershgorin's circle theorem in energy coordinates (sqrt(L) i, sqrt(C) v), as
    for two_stage_lc; the row of v_C1 couples to N phase inductors)."""
    v = values
    n, wp, w21, w22 = _rates(v)
    return float(max(v["R_phase"] / v["L_phase"] + wp, n * wp + w21,
                     v["R2"] / v["L2"] + w21 + w22, w22))


def _build(values, ctx):
    v = values
    n = v["phases"]
    if not (abs(n - round(n)) < 1e-9 and 1 <= round(n) <= MAX_PHASES):
        raise ValueError(f"phases = {n:g}: give a whole number of phases from 1 to {MAX_PHASES}")
    if not (v["t_dead"] < ctx.Ts):
        raise ValueError(f"t_dead = {v['t_dead'] * 1e6:g} us is not shorter than the control "
                         f"period Ts = {ctx.Ts * 1e6:g} us: shorten t_dead or lengthen Ts")
    if not (v["t_dead"] * v["f_sw"] < 0.5):
        raise ValueError(f"t_dead = {v['t_dead'] * 1e6:g} us is not shorter than half a "
                         f"switching period at f_sw = {v['f_sw']:g} Hz: shorten t_dead")
    n = int(round(n))
    return np.array([v["V_dc"], v["f_sw"], 1.0 / v["f_sw"], 1.0 / v["L_phase"], v["R_phase"],
                     1.0 / v["C1"], 1.0 / v["L2"], v["R2"], 1.0 / v["C2"], v["v_load_min"],
                     float(n), v["t_dead"] * v["f_sw"],
                     linear_rate(v) / Z_LIN,
                     v["V_dc"] * np.sqrt(2.0 * n / v["L_phase"]), np.sqrt(2.0 / v["C2"]),
                     0.5 * v["L_phase"], 0.5 * v["C1"], 0.5 * v["L2"], 0.5 * v["C2"]])


def _equilibrium(values, v_out, d):
    """Steady state at v_out [V] with load d: the load current shared equally by the phases;
    the records at their steady values (duty without the dead-time error)."""
    i = float(load_current(v_out, np.asarray(d, dtype=np.float64), values["v_load_min"]))
    n = int(round(values["phases"]))
    v1 = v_out + values["R2"] * i
    ip = i / n
    duty = min(max((v1 + values["R_phase"] * ip) / values["V_dc"], 0.0), 1.0)
    x = np.zeros(12)
    x[:n] = ip
    x[VC1], x[IL2], x[VOUT] = v1, i, v_out
    x[D_PREV], x[DUTY1], x[P_DC] = duty, duty, values["V_dc"] * duty * i
    x[IL1_MEAN], x[VOUT_MEAN] = i, v_out
    return x


_PHASE_NAMES = tuple(f"i_ph{k + 1}" for k in range(MAX_PHASES))

DECLARATION = Declaration(
    kind="plant",
    name="switched_two_stage",
    summary="Switching-level buck stage: N interleaved PWM phases with dead time, two-stage LC "
            "filter, summed load (12 states)",
    params=(
        Param("V_dc", "V", 800.0, (0.0, 1500.0), "DC-link voltage; duty = u / V_dc clamped to [0, 1]", lower_open=True),
        Param("f_sw", "Hz", 20e3, (0.0, 1e6), "switching (carrier) frequency of each phase", lower_open=True),
        Param("t_dead", "s", 0.5e-6, (0.0, 20e-6), "dead time: each switch turns on this long after its gate command"),
        Param("phases", "-", 3.0, (1.0, 4.0), "number of interleaved phases (whole number, 1-4); carriers shifted by 360/N degrees"),
        Param("L_phase", "H", 450e-6, (0.0, 1.0), "inductance of each phase", lower_open=True),
        Param("R_phase", "ohm", 15e-3, (0.0, 10.0), "series resistance of each phase inductor and its wiring"),
        Param("C1", "F", 220e-6, (0.0, 1.0), "first-stage capacitance", lower_open=True),
        Param("L2", "H", 100e-6, (0.0, 1.0), "second-stage (output-side) inductance", lower_open=True),
        Param("R2", "ohm", 3e-3, (0.0, 10.0), "series resistance of L2 and wiring"),
        Param("C2", "F", 680e-6, (0.0, 1.0), "output capacitance", lower_open=True),
        Param("v_load_min", "V", 10.0, (0.0, 1000.0), "below this output voltage the constant-power load is modelled as a resistance (its model is singular at 0 V)", lower_open=True),
    ),
    states=tuple(Signal(n, "A", f"phase {k + 1} inductor current (0 when the phase is unused)")
                 for k, n in enumerate(_PHASE_NAMES))
    + (Signal("v_C1", "V", "first-stage capacitor voltage"),
       Signal("i_L2", "A", "second-stage inductor current"),
       Signal("v_out", "V", "output (second-stage capacitor) voltage"),
       Signal("d_prev", "-", "record: the duty commanded in the last period"),
       Signal("duty_1", "-", "record: fraction of the last period phase 1's switch node was at V_dc"),
       Signal("p_dc", "W", "record: mean DC-link power over the last period"),
       Signal("i_L1_mean", "A", "record: mean of the summed phase current over the last period"),
       Signal("v_out_mean", "V", "record: mean output voltage over the last period")),
    inputs=(Signal("u", "V", "converter voltage command (duty = u / V_dc)"),),
    outputs=(Signal("v_out", "V", "output voltage"),
             Signal("i_out", "A", "load current"),
             Signal("i_L1", "A", "sum of the phase currents"),
             Signal("v_C1", "V", "first-stage capacitor voltage"),
             Signal("i_L2", "A", "second-stage inductor current"),
             Signal("v_dc", "V", "DC-link voltage"))
    + tuple(Signal(n, "A", f"phase {k + 1} inductor current") for k, n in enumerate(_PHASE_NAMES))
    + (Signal("duty_1", "-", "fraction of the last period phase 1's switch node was at V_dc"),
       Signal("p_dc", "W", "mean DC-link power over the last period"),
       Signal("i_L1_mean", "A", "mean of the summed phase current over the last period"),
       Signal("v_out_mean", "V", "mean output voltage over the last period")),
    source="R. W. Erickson and D. Maksimovic, Fundamentals of Power Electronics, 2nd ed., "
           "Springer, 2001, ch. 2 (buck converter, switching ripple) and ch. 3",
    equilibrium=_equilibrium,
    build=_build,
)


@njit(cache=True, inline="always")
def _duty(p, u):
    dd = u[0] / p[V_DC]
    if dd > 1.0:
        return 1.0
    if not (dd >= 0.0):  # also NaN: a NaN command gives duty 0 (and trips elsewhere)
        return 0.0
    return dd


@njit(cache=True)
def derivs(t, p, x, u, d):
    """The per-phase averaged equations (each phase's node at D V_dc, no dead time): the
    generic integration's fallback and the linearisation's model. The loop uses
    ``advance_period`` instead; the records do not change here."""
    uc = _duty(p, u) * p[V_DC]
    v1, i2, vo = x[VC1], x[IL2], x[VOUT]
    n = p[NPH]
    a = p[INV_LP]
    di1 = (uc - p[RP] * x[I1] - v1) * a
    di2 = (uc - p[RP] * x[I2] - v1) * a if n > 1.5 else 0.0
    di3 = (uc - p[RP] * x[I3] - v1) * a if n > 2.5 else 0.0
    di4 = (uc - p[RP] * x[I4] - v1) * a if n > 3.5 else 0.0
    i_load = load_current(vo, d, p[V_LOAD_MIN])
    return (di1, di2, di3, di4,
            ((x[I1] + x[I2]) + (x[I3] + x[I4]) - i2) * p[INV_C1],
            (v1 - p[R2] * i2 - vo) * p[INV_L2],
            (i2 - i_load) * p[INV_C2],
            0.0, 0.0, 0.0, 0.0, 0.0)


@njit(cache=True)
def outputs(t, p, x, u, d, y):
    y[0] = x[VOUT]
    y[1] = load_current(x[VOUT], d, p[V_LOAD_MIN])
    y[2] = (x[I1] + x[I2]) + (x[I3] + x[I4])
    y[3] = x[VC1]
    y[4] = x[IL2]
    y[5] = p[V_DC]
    y[6] = x[I1]
    y[7] = x[I2]
    y[8] = x[I3]
    y[9] = x[I4]
    y[10] = x[DUTY1]
    y[11] = x[P_DC]
    y[12] = x[IL1_MEAN]
    y[13] = x[VOUT_MEAN]


# ---- the carrier: positions in carrier periods; phase k's carrier at y = t f_sw + k / N -------
# The gate command H is high while the triangular carrier (0 at whole y, 1 at half y) is below
# the duty D: fractional part of y below D/2 or above 1 - D/2. Its edges: falls at m + D/2,
# rises at m + 1 - D/2 (none for D = 0 or 1).

@njit(cache=True, inline="always")
def _gate(y, dd):
    f = y - np.floor(y)
    return f < 0.5 * dd or f > 1.0 - 0.5 * dd


@njit(cache=True, inline="always")
def _last_edge(y, dd):
    """The last edge of H at or before carrier position y; -inf when H has none."""
    if not (dd > 0.0 and dd < 1.0):
        return -np.inf
    m = np.floor(y)
    f = y - m
    hd = 0.5 * dd
    if f >= 1.0 - hd:
        return m + 1.0 - hd
    if f >= hd:
        return m + hd
    return m - hd


@njit(cache=True, inline="always")
def _next_edge(y, dd):
    """The first edge of H after carrier position y; inf when H has none."""
    if not (dd > 0.0 and dd < 1.0):
        return np.inf
    m = np.floor(y)
    f = y - m
    hd = 0.5 * dd
    if f < hd:
        return m + hd
    if f < 1.0 - hd:
        return m + 1.0 - hd
    return m + 1.0 + hd


@njit(cache=True, inline="always")
def _phase_events(xi, a, dd, dp, jump, delta):
    """Phase events seen from local carrier time a (carrier periods since the period's start;
    the phase's carrier is at xi + a): the last gate edge at or before a (the period's own
    edges, else a jump of the command at 0 when the duty changed across it, else the previous
    duty's last edge before the period) and the next instant after a at which the phase's
    switch state changes (a gate edge, or the end of a dead time)."""
    e = _last_edge(xi + a, dd) - xi
    if not (e >= 0.0):
        if jump:
            e = 0.0
        else:
            e = _last_edge(xi, dp) - xi
            if e > 0.0:
                e = 0.0
    nxt = _next_edge(xi + a, dd) - xi
    if e + delta > a and e + delta < nxt:
        nxt = e + delta
    return e, nxt


@njit(cache=True, inline="always")
def _node(p, xi, mid, e, dd, i, v1, used):
    """Switch node of one phase on an interval whose midpoint is mid (local carrier time):
    (node voltage, 1.0 if the phase's current flows (0.0: unused, or held at zero in dead
    time), 1.0 if the node is at V_dc, 1.0 if in dead time with a current that may reach zero)."""
    if not used:
        return 0.0, 0.0, 0.0, 0.0
    if mid - e < p[DELTA]:
        # dead time: the diodes decide by the sign of the current
        if i > 0.0:
            return 0.0, 1.0, 0.0, 1.0
        if i < 0.0:
            return p[V_DC], 1.0, 1.0, 1.0
        # no current: it stays zero unless v_C1 leaves [0, V_dc] and a diode conducts
        if v1 < 0.0:
            return 0.0, 1.0, 0.0, 0.0
        if v1 > p[V_DC]:
            return p[V_DC], 1.0, 1.0, 0.0
        return 0.0, 0.0, 0.0, 0.0
    if _gate(xi + mid, dd):
        return p[V_DC], 1.0, 1.0, 0.0
    return 0.0, 1.0, 0.0, 0.0


@njit(cache=True, inline="always")
def _f(p, d, vn, g, hi, s):
    """Derivatives of (i1..i4, v_C1, i_L2, v_out) and of the period's integrals (DC-link
    energy, charge of the summed phase current, integral of v_out), the nodes vn held."""
    v1 = s[4]
    i2 = s[5]
    vo = s[6]
    a = p[INV_LP]
    r = p[RP]
    isum = (s[0] + s[1]) + (s[2] + s[3])
    return ((vn[0] - r * s[0] - v1) * a * g[0],
            (vn[1] - r * s[1] - v1) * a * g[1],
            (vn[2] - r * s[2] - v1) * a * g[2],
            (vn[3] - r * s[3] - v1) * a * g[3],
            (isum - i2) * p[INV_C1],
            (v1 - p[R2] * i2 - vo) * p[INV_L2],
            (i2 - load_current(vo, d, p[V_LOAD_MIN])) * p[INV_C2],
            p[V_DC] * ((hi[0] * s[0] + hi[1] * s[1]) + (hi[2] * s[2] + hi[3] * s[3])),
            isum,
            vo)


@njit(cache=True, inline="always")
def _rk4(dt, p, d, vn, g, hi, s):
    """One classic RK4 step of length dt (the switch nodes held)."""
    k1 = _f(p, d, vn, g, hi, s)
    h2 = 0.5 * dt
    k2 = _f(p, d, vn, g, hi, (s[0] + h2 * k1[0], s[1] + h2 * k1[1], s[2] + h2 * k1[2],
                              s[3] + h2 * k1[3], s[4] + h2 * k1[4], s[5] + h2 * k1[5],
                              s[6] + h2 * k1[6], s[7] + h2 * k1[7], s[8] + h2 * k1[8],
                              s[9] + h2 * k1[9]))
    k3 = _f(p, d, vn, g, hi, (s[0] + h2 * k2[0], s[1] + h2 * k2[1], s[2] + h2 * k2[2],
                              s[3] + h2 * k2[3], s[4] + h2 * k2[4], s[5] + h2 * k2[5],
                              s[6] + h2 * k2[6], s[7] + h2 * k2[7], s[8] + h2 * k2[8],
                              s[9] + h2 * k2[9]))
    k4 = _f(p, d, vn, g, hi, (s[0] + dt * k3[0], s[1] + dt * k3[1], s[2] + dt * k3[2],
                              s[3] + dt * k3[3], s[4] + dt * k3[4], s[5] + dt * k3[5],
                              s[6] + dt * k3[6], s[7] + dt * k3[7], s[8] + dt * k3[8],
                              s[9] + dt * k3[9]))
    w = dt / 6.0
    return (s[0] + w * (k1[0] + 2.0 * k2[0] + 2.0 * k3[0] + k4[0]),
            s[1] + w * (k1[1] + 2.0 * k2[1] + 2.0 * k3[1] + k4[1]),
            s[2] + w * (k1[2] + 2.0 * k2[2] + 2.0 * k3[2] + k4[2]),
            s[3] + w * (k1[3] + 2.0 * k2[3] + 2.0 * k3[3] + k4[3]),
            s[4] + w * (k1[4] + 2.0 * k2[4] + 2.0 * k3[4] + k4[4]),
            s[5] + w * (k1[5] + 2.0 * k2[5] + 2.0 * k3[5] + k4[5]),
            s[6] + w * (k1[6] + 2.0 * k2[6] + 2.0 * k3[6] + k4[6]),
            s[7] + w * (k1[7] + 2.0 * k2[7] + 2.0 * k3[7] + k4[7]),
            s[8] + w * (k1[8] + 2.0 * k2[8] + 2.0 * k3[8] + k4[8]),
            s[9] + w * (k1[9] + 2.0 * k2[9] + 2.0 * k3[9] + k4[9]))


@njit(cache=True, inline="always")
def _load_rate(p, vo, d):
    """|dI_load/dv| / C2 at v_out (see fast_rate)."""
    if vo >= p[V_LOAD_MIN]:
        g = d[1] - d[0] / (vo * vo)
    else:
        g = d[1] + d[0] / (p[V_LOAD_MIN] * p[V_LOAD_MIN])
    return abs(g) * p[INV_C2]


@njit(cache=True)
def _zero_crossing(dt, p, d, vn, g, hi, s, k):
    """The step length in (0, dt] at which phase k's current, of sign opposite to its sign at
    s (or zero) at the end of an RK4 step of length dt, reaches zero: Illinois regula falsi
    on the RK4 step's current, keeping the bracket's lower end on the side of the current's
    start, which is returned (the crossing is never overshot)."""
    f_lo = s[k]
    sg = 1.0 if f_lo > 0.0 else -1.0
    lo = 0.0
    hi_t = dt
    f_hi = _rk4(dt, p, d, vn, g, hi, s)[k]
    side = 0
    for _ in range(100):
        if not (hi_t - lo > 1e-15 * dt):
            break
        den = f_lo - f_hi
        m = lo + (hi_t - lo) * (f_lo / den) if den != 0.0 else 0.5 * (lo + hi_t)
        if not (m > lo and m < hi_t):
            m = 0.5 * (lo + hi_t)
        fm = _rk4(m, p, d, vn, g, hi, s)[k]
        if fm * sg > 0.0:
            lo = m
            f_lo = fm
            if side == 1:
                f_hi *= 0.5
            side = 1
        else:
            hi_t = m
            f_hi = fm
            if side == -1:
                f_lo *= 0.5
            side = -1
            if fm == 0.0:
                lo = m
                break
    return lo


@njit(cache=True)
def advance_period(t, h, p, s, u, d):
    """Advance the state tuple s over one control period [t, t + h], the command u and the load
    d held; return the new state tuple.

    The switching instants of every phase in the period are solved for from its carrier
    (``_phase_events``); between them the nodes are fixed and the circuit is smooth, and each
    interval is integrated with RK4 steps (at least one; more where the stiffness rule asks).
    A phase in dead time whose current reaches zero ends the interval at that instant
    (``_zero_crossing``) and is held at zero. Deterministic: the same inputs give the same bits.
    More than MAX_STEPS steps (a collapsing load) return a NaN state."""
    dd = _duty(p, u)
    dp = s[D_PREV]
    n = p[NPH]
    used1 = n > 1.5
    used2 = n > 2.5
    used3 = n > 3.5
    fsw = p[F_SW]
    tsw = p[T_SW]
    big_a = h * fsw
    z0 = t * fsw
    xi0 = z0 - np.floor(z0)
    y1 = z0 + 1.0 / n
    y2 = z0 + 2.0 / n
    y3 = z0 + 3.0 / n
    xi = (xi0, y1 - np.floor(y1), y2 - np.floor(y2), y3 - np.floor(y3))
    jump = (False, False, False, False)
    if dd != dp:
        jump = (_gate(xi[0] - EPS, dp) != _gate(xi[0] + EPS, dd),
                _gate(xi[1] - EPS, dp) != _gate(xi[1] + EPS, dd),
                _gate(xi[2] - EPS, dp) != _gate(xi[2] + EPS, dd),
                _gate(xi[3] - EPS, dp) != _gate(xi[3] + EPS, dd))
    delta = p[DELTA]
    e0, n0 = _phase_events(xi[0], 0.0, dd, dp, jump[0], delta)
    e1, n1 = _phase_events(xi[1], 0.0, dd, dp, jump[1], delta)
    e2, n2 = _phase_events(xi[2], 0.0, dd, dp, jump[2], delta)
    e3, n3 = _phase_events(xi[3], 0.0, dd, dp, jump[3], delta)
    if not used1:
        n1 = np.inf
    if not used2:
        n2 = np.inf
    if not used3:
        n3 = np.inf
    # physical states and the period's integrals (DC-link energy, charge, integral of v_out)
    x = (s[I1], s[I2], s[I3], s[I4], s[VC1], s[IL2], s[VOUT], 0.0, 0.0, 0.0)
    high1 = 0.0  # time [s] phase 1's node spent at V_dc
    a = 0.0
    steps = 0
    while a < big_a:
        a_end = min(min(big_a, min(n0, n1)), min(n2, n3))
        if a_end < a:
            a_end = a  # an event rounded to just before a: a zero-length interval
        mid = 0.5 * (a + a_end)
        v1 = x[4]
        vn0, g0, h0, z0_ = _node(p, xi[0], mid, e0, dd, x[0], v1, True)
        vn1, g1, h1, z1_ = _node(p, xi[1], mid, e1, dd, x[1], v1, used1)
        vn2, g2, h2, z2_ = _node(p, xi[2], mid, e2, dd, x[2], v1, used2)
        vn3, g3, h3, z3_ = _node(p, xi[3], mid, e3, dd, x[3], v1, used3)
        vn = (vn0, vn1, vn2, vn3)
        g = (g0, g1, g2, g3)
        hi = (h0, h1, h2, h3)
        watch = (z0_ * x[0], z1_ * x[1], z2_ * x[2], z3_ * x[3])
        span = (a_end - a) * tsw
        rem = span
        cut = False
        while rem > 0.0:
            q = rem * max(p[LIN_K], _load_rate(p, x[6], d) * (1.0 / Z_FST))
            if q <= 1.0:
                hh = rem
            else:
                if not (q < MAX_STEPS) or steps >= MAX_STEPS:
                    nan = np.nan
                    return (nan, nan, nan, nan, nan, nan, nan, dd, nan, nan, nan, nan)
                hh = rem / np.ceil(q)
            xn = _rk4(hh, p, d, vn, g, hi, x)
            steps += 1
            # a dead-time current that reached zero: end the interval exactly there
            kc = -1
            tc = hh
            for k in range(4):
                if watch[k] != 0.0 and not (xn[k] * watch[k] > 0.0):
                    tk = _zero_crossing(hh, p, d, vn, g, hi, x, k)
                    if tk < tc or kc < 0:
                        tc = tk
                        kc = k
            if kc >= 0:
                xn = _rk4(tc, p, d, vn, g, hi, x)
                xn = (0.0 if kc == 0 else xn[0], 0.0 if kc == 1 else xn[1],
                      0.0 if kc == 2 else xn[2], 0.0 if kc == 3 else xn[3],
                      xn[4], xn[5], xn[6], xn[7], xn[8], xn[9])
                x = xn
                rem -= tc
                high1 += h0 * tc
                cut = True
                break
            x = xn
            high1 += h0 * hh
            rem = 0.0 if hh == rem else rem - hh
        if cut:
            a = a + (span - rem) * fsw
            if not (a < a_end):
                a = a_end
        else:
            a = a_end
        # phases whose switch state changes here: their next events
        if n0 <= a + EPS:
            e0, n0 = _phase_events(xi[0], a + EPS, dd, dp, jump[0], delta)
        if n1 <= a + EPS:
            e1, n1 = _phase_events(xi[1], a + EPS, dd, dp, jump[1], delta)
        if n2 <= a + EPS:
            e2, n2 = _phase_events(xi[2], a + EPS, dd, dp, jump[2], delta)
        if n3 <= a + EPS:
            e3, n3 = _phase_events(xi[3], a + EPS, dd, dp, jump[3], delta)
    inv_h = 1.0 / h
    return (x[0], x[1], x[2], x[3], x[4], x[5], x[6], dd,
            high1 * inv_h, x[7] * inv_h, x[8] * inv_h, x[9] * inv_h)


@njit(cache=True)
def fast_rate(p, s, d):
    """The load's part of the rate bound [1/s]: |g| / C2 (as two_stage_lc)."""
    return _load_rate(p, s[VOUT], d)


@njit(cache=True)
def energy(p, s):
    """Stored energy [J]: 1/2 (L_ph sum i_k^2 + C1 v_C1^2 + L2 i_L2^2 + C2 v_out^2)."""
    return (p[HLP] * ((s[I1] * s[I1] + s[I2] * s[I2]) + (s[I3] * s[I3] + s[I4] * s[I4]))
            + p[HC1] * s[VC1] * s[VC1]) + (p[HL2] * s[IL2] * s[IL2] + p[HC2] * s[VOUT] * s[VOUT])


@njit(cache=True)
def energy_limit(h, p, e0, d):
    """The most stored energy [J] the circuit can hold h seconds after holding e0, whatever
    the switching.

    dE/dt = sum_k v_sw,k i_k - losses - v_out i_load with every switch node in [0, V_dc]
    (switches and diodes alike): sum_k v_sw,k i_k <= V_dc sum_k |i_k| <= V_dc sqrt(N) |i|
    <= V_dc sqrt(2 N E / L_ph) (Cauchy-Schwarz over the N phases); the load's part as in
    two_stage_lc. So dE/dt <= a + b sqrt(E) + c E, solved for the largest E(h)."""
    a = -d[0] if d[0] < 0.0 else 0.0
    b = p[SRC_K] + abs(d[2]) * p[VOUT_K]
    c = -2.0 * d[1] * p[INV_C2] if d[1] < 0.0 else 0.0
    al = 1.0 - h * c
    if not (al > 0.0):
        return np.inf
    hb = h * b
    r = (hb + np.sqrt(hb * hb + 4.0 * al * (e0 + h * a))) / (2.0 * al)
    return r * r
