"""Two-stage LC output filter of a battery emulator, averaged model, with a summed load.

.. math::

    L_1 \\frac{di_{L1}}{dt} = u_c - R_1 i_{L1} - v_{C1}, \\qquad
    C_1 \\frac{dv_{C1}}{dt} = i_{L1} - i_{L2},

    L_2 \\frac{di_{L2}}{dt} = v_{C1} - R_2 i_{L2} - v_{out}, \\qquad
    C_2 \\frac{dv_{out}}{dt} = i_{L2} - i_{load}(v_{out})

u_c [V] is the converter's averaged output voltage, the command u clamped to [0, V_dc];
L1, L2 [H], C1, C2 [F], R1, R2 [ohm] (inductor series resistance plus wiring); i_load from
:mod:`hilrig.plugins.plants.loads`.

``rk4_step`` is one classic RK4 step (the runtime's method) written out for these equations:
the same arithmetic in another order, so that on the chain that carries v_out from stage to
stage only the division by v_out and one subtraction wait for it (see the kernel).

Limits of validity: averaged over a switching period (no ripple), continuous conduction,
ideal DC link, linear components; the constant-power load is replaced below ``v_load_min``.

References
----------
R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*, 2nd ed., Springer, 2001,
ch. 3 (steady-state equivalent circuit) and ch. 7 (averaged AC modelling).
"""
import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, Param, Signal
from hilrig.plugins.plants.loads import load_current, power_current_scaled

# indices into p: the declared parameters in order, except that inductances and capacitances
# are stored as reciprocals (a multiplication is several times cheaper than a division in the
# integrator's critical path); then constants of the integration's checks (see below)
V_DC, INV_L1, R1, INV_C1, INV_L2, R2, INV_C2, V_LOAD_MIN = range(8)
SRC_K, VOUT_K, HL1, HC1, HL2, HC2 = range(8, 14)


def _build(values, ctx):
    v = values
    return np.array([v["V_dc"], 1.0 / v["L1"], v["R1"], 1.0 / v["C1"], 1.0 / v["L2"], v["R2"],
                     1.0 / v["C2"], v["v_load_min"],
                     v["V_dc"] * np.sqrt(2.0 / v["L1"]), np.sqrt(2.0 / v["C2"]),
                     0.5 * v["L1"], 0.5 * v["C1"], 0.5 * v["L2"], 0.5 * v["C2"]])


def linear_rate(values) -> float:
    """A bound [1/s] on the magnitude of every eigenvalue of the filter's linear part (the
    Jacobian without the load's conductance): Gershgorin's circle theorem on the Jacobian in
    energy coordinates (sqrt(L) i, sqrt(C) v), where each inductor-capacitor coupling is
    +-1/sqrt(L C) and each series resistance adds R/L on the diagonal. The runtime makes its
    RK4 sub-steps short enough for this rate (runtime/loop.py)."""
    v = values
    w11 = 1.0 / np.sqrt(v["L1"] * v["C1"])
    w21 = 1.0 / np.sqrt(v["L2"] * v["C1"])
    w22 = 1.0 / np.sqrt(v["L2"] * v["C2"])
    return float(max(v["R1"] / v["L1"] + w11, w11 + w21, v["R2"] / v["L2"] + w21 + w22, w22))


def _equilibrium(values, v_out, d):
    """Steady state at output voltage v_out [V] with load d: i_L1 = i_L2 = i_load."""
    i = float(load_current(v_out, np.asarray(d, dtype=np.float64), values["v_load_min"]))
    v1 = v_out + values["R2"] * i
    return np.array([i, v1, i, v_out])


