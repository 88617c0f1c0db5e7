"""Cascaded PI output-voltage control with active damping: the industry baseline.

Outer loop (voltage, with load-current and reference-slope feed-forward):

.. math::

    i^*_{L1} = K_{pv} e_v + \\int K_{iv} e_v\\,dt + i_{out} + C_{ff}\\,\\dot v_{ref}
              - K_{ic} (i_{L2} - i_{out}), \\qquad e_v = v_{ref} - v_{out}

clamped to [-I_max, I_max]. Inner loop (first-stage inductor current):

.. math::

    u = v_{C1} + K_{pi} e_i + \\int K_{ii} e_i\\,dt - K_{vd} (v_{C1} - v_{out}),
    \\qquad e_i = i^*_{L1} - i_{L1}

clamped to [u_min, u_max]. Units: K_pv [A/V], K_iv [A/(V s)], K_pi [V/A], K_ii [V/(A s)],
K_vd [-], K_ic [-], C_ff [F].

Active damping: with a constant-power load the output stage of the two-stage filter is
negatively damped. A plain cascaded PI on i_L1 and v_out then leaves the second filter stage
(L2, C2) undamped in continuous time; the two damping terms, feedback of the output capacitor
current i_L2 - i_out into the current reference and of the L2 voltage v_C1 - v_out into the
converter voltage, act as virtual resistances.

Gains: the gains a scenario does not give are designed for its plant (``_design`` below and
runtime/analysis/design.py): a loop-shaping start from L1, C1 + C2 and Ts, then the largest
closed-loop eigenvalue magnitude of the sampled (ZOH) linearised loop minimised over the
scenario's design range. The declared numbers are that method's result on the demo plant at
Ts = 50 us over 300-500 V and -40..80 kW, found by hand (``[design] defaults = "declared"``
runs them): the largest |z| is 0.89-0.92 there, and the loop loses stability below about 250 V
at 100 kW or about 180 V at 50 kW (a linear controller far from its design point).

Anti-windup: conditional integration (an integrator holds while its output is clamped and its
error pushes further into the clamp). In the cascade the outer integrator also holds whenever
the inner one holds: while the converter voltage is clamped, a larger current reference could
not be followed anyway. Bumpless start: ``init`` presets both integrators so that
the first output equals the steady-state command at the measured operating point.

On the single-stage plant the reads fall back: v_C1 -> v_out and i_L2 -> i_L1 (there is no second
stage; the K_ic term becomes capacitor-current damping and the K_vd term vanishes).

References
----------
R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*, 2nd ed., 2001, ch. 18
(current-programmed / cascaded control). P. A. Dahono, "A control method to damp oscillation in
the input LC filter", IEEE PESC 2002 (virtual-resistor active damping). K. J. Astrom and
T. Hagglund, *Advanced PID Control*, ISA, 2006, sec. 3.5 (integrator windup).
"""
import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, Param, Signal, Tunable

TS, KPV, KIV, KPI, KII, KVD, KIC, CFF, IMAX, UMIN, UMAX, RSER = range(12)
# indices into y (the order of DECLARATION.reads)
Y_VOUT, Y_IOUT, Y_IL1, Y_VC1, Y_IL2 = range(5)


def _build(values, ctx):
    plant = ctx.plant
    # the series resistance seen by the inner loop, for the bumpless preset of its integrator
    r_series = float(plant.get("R1", plant.get("R", 0.0)))
    u_max, u_min = values["u_max"], values["u_min"]
    if "V_dc" in plant:
        # the plant clamps the converter voltage to [0, V_dc]: clamp the command the same way,
        # or the integrators would wind up against a limit the controller cannot see
        u_max = min(u_max, float(plant["V_dc"]))
        u_min = max(u_min, 0.0)
    return np.array([ctx.Ts, values["Kp_v"], values["Ki_v"], values["Kp_i"], values["Ki_i"],
                     values["K_vd"], values["K_ic"], values["C_ff"], values["I_max"],
                     u_min, u_max, r_series])


#: the loop-shaping start of the design (see _design): inner crossover w_ci = A_I / Ts, outer
#: w_cv = R_V w_ci, integral corners w/KI_I_DIV and w/KI_V_DIV, damping gains K_VD, K_IC
A_I, R_V, KI_I_DIV, KI_V_DIV, K_VD, K_IC = 0.667, 0.42, 7.6, 2.3, 3.7, 1.0


def _filter(plant):
    """(first inductance L1 [H], total capacitance [F]) of a two- or single-stage filter, or
    None for a plant of other parameters."""
    if "L1" in plant and "C1" in plant:
        return float(plant["L1"]), float(plant["C1"]) + float(plant.get("C2", 0.0))
    if "L" in plant and "C" in plant:
        return float(plant["L"]), float(plant["C"])
    return None


