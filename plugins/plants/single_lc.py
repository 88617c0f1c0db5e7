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

# indices into p: the declared parameters in order, L and C stored as reciprocals
V_DC, INV_L, R, INV_C, V_LOAD_MIN = range(5)


def _build(values, ctx):
    v = values
    return np.array([v["V_dc"], 1.0 / v["L"], v["R"], 1.0 / v["C"], v["v_load_min"]])


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


@njit(cache=True)
def derivs(t, p, x, u, d):
    i_l, v_out = x[0], x[1]
    uc = _clamp_u(p, u)
    return ((uc - p[R] * i_l - v_out) * p[INV_L],
            (i_l - load_current(v_out, d, p[V_LOAD_MIN])) * p[INV_C])


@njit(cache=True)
def outputs(t, p, x, u, d, y):
    y[0] = x[1]
    y[1] = load_current(x[1], d, p[V_LOAD_MIN])
    y[2] = x[0]
    y[3] = p[V_DC]