DECLARATION = Declaration(
    kind="plant",
    name="two_stage_lc",
    summary="Averaged buck output stage with a two-stage LC filter (4 states) and a summed load",
    params=(
        Param("V_dc", "V", 800.0, (0.0, 1500.0), "DC-link voltage; the converter voltage is clamped to [0, V_dc]", lower_open=True),
        Param("L1", "H", 150e-6, (0.0, 1.0), "first-stage (converter-side) inductance", lower_open=True),
        Param("R1", "ohm", 5e-3, (0.0, 10.0), "series resistance of L1 and wiring"),
        Param("C1", "F", 220e-6, (0.0, 1.0), "first-stage capacitance", lower_open=True),
        Param("L2", "H", 100e-6, (0.0, 1.0), "second-stage (output-side) inductance", lower_open=True),
        Param("R2", "ohm", 3e-3, (0.0, 10.0), "series resistance of L2 and wiring"),
        Param("C2", "F", 680e-6, (0.0, 1.0), "output capacitance", lower_open=True),
        Param("v_load_min", "V", 10.0, (0.0, 1000.0), "below this output voltage the constant-power load is modelled as a resistance (its model is singular at 0 V)", lower_open=True),
    ),
    states=(Signal("i_L1", "A", "first-stage inductor current"),
            Signal("v_C1", "V", "first-stage capacitor voltage"),
            Signal("i_L2", "A", "second-stage inductor current"),
            Signal("v_out", "V", "output (second-stage capacitor) voltage")),
    inputs=(Signal("u", "V", "converter voltage command"),),
    outputs=(Signal("v_out", "V", "output voltage"),
             Signal("i_out", "A", "load current"),
             Signal("i_L1", "A", "first-stage inductor current"),
             Signal("v_C1", "V", "first-stage capacitor voltage"),
             Signal("i_L2", "A", "second-stage inductor current"),
             Signal("v_dc", "V", "DC-link voltage")),
    source="R. W. Erickson and D. Maksimovic, Fundamentals of Power Electronics, 2nd ed., "
           "Springer, 2001, ch. 3 and 7 (averaged converter models)",
    equilibrium=_equilibrium,
    build=_build,
)


#: the output node, for paralleled units (runtime/multi): the state that is the output
#: capacitor's voltage, and the parameter that is its capacitance
OUTPUT_NODE = (3, "C2")

@njit(cache=True)
def node_current(p, x):
    """The current [A] into the output node from the unit's own branches (the load left out):
    C dv_out/dt with no load, here i_L2. For paralleled units (runtime/multi): the bus plant
    sums these without evaluating the output node's rate (which divides by v_out)."""
    return x[2]


#: the states that are currents through the converter's switches: with the gates blocked
#: (u NaN) each one flows through a diode and stops at zero (runtime/loop.py ``step``)
GATE_BLOCK_CURRENTS = (0,)


@njit(cache=True, inline="always")
def _clamp_u(p, u):
    uc = u[0]
    if uc > p[V_DC]:
        uc = p[V_DC]
    elif not (uc >= 0.0):  # also catches NaN (handled by the callers as gates blocked)
        uc = 0.0
    return uc


@njit(cache=True, inline="always")
def _switch_node(p, u, i_l1, v_c1):
    """The converter's output (switch-node) voltage: the command clamped to [0, V_dc] while it
    switches; with its gates blocked (u NaN, a trip's safe action) the diodes decide: a
    positive inductor current freewheels through the low-side diode (0 V), a negative one
    returns to the DC link through the high-side diode (V_dc); at zero current both block
    while v_C1 lies within [0, V_dc] and the node follows v_C1 (the current stays zero)."""
    if u[0] == u[0]:
        return _clamp_u(p, u)
    if i_l1 > 0.0:
        return 0.0
    if i_l1 < 0.0:
        return p[V_DC]
    if v_c1 > p[V_DC]:
        return p[V_DC]
    if v_c1 < 0.0:
        return 0.0
    return v_c1


@njit(cache=True)
def derivs(t, p, x, u, d):
    i_l1, v_c1, i_l2, v_out = x[0], x[1], x[2], x[3]
    uc = _switch_node(p, u, i_l1, v_c1)
    i_load = load_current(v_out, d, p[V_LOAD_MIN])
    return ((uc - p[R1] * i_l1 - v_c1) * p[INV_L1],
            (i_l1 - i_l2) * p[INV_C1],
            (v_c1 - p[R2] * i_l2 - v_out) * p[INV_L2],
            (i_l2 - i_load) * p[INV_C2])


