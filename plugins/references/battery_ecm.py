"""Battery pack terminal voltage from an equivalent-circuit model driven by the load current.

Per cell (Thevenin model with n RC pairs; i > 0 discharges):

.. math::

    v_{cell} = OCV(SOC) - R_0\\,i - \\sum_k v_k, \\qquad
    \\frac{dv_k}{dt} = -\\frac{v_k}{R_k C_k} + \\frac{i}{C_k}, \\qquad
    \\frac{dSOC}{dt} = -\\frac{i}{3600\\,Q}

with the cell current i = i_out / n_parallel [A], OCV [V] interpolated in an (SOC [-], OCV [V])
table, R0, R_k [ohm], C_k [F], Q [A h]. The pack reference is n_series * v_cell [V].

Each tick the RC voltages advance by their exact solution for a current held over the tick
(``v_k <- a v_k + R_k (1 - a) i`` with ``a = exp(-Ts/(R_k C_k))``), so a constant-current step
reproduces the closed form ``R_k i (1 - exp(-t/(R_k C_k)))`` to rounding.

Limits of validity: lumped, isothermal, no hysteresis, parameters independent of SOC, current
and temperature; all cells identical. SOC is held within [0, 1] (the OCV table end values apply).

References
----------
M. Chen and G. A. Rincon-Mora, "Accurate electrical battery model capable of predicting runtime
and I-V performance", IEEE Trans. Energy Convers. 21(2), 504-511, 2006 (the RC-network model).
G. L. Plett, *Battery Management Systems, Vol. I: Battery Modeling*, Artech House, 2015, ch. 2.
"""
import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, Param, Signal, TableParam, table_array
from hilrig.plugins.tables import interp_hold

# fixed head of p: [n_series, n_parallel, Q_As, R0, soc0, n_rc, n_ocv, ...]
N_S, N_P, Q_AS, R0, SOC0, N_RC, N_OCV, HEAD = range(8)

# Demo data, invented for hilrig's demo scenario: a plausible NMC-like cell OCV curve.
DEMO_OCV = ((0.0, 3.00), (0.05, 3.30), (0.10, 3.45), (0.20, 3.55), (0.30, 3.62), (0.40, 3.67),
            (0.50, 3.72), (0.60, 3.79), (0.70, 3.87), (0.80, 3.95), (0.90, 4.05), (1.00, 4.18))


def _build(values, ctx):
    ocv = table_array(values["ocv"])
    rc = table_array(values["rc_pairs"]) if len(values["rc_pairs"]) else np.zeros((0, 2))
    ts = ctx.Ts
    tau = rc[:, 0] * rc[:, 1]
    a = np.exp(-ts / tau) if rc.shape[0] else np.zeros(0)
    b = rc[:, 0] * (1.0 - a) if rc.shape[0] else np.zeros(0)
    head = [values["n_series"], values["n_parallel"], values["capacity"] * 3600.0,
            values["R0"], values["soc0"], rc.shape[0], ocv.shape[0]]
    return np.concatenate((head, a, b, ocv[:, 0], ocv[:, 1]))


def _n_states(values):
    return 1 + len(values["rc_pairs"])


DECLARATION = Declaration(
    kind="reference",
    name="battery_ecm",
    summary="Battery pack terminal voltage from an equivalent-circuit model (OCV(SOC), R0, n RC pairs) driven by the measured load current",
    params=(
        TableParam("ocv", (("soc", "-"), ("ocv", "V")), DEMO_OCV,
                   "cell open-circuit voltage against state of charge (default: invented demo data)",
                   column_bounds=((0.0, 1.0, False), (0.0, 1000.0, True))),
        Param("R0", "ohm", 1.2e-3, (0.0, 10.0), "cell series resistance"),
        TableParam("rc_pairs", (("R", "ohm"), ("C", "F")), ((0.6e-3, 50e3),),
                   "cell RC pairs, one row each (any number, also none)", increasing_first=False,
                   min_rows=0, column_bounds=((0.0, 10.0, True), (0.0, 1e9, True))),
        Param("capacity", "Ah", 60.0, (0.0, 1e5), "cell capacity", lower_open=True),
        Param("n_series", "-", 108.0, (1.0, 10000.0), "cells in series"),
        Param("n_parallel", "-", 1.0, (1.0, 10000.0), "cells in parallel"),
        Param("soc0", "-", 0.8, (0.0, 1.0), "initial state of charge"),
    ),
    states=(Signal("soc", "-", "state of charge"), Signal("v_rc_k", "V", "voltage of RC pair k (one state per pair)")),
    reads=("i_out",),
    source="Chen & Rincon-Mora, IEEE Trans. Energy Convers. 21(2), 2006; Plett, Battery "
           "Management Systems Vol. I, 2015, ch. 2",
    build=_build,
    n_states=_n_states,
)


@njit(cache=True)
def init(p, xr, y):
    xr[0] = p[SOC0]
    for k in range(int(p[N_RC])):
        xr[1 + k] = 0.0


@njit(cache=True)
def step(t, dt, p, xr, y, w):
    n_rc = int(p[N_RC])
    n_ocv = int(p[N_OCV])
    i_cell = y[0] / p[N_P]
    a0 = HEAD
    b0 = HEAD + n_rc
    s0 = HEAD + 2 * n_rc
    soc = xr[0]
    v = interp_hold(p[s0:s0 + n_ocv], p[s0 + n_ocv:s0 + 2 * n_ocv], soc) - p[R0] * i_cell
    for k in range(n_rc):
        v -= xr[1 + k]
    w[0] = p[N_S] * v
    # advance the states over this tick with the current held
    for k in range(n_rc):
        xr[1 + k] = p[a0 + k] * xr[1 + k] + p[b0 + k] * i_cell
    soc -= i_cell * dt / p[Q_AS]
    if soc > 1.0:
        soc = 1.0
    elif soc < 0.0:
        soc = 0.0
    xr[0] = soc
