"""Single-stage LC output filter of a battery emulator, averaged model, with a summed load.

.. math::

    L \\frac{di_L}{dt} = u_c - R\\,i_L - v_{out}, \\qquad
    C \\frac{dv_{out}}{dt} = i_L - i_{load}(v_{out})

u_c [V] is the command u clamped to [0, V_dc]; L [H], C [F], R [ohm].
With a constant-power load P at V0 the linearised system is stable iff
P < R C V0^2 / L and P < V0^2 / R (negative incremental resistance -V0^2/P of the load).

Limits of validity: averaged model (no switching ripple), continuous conduction, ideal DC link;
the constant-power load is replaced below ``v_load_min``.

References
----------
R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*, 2nd ed., Springer, 2001,
ch. 3 and 7. A. Emadi, A. Khaligh, C. H. Rivetta, G. A. Williamson, "Constant power loads and
negative impedance instability in automotive systems", IEEE Trans. Veh. Technol. 55(4), 2006.
"""
import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, Param, Signal
from hilrig.plugins.plants.loads import load_current

# indices into p: the declared parameters in order, L and C stored as reciprocals; then
# constants of the integration's checks (see below)
V_DC, INV_L, R, INV_C, V_LOAD_MIN = range(5)
SRC_K, VOUT_K, HL, HC = range(5, 9)


def _build(values, ctx):
    v = values
    return np.array([v["V_dc"], 1.0 / v["L"], v["R"], 1.0 / v["C"], v["v_load_min"],
                     v["V_dc"] * np.sqrt(2.0 / v["L"]), np.sqrt(2.0 / v["C"]),
                     0.5 * v["L"], 0.5 * v["C"]])


def linear_rate(values) -> float:
    """A bound [1/s] on the magnitude of the eigenvalues of the filter's linear part (the
    Jacobian without the load's conductance): Gershgorin's circle theorem in energy
    coordinates (sqrt(L) i, sqrt(C) v), R/L + 1/sqrt(L C)."""
    v = values
    w = 1.0 / np.sqrt(v["L"] * v["C"])
    return float(v["R"] / v["L"] + w)


def _equilibrium(values, v_out, d):
    i = float(load_current(v_out, np.asarray(d, dtype=np.float64), values["v_load_min"]))
    return np.array([i, v_out])


DECLARATION = Declaration(
    kind="plant",
    name="single_lc",
    summary="Averaged buck output stage with one LC filter (2 states) and a summed load",
    params=(
        Param("V_dc", "V", 800.0, (0.0, 1500.0), "DC-link voltage; the converter voltage is clamped to [0, V_dc]", lower_open=True),
        Param("L", "H", 200e-6, (0.0, 1.0), "filter inductance", lower_open=True),
        Param("R", "ohm", 20e-3, (0.0, 10.0), "series resistance of L and wiring"),
        Param("C", "F", 500e-6, (0.0, 1.0), "output capacitance", lower_open=True),
        Param("v_load_min", "V", 10.0, (0.0, 1000.0), "below this output voltage the constant-power load is modelled as a resistance (its model is singular at 0 V)", lower_open=True),
    ),
    states=(Signal("i_L1", "A", "inductor current"), Signal("v_out", "V", "output voltage")),
    inputs=(Signal("u", "V", "converter voltage command"),),
    outputs=(Signal("v_out", "V", "output voltage"),
             Signal("i_out", "A", "load current"),
             Signal("i_L1", "A", "inductor current"),
             Signal("v_dc", "V", "DC-link voltage")),
    source="R. W. Erickson and D. Maksimovic, Fundamentals of Power Electronics, 2nd ed., "
           "Springer, 2001, ch. 3 and 7; Emadi et al., IEEE Trans. Veh. Technol. 55(4), 2006",
    equilibrium=_equilibrium,
    build=_build,
)


@njit(cache=True, inline="always")
def _clamp_u(p, u):
    uc = u[0]
    if uc > p[V_DC]:
        uc = p[V_DC]
    elif not (uc >= 0.0):
        uc = 0.0
    return uc


#: the output node, for paralleled units (runtime/multi): the state that is the output
#: capacitor's voltage, and the parameter that is its capacitance
OUTPUT_NODE = (1, "C")

@njit(cache=True)
def node_current(p, x):
    """The current [A] into the output node from the unit's own branches (the load left out):
    C dv_out/dt with no load, here i_L. For paralleled units (runtime/multi): the bus plant
    sums these without evaluating the output node's rate (which divides by v_out)."""
    return x[0]


#: the state that is the current through the converter's switches: with the gates blocked
#: (u NaN) it flows through a diode and stops at zero (runtime/loop.py ``step``)
GATE_BLOCK_CURRENTS = (0,)


@njit(cache=True, inline="always")
def _switch_node(p, u, i_l, v_out):
    """The switch-node voltage: the clamped command while the converter switches; with its
    gates blocked (u NaN) the diodes decide by the sign of i_L (0 V for a positive current,
    V_dc for a negative one; at zero current the node follows v_out within [0, V_dc])."""
    if u[0] == u[0]:
        return _clamp_u(p, u)
    if i_l > 0.0:
        return 0.0
    if i_l < 0.0:
        return p[V_DC]
    if v_out > p[V_DC]:
        return p[V_DC]
    if v_out < 0.0:
        return 0.0
    return v_out + p[R] * i_l


@njit(cache=True)
def derivs(t, p, x, u, d):
    i_l, v_out = x[0], x[1]
    uc = _switch_node(p, u, i_l, v_out)
    return ((uc - p[R] * i_l - v_out) * p[INV_L],
            (i_l - load_current(v_out, d, p[V_LOAD_MIN])) * p[INV_C])


@njit(cache=True)
def outputs(t, p, x, u, d, y):
    y[0] = x[1]
    y[1] = load_current(x[1], d, p[V_LOAD_MIN])
    y[2] = x[0]
    y[3] = p[V_DC]


@njit(cache=True)
def fast_rate(p, s, d):
    """The state-dependent part of the rate bound [1/s]: |g| / C, g the load's incremental
    conductance at v_out (G - P / v_out^2; below v_load_min G + P / v_load_min^2)."""
    v = s[1]
    if v >= p[V_LOAD_MIN]:
        g = d[1] - d[0] / (v * v)
    else:
        g = d[1] + d[0] / (p[V_LOAD_MIN] * p[V_LOAD_MIN])
    return abs(g) * p[INV_C]


@njit(cache=True)
def energy(p, s):
    """Stored energy [J]: 1/2 (L i_L^2 + C v_out^2)."""
    return p[HL] * s[0] * s[0] + p[HC] * s[1] * s[1]


@njit(cache=True)
def energy_limit(h, p, e0, d):
    """The most stored energy [J] after h seconds from e0, whatever the command, load d held:
    dE/dt <= a + b sqrt(E) + c E with a = max(0, -P), b = V_dc sqrt(2/L) + |I| sqrt(2/C),
    c = max(0, -G) 2/C (as two_stage_lc.energy_limit explains)."""
    a = -d[0] if d[0] < 0.0 else 0.0
    b = p[SRC_K] + abs(d[2]) * p[VOUT_K]
    c = -2.0 * d[1] * p[INV_C] if d[1] < 0.0 else 0.0
    al = 1.0 - h * c
    if not (al > 0.0):
        return np.inf
    hb = h * b
    r = (hb + np.sqrt(hb * hb + 4.0 * al * (e0 + h * a))) / (2.0 * al)
    return r * r
