"""Two-stage LC output filter of a battery emulator, averaged model, with a summed load.

.. math::

    L_1 \\frac{di_{L1}}{dt} = u_c - R_1 i_{L1} - v_{C1}, \\qquad
    C_1 \\frac{dv_{C1}}{dt} = i_{L1} - i_{L2},

    L_2 \\frac{di_{L2}}{dt} = v_{C1} - R_2 i_{L2} - v_{out}, \\qquad
    C_2 \\frac{dv_{out}}{dt} = i_{L2} - i_{load}(v_{out})

u_c [V] is the converter's averaged output voltage, the command u clamped to [0, V_dc];
L1, L2 [H], C1, C2 [F], R1, R2 [ohm] (inductor series resistance plus wiring); i_load from
:mod:`hilrig.plugins.plants.loads`.

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
from hilrig.plugins.plants.loads import load_current

# indices into p: the declared parameters in order, except that inductances and capacitances
# are stored as reciprocals (a multiplication is several times cheaper than a division in the
# integrator's critical path)
V_DC, INV_L1, R1, INV_C1, INV_L2, R2, INV_C2, V_LOAD_MIN = range(8)


def _build(values, ctx):
    v = values
    return np.array([v["V_dc"], 1.0 / v["L1"], v["R1"], 1.0 / v["C1"], 1.0 / v["L2"], v["R2"],
                     1.0 / v["C2"], v["v_load_min"]])


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


@njit(cache=True, inline="always")
def _clamp_u(p, u):
    uc = u[0]
    if uc > p[V_DC]:
        uc = p[V_DC]
    elif not (uc >= 0.0):  # also catches NaN: a NaN command applies 0 V (and trips elsewhere)
        uc = 0.0
    return uc


@njit(cache=True)
def derivs(t, p, x, u, d):
    i_l1, v_c1, i_l2, v_out = x[0], x[1], x[2], x[3]
    uc = _clamp_u(p, u)
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