@njit(cache=True)
def outputs(t, p, x, u, d, y):
    y[0] = x[3]
    y[1] = load_current(x[3], d, p[V_LOAD_MIN])
    y[2] = x[0]
    y[3] = x[1]
    y[4] = x[2]
    y[5] = p[V_DC]


@njit(cache=True)
def rk4_step(dt, p, s, u, d):
    """One classic RK4 step of length dt from the state tuple s, u and d held; returns the new
    state tuple.

    The runtime's generic step computes each stage as s + a dt k with k = derivs(...); for
    v_out that puts a division, an addition, a subtraction and three multiplications between
    one stage's v_out and the next. Here each stage's v_out is
    (v_out0 + a dt/C2 (i_L2 - G v - I)) - (a dt P / C2) / v, with every coefficient formed once
    per step, so only the division and one subtraction wait for v; the final combination
    dt/6 (k1 + 2 k2 + 2 k3 + k4) is split the same way. In exact arithmetic it is the same
    method; in floating point the results differ from the generic step's by rounding
    (a few units in the last place per step; the tests bound it).
    """
    if not (u[0] == u[0]):
        return _blocked_step(dt, p, s, u, d)
    uc = _clamp_u(p, u)
    h2 = 0.5 * dt
    w = dt / 6.0
    e = p[INV_C2]
    i1, v1, i2, vo = s[0], s[1], s[2], s[3]
    # stage 1 at s; stages 2 and 3 at s + dt/2 k; stage 4 at s + dt k
    f1, g1, m1, n1, q1 = _rates(p, uc, d, h2 * e, i1, v1, i2, vo)
    i1b, v1b, i2b, vob = _move(h2, h2 * e, i1, v1, i2, vo, f1, g1, m1, n1, q1)
    f2, g2, m2, n2, q2 = _rates(p, uc, d, h2 * e, i1b, v1b, i2b, vob)
    i1c, v1c, i2c, voc = _move(h2, h2 * e, i1, v1, i2, vo, f2, g2, m2, n2, q2)
    f3, g3, m3, n3, q3 = _rates(p, uc, d, dt * e, i1c, v1c, i2c, voc)
    i1d, v1d, i2d, vod = _move(dt, dt * e, i1, v1, i2, vo, f3, g3, m3, n3, q3)
    f4, g4, m4, n4, q4 = _rates(p, uc, d, w * e, i1d, v1d, i2d, vod)
    # s + dt/6 (k1 + 2 k2 + 2 k3 + k4); the constant-power parts of stages 1-3 enter with
    # weights dt/6, dt/3, dt/3, which are 1/3, 2/3 and 1/3 of the widths they were scaled by
    q123 = (q1 + 2.0 * q2 + q3) / 3.0
    return (i1 + w * (f1 + 2.0 * f2 + 2.0 * f3 + f4),
            v1 + w * (g1 + 2.0 * g2 + 2.0 * g3 + g4),
            i2 + w * (m1 + 2.0 * m2 + 2.0 * m3 + m4),
            ((vo + w * e * (n1 + 2.0 * n2 + 2.0 * n3 + n4)) - q123) - q4)


@njit(cache=True)
def _blocked_step(dt, p, s, u, d):
    """One classic RK4 step over ``derivs`` with the gates blocked (the switch-node voltage
    follows the diodes, so it is evaluated at every stage; not a hot path)."""
    k1 = derivs(0.0, p, s, u, d)
    k2 = derivs(0.0, p, (s[0] + 0.5 * dt * k1[0], s[1] + 0.5 * dt * k1[1],
                         s[2] + 0.5 * dt * k1[2], s[3] + 0.5 * dt * k1[3]), u, d)
    k3 = derivs(0.0, p, (s[0] + 0.5 * dt * k2[0], s[1] + 0.5 * dt * k2[1],
                         s[2] + 0.5 * dt * k2[2], s[3] + 0.5 * dt * k2[3]), u, d)
    k4 = derivs(0.0, p, (s[0] + dt * k3[0], s[1] + dt * k3[1], s[2] + dt * k3[2],
                         s[3] + dt * k3[3]), u, d)
    w = dt / 6.0
    return (s[0] + w * (k1[0] + 2.0 * k2[0] + 2.0 * k3[0] + k4[0]),
            s[1] + w * (k1[1] + 2.0 * k2[1] + 2.0 * k3[1] + k4[1]),
            s[2] + w * (k1[2] + 2.0 * k2[2] + 2.0 * k3[2] + k4[2]),
            s[3] + w * (k1[3] + 2.0 * k2[3] + 2.0 * k3[3] + k4[3]))


