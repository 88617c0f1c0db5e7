"""The controller of pi.c beside this file, as a Python (numba) plugin: the same parameters,
states, reads and p layout, and the same operations in the same order (so both round alike;
tests/integration/test_c_controller.py compares them tick for tick).

Cascaded PI: outer voltage loop with load-current and reference-slope feed-forward and
capacitor-current damping, inner first-stage current loop with L2-voltage damping, clamps,
conditional integration (anti-windup), bumpless start. See pi.c for the equations.
"""
import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, Param, Signal

KP_V, KI_V, KP_I, KI_I, K_VD, K_IC, C_FF, I_MAX, U_MIN, U_MAX, TS, R_SER, V_DC = range(13)
Y_VOUT, Y_IOUT, Y_IL1, Y_VC1, Y_IL2 = range(5)
X_V, X_I = range(2)


def _build(values, ctx):
    names = [q.name for q in DECLARATION.params]
    # the context values of pi.c: Ts, plant.R1 (fallback 0), plant.V_dc (fallback 1e4)
    return np.array([values[n] for n in names]
                    + [ctx.Ts, float(ctx.plant.get("R1", 0.0)), float(ctx.plant.get("V_dc", 1e4))])


DECLARATION = Declaration(
    kind="controller",
    name="pi_numba",
    summary="Cascaded PI (outer v_out, inner i_L1), active damping, anti-windup, bumpless start",
    params=(
        Param("Kp_v", "A/V", 5.0, (0.0, 1e3), "voltage-loop proportional gain"),
        Param("Ki_v", "A/(V s)", 12000.0, (0.0, 1e7), "voltage-loop integral gain"),
        Param("Kp_i", "V/A", 2.0, (0.0, 1e3), "current-loop proportional gain"),
        Param("Ki_i", "V/(A s)", 3500.0, (0.0, 1e7), "current-loop integral gain"),
        Param("K_vd", "-", 3.7, (0.0, 100.0), "active damping: gain on the L2 voltage v_C1 - v_out"),
        Param("K_ic", "-", 1.0, (0.0, 100.0), "active damping: gain on the output capacitor current"),
        Param("C_ff", "F", 900e-6, (0.0, 1.0), "reference-slope feed-forward (about C1 + C2)"),
        Param("I_max", "A", 600.0, (0.0, 1e5), "current-reference limit", lower_open=True),
        Param("u_min", "V", 0.0, (-1e4, 1e4), "lower clamp of the converter voltage command"),
        Param("u_max", "V", 1e4, (-1e4, 1e4), "upper clamp of the command (also limited to V_dc)"),
    ),
    states=(Signal("int_v", "A", "voltage-loop integrator"),
            Signal("int_i", "V", "current-loop integrator")),
    reads=("v_out", "i_out", "i_L1", "v_C1", "i_L2"),
    outputs=(Signal("u", "V", "converter voltage command"),),
    source="Erickson & Maksimovic, Fundamentals of Power Electronics, 2nd ed., 2001, ch. 18",
    build=_build,
)


@njit(cache=True)
def init(p, xc, y, r):
    xc[X_V] = y[Y_IL1] - y[Y_IOUT] - p[C_FF] * r[1] + p[K_IC] * (y[Y_IL2] - y[Y_IOUT])
    xc[X_I] = p[R_SER] * y[Y_IL1] + p[K_VD] * (y[Y_VC1] - y[Y_VOUT])


@njit(cache=True)
def step(t, p, xc, y, r, u):
    ts = p[TS]
    umax = p[U_MAX] if p[U_MAX] < p[V_DC] else p[V_DC]
    ev = r[0] - y[Y_VOUT]
    i_ref = (p[KP_V] * ev + xc[X_V] + y[Y_IOUT] + p[C_FF] * r[1]
             - p[K_IC] * (y[Y_IL2] - y[Y_IOUT]))
    i_sat = i_ref
    if i_sat > p[I_MAX]:
        i_sat = p[I_MAX]
    elif i_sat < -p[I_MAX]:
        i_sat = -p[I_MAX]
    ei = i_sat - y[Y_IL1]
    v = y[Y_VC1] + p[KP_I] * ei + xc[X_I] - p[K_VD] * (y[Y_VC1] - y[Y_VOUT])
    uc = v
    if uc > umax:
        uc = umax
    elif uc < p[U_MIN]:
        uc = p[U_MIN]
    u[0] = uc
    if not ((v > umax and ei > 0.0) or (v < p[U_MIN] and ei < 0.0)):
        xc[X_I] += p[KI_I] * ts * ei
        if not ((i_ref > p[I_MAX] and ev > 0.0) or (i_ref < -p[I_MAX] and ev < 0.0)):
            xc[X_V] += p[KI_V] * ts * ev
    return 0