def _design(values, ctx):
    """Candidates for the design (runtime/analysis/design.py), which then minimises the worst
    largest closed-loop |z| over the design range from the best of them.

    The start is loop shaping from the plant (Erickson & Maksimovic ch. 18): the inner current
    loop crosses over at w_ci = A_I / Ts with K_pi = w_ci L1 (the inductor's impedance at the
    crossover), the outer voltage loop at w_cv = R_V w_ci with K_pv = w_cv (C1 + C2), each
    integral corner a fraction of its crossover (K_ii = K_pi w_ci / KI_I_DIV, K_iv = K_pv w_cv /
    KI_V_DIV); the damping gains start at K_VD, K_IC; C_ff = C1 + C2. The constants are the
    demo plant's result of the search re-expressed, so that the start is close there. The
    declared numbers are the second candidate."""
    lc = _filter(ctx.plant)
    if lc is None:
        return [{}]
    l1, ct = lc
    w_ci = A_I / ctx.Ts
    w_cv = R_V * w_ci
    kpi, kpv = w_ci * l1, w_cv * ct
    rule = dict(Kp_v=kpv, Ki_v=kpv * w_cv / KI_V_DIV, Kp_i=kpi, Ki_i=kpi * w_ci / KI_I_DIV,
                K_vd=K_VD, K_ic=K_IC, C_ff=ct)
    declared = {p.name: p.default for p in DECLARATION.params if p.name in rule}
    declared["C_ff"] = ct
    return [rule, declared]


DECLARATION = Declaration(
    kind="controller",
    name="cascaded_pi",
    summary="Cascaded PI (outer v_out, inner i_L1) with active damping, anti-windup, bumpless start",
    params=(
        Param("Kp_v", "A/V", 5.0, (0.0, 1e3), "voltage-loop proportional gain"),
        Param("Ki_v", "A/(V s)", 12000.0, (0.0, 1e7), "voltage-loop integral gain"),
        Param("Kp_i", "V/A", 2.0, (0.0, 1e3), "current-loop proportional gain"),
        Param("Ki_i", "V/(A s)", 3500.0, (0.0, 1e7), "current-loop integral gain"),
        Param("K_vd", "-", 3.7, (0.0, 100.0), "active damping: gain on the L2 voltage v_C1 - v_out"),
        Param("K_ic", "-", 1.0, (0.0, 100.0), "active damping: gain on the output capacitor current i_L2 - i_out"),
        Param("C_ff", "F", 900e-6, (0.0, 1.0), "reference-slope feed-forward (about C1 + C2)"),
        Param("I_max", "A", 600.0, (0.0, 1e5), "current-reference limit", lower_open=True),
        Param("u_min", "V", 0.0, (-1e4, 1e4), "lower clamp of the converter voltage command"),
        Param("u_max", "V", 1e4, (-1e4, 1e4), "upper clamp of the command (also limited to the plant's V_dc)"),
    ),
    states=(Signal("int_v", "A", "voltage-loop integrator"),
            Signal("int_i", "V", "current-loop integrator")),
    reads=("v_out", "i_out", "i_L1", "v_C1", "i_L2"),
    outputs=(Signal("u", "V", "converter voltage command"),),
    source="Erickson & Maksimovic, Fundamentals of Power Electronics, 2nd ed., 2001, ch. 18; "
           "Dahono, IEEE PESC 2002 (virtual-resistor damping); Astrom & Hagglund, Advanced PID "
           "Control, 2006, sec. 3.5 (anti-windup)",
    build=_build,
    tunable=(Tunable("Kp_v", 1e-3, 1e3), Tunable("Ki_v", 1e-1, 1e8),
             Tunable("Kp_i", 1e-4, 1e3), Tunable("Ki_i", 1e-1, 1e8),
             Tunable("K_vd", 1e-2, 50.0), Tunable("K_ic", 1e-2, 10.0)),
    design=_design,
    design_search=True,
    design_method="loop-shaping start from L1, C1 + C2 and Ts, then Nelder-Mead minimising the "
                  "worst largest closed-loop |z| of the sampled linearised loop over the design "
                  "range (Erickson & Maksimovic ch. 18; Nelder & Mead 1965)",
)
#: signals this controller accepts in place of ones a plant does not have
READ_FALLBACKS = {"v_C1": "v_out", "i_L2": "i_L1"}


@njit(cache=True)
def init(p, xc, y, r):
    i_l1 = y[Y_IL1]
    # outer loop output equals the measured inductor current at zero voltage error
    xc[0] = i_l1 - y[Y_IOUT] - p[CFF] * r[1] + p[KIC] * (y[Y_IL2] - y[Y_IOUT])
    # inner loop output equals the steady-state command v_C1 + R1 i_L1 at zero current error
    xc[1] = p[RSER] * i_l1 + p[KVD] * (y[Y_VC1] - y[Y_VOUT])


@njit(cache=True)
def step(t, p, xc, y, r, u):
    ts = p[TS]
    ev = r[0] - y[Y_VOUT]
    i_ref = (p[KPV] * ev + xc[0] + y[Y_IOUT] + p[CFF] * r[1]
             - p[KIC] * (y[Y_IL2] - y[Y_IOUT]))
    i_sat = i_ref
    if i_sat > p[IMAX]:
        i_sat = p[IMAX]
    elif i_sat < -p[IMAX]:
        i_sat = -p[IMAX]
    ei = i_sat - y[Y_IL1]
    v = y[Y_VC1] + p[KPI] * ei + xc[1] - p[KVD] * (y[Y_VC1] - y[Y_VOUT])
    uc = v
    if uc > p[UMAX]:
        uc = p[UMAX]
    elif uc < p[UMIN]:
        uc = p[UMIN]
    u[0] = uc
    # conditional integration: hold an integrator while its clamp is active in its direction
    if not ((v > p[UMAX] and ei > 0.0) or (v < p[UMIN] and ei < 0.0)):
        xc[1] += p[KII] * ts * ei
        if not ((i_ref > p[IMAX] and ev > 0.0) or (i_ref < -p[IMAX] and ev < 0.0)):
            xc[0] += p[KIV] * ts * ev
    return 0