@njit(cache=True, inline="always")
def _rates(p, uc, d, he, i1, v1, i2, vo):
    """One RK4 stage's rates: dx/dt of the first three states, C2 dv_out/dt without the
    constant-power part (n), and that part scaled for the stage, he P / v_out (q)."""
    return ((uc - p[R1] * i1 - v1) * p[INV_L1],
            (i1 - i2) * p[INV_C1],
            (v1 - p[R2] * i2 - vo) * p[INV_L2],
            i2 - (d[1] * vo + d[2]),
            power_current_scaled(he, vo, d, p[V_LOAD_MIN]))


@njit(cache=True, inline="always")
def _move(h, he, i1, v1, i2, vo, f, g, m, n, q):
    """The next stage's state s + h k, with v_out's part (v_out0 + h/C2 n) - q: only the
    subtraction of q waits for the division."""
    return i1 + h * f, v1 + h * g, i2 + h * m, (vo + he * n) - q


@njit(cache=True)
def fast_rate(p, s, d):
    """The state-dependent part of the rate bound [1/s]: |g| / C2, with g the load's
    incremental conductance at v_out (G - P / v_out^2; below v_load_min G + P / v_load_min^2,
    the constant-power part's resistive stand-in). A constant-power load collapsing the output
    or a short circuit makes it large: the runtime then shortens the RK4 sub-steps."""
    v = s[3]
    if v >= p[V_LOAD_MIN]:
        g = d[1] - d[0] / (v * v)
    else:
        g = d[1] + d[0] / (p[V_LOAD_MIN] * p[V_LOAD_MIN])
    return abs(g) * p[INV_C2]


@njit(cache=True)
def energy(p, s):
    """Stored energy [J]: 1/2 (L1 i_L1^2 + C1 v_C1^2 + L2 i_L2^2 + C2 v_out^2)."""
    return (p[HL1] * s[0] * s[0] + p[HC1] * s[1] * s[1]) + (p[HL2] * s[2] * s[2] + p[HC2] * s[3] * s[3])


@njit(cache=True)
def energy_limit(h, p, e0, d):
    """The most stored energy [J] the circuit can hold h seconds after holding e0, whatever
    the command and with the load d held.

    dE/dt = u_c i_L1 - R1 i_L1^2 - R2 i_L2^2 - v_out i_load, with u_c in [0, V_dc]:
    u_c i_L1 <= V_dc sqrt(2 E / L1); -v_out i_load <= max(0, -P) + |I| sqrt(2 E / C2)
    + max(0, -G) 2 E / C2 (below v_load_min the constant-power part is -P v^2 / v_load_min^2,
    at most max(0, -P) too). So dE/dt <= a + b sqrt(E) + c E, and E(h) <= E* with
    (1 - h c) E* - h b sqrt(E*) - (e0 + h a) = 0 (each term bounded by its value at the
    largest energy reached). Infinite when h c >= 1 (no bound from this argument)."""
    a = -d[0] if d[0] < 0.0 else 0.0
    b = p[SRC_K] + abs(d[2]) * p[VOUT_K]
    c = -2.0 * d[1] * p[INV_C2] if d[1] < 0.0 else 0.0
    al = 1.0 - h * c
    if not (al > 0.0):
        return np.inf
    hb = h * b
    r = (hb + np.sqrt(hb * hb + 4.0 * al * (e0 + h * a))) / (2.0 * al)
    return r * r
