"""Flatness-based tracking control (exact input-output linearisation) of the output filter.

Two-stage filter (states i_L1, v_C1, i_L2, v_out; averaged model of
:mod:`hilrig.plugins.plants.two_stage_lc`) with the load modelled as a constant-power load
of power P:

.. math::

    L_1 \\dot i_{L1} = u - R_1 i_{L1} - v_{C1}, \\quad
    C_1 \\dot v_{C1} = i_{L1} - i_{L2}, \\quad
    L_2 \\dot i_{L2} = v_{C1} - R_2 i_{L2} - v_{out}, \\quad
    C_2 \\dot v_{out} = i_{L2} - q, \\quad q = \\frac{P}{v_{out}}

The output y = v_out is a flat output with relative degree 4 = n. Its derivatives follow
algebraically from the measured state (no numerical differentiation), with
:math:`v = \\max(v_{out}, v_g)`:

.. math::

    y^{(1)} = \\frac{i_{L2} - q}{C_2}, \\qquad
    \\dot q = -\\frac{q}{v} y^{(1)}, \\qquad
    \\ddot q = q\\left(\\frac{2 (y^{(1)})^2}{v^2} - \\frac{y^{(2)}}{v}\\right), \\qquad
    q^{(3)} = q\\left(-\\frac{6 (y^{(1)})^3}{v^3} + \\frac{6 y^{(1)} y^{(2)}}{v^2}
              - \\frac{y^{(3)}}{v}\\right)

    \\dot i_{L2} = \\frac{v_{C1} - R_2 i_{L2} - v_{out}}{L_2}, \\quad
    y^{(2)} = \\frac{\\dot i_{L2} - \\dot q}{C_2}, \\quad
    \\ddot i_{L2} = \\frac{(i_{L1} - i_{L2})/C_1 - R_2 \\dot i_{L2} - y^{(1)}}{L_2}, \\quad
    y^{(3)} = \\frac{\\ddot i_{L2} - \\ddot q}{C_2}

    y^{(4)} = \\frac{1}{C_2}\\left(\\frac{1}{L_2}\\left(\\frac{\\dot i_{L1} - \\dot i_{L2}}{C_1}
              - R_2 \\ddot i_{L2} - y^{(2)}\\right) - q^{(3)}\\right), \\qquad
    \\dot i_{L1} = \\frac{u - R_1 i_{L1} - v_{C1}}{L_1}

so :math:`y^{(4)}` is affine in u with the gain :math:`1/(L_1 C_1 L_2 C_2)`. With the tracking
error :math:`e = y - v_{ref}` the law imposes

.. math::

    y^{(4)} = \\nu = v_{ref}^{(4)} - \\sum_{k=0}^{3} a_k e^{(k)} - a_I \\xi, \\qquad
    \\dot \\xi = e

and solves the chain above backwards for u:
:math:`\\dot i_{L1} = C_1 (L_2 (C_2 \\nu + q^{(3)}) + R_2 \\ddot i_{L2} + y^{(2)}) + \\dot i_{L2}`,
:math:`u = L_1 \\dot i_{L1} + R_1 i_{L1} + v_{C1}`, clamped to [0, V_dc].
Without integral action (``pole_int = 0``) :math:`a_I = 0` and the coefficients come from
:math:`s^4 + a_3 s^3 + a_2 s^2 + a_1 s + a_0 = (s + p)^4`, so the error obeys
:math:`e^{(4)} + a_3 e^{(3)} + a_2 e^{(2)} + a_1 e^{(1)} + a_0 e = 0`. With integral action
the error dynamics are of 5th order,
:math:`s^5 + a_3 s^4 + a_2 s^3 + a_1 s^2 + a_0 s + a_I = (s + p)^4 (s + p_I)`.

Single-stage filter (states i_L1, v_out; :mod:`hilrig.plugins.plants.single_lc`), chosen
automatically from the plant's states: relative degree 2,
:math:`y^{(2)} = (\\dot i_L - \\dot q)/C` with :math:`\\dot i_L = (u - R i_L - v_{out})/L`,
error polynomial :math:`(s + p)^2` (times :math:`(s + p_I)` with integral action), and
:math:`u = L (C \\nu + \\dot q) + R i_L + v_{out}`. Its reads v_C1 and i_L2 fall back to
v_out and i_L1 (unused there).

Load power. The controller does not know P: each tick it estimates
:math:`\\hat P = v_{out} i_{out}` from the measured load current and treats the whole load as
constant power (so :math:`q = i_{out}` exactly whenever :math:`v_{out} \\ge v_g`).

Why it keeps working far from any operating point. A constant-power load has the incremental
resistance :math:`-V^2/P`; as V falls at constant P it shrinks towards 0, i.e. the destabilising
incremental conductance :math:`P/V^2` grows (4x from 400 V to 200 V). A linear controller tuned
at one voltage sees a different plant there; the law above cancels the load's nonlinearity at
the current state, so the error dynamics stay those designed, as long as the limits below hold.

Units: u, v_out, v_C1, v_ref, e [V]; i_L1, i_L2, i_out [A]; L [H]; C [F]; R [ohm]; P [W];
p, p_I [rad/s]; :math:`a_k` [s^-(n-k)] (s^-(n+1-k) with integral action), :math:`a_I`
[s^-(n+1)]; :math:`\\xi` [V s]; :math:`v_{ref}^{(k)}` [V/s^k].

Integral action (parameter ``pole_int``, default 0 = off). Off by default because with the
nominal model and the measured load power the law has no steady-state offset, while the
integral state stores the large error of any recovery (after the DC-link clamp, a load step)
and returns it as overshoot. Errors in R1 or R2 (parameter ``model_R_scale``, or a real
filter whose resistances are uncertain) leave an offset of a fraction of a volt per mohm at a
few hundred amperes; turn it on (e.g. ``pole_int = 300`` rad/s, well below p) to remove it.
:math:`\\xi` integrates only while :math:`|e|` is inside ``int_band`` [V] and u is not clamped
in the direction the error pushes (conditional integration). While :math:`\\xi` is held, the
loop runs on the first four coefficients of the 5th-order design, which are not those of
:math:`(s + p)^4`: for p = 5000 rad/s, p_I = 300 rad/s the held loop's roots are
-3425 +- j2135 and -6725 +- j1534 rad/s (damped, not the 4-fold real pole).

Bumpless start: the runtime starts every run at an equilibrium. With integral action ``init``
presets :math:`\\xi` so that the first command equals the model's steady-state command
:math:`v_{C1} + R_1 i_{L1}` plus the reference and error terms
:math:`L_1 C_1 L_2 C_2 (v_{ref}^{(4)} + \\sum_{k \\ge 1} a_k v_{ref}^{(k)} - a_0 e)`: the
integrator absorbs the derivative estimates that a mismatched model computes at rest. With the
nominal model and a settled start it is 0; without integral action it is 0 and, at a settled
start, the first command is the steady-state command.

Fault codes: ``step`` always returns 0. The low-voltage guard is a numerical safeguard, not a
protection: the runtime's collapse check and the interlocks act on low voltage. u is always
finite and inside [0, V_dc] (a non-finite intermediate, e.g. from a NaN measurement, gives 0 V,
the plant's own clamp; the protect stage trips on the NaN measurement itself).

Limits of validity
------------------
- The whole load is treated as a constant-power load of constant power. Resistive or
  constant-current parts make the estimated power vary with voltage; at rest the law is still
  exact (q equals the measured current), in transients the load derivatives are then
  approximate. A change of the load power is not in the model: a power ramp at the rate
  :math:`\\dot P` [W/s] falsifies the estimate of :math:`y^{(2)}` by about
  :math:`\\dot P / (v C_2)` and leaves, while it lasts, an error of the order of
  :math:`a_2/a_0 \\cdot \\dot P/(v C_2) = 6 \\dot P / (v C_2 p^2)` [V]; a load step acts as an
  initial error :math:`e^{(1)} = -\\Delta i_{out}/C_2` that the error dynamics remove at their
  own pace (a dip of the order of :math:`\\Delta i_{out}/(C_2 p)` [V]). A cascaded loop with
  load-current feed-forward reacts to both more directly.
- The model is the plant's averaged model with its nominal parameters (scaled by
  ``model_R_scale`` and ``model_LC_scale`` for robustness studies). Errors in R1 or R2 leave
  a steady offset unless integral action is on.
- The law is applied with a zero-order hold at the control period Ts; the continuous error
  dynamics hold only approximately, better the smaller p Ts. On the demo plant at Ts = 50 us,
  error poles of about 3000-6000 rad/s work (p Ts 0.15-0.3); 10 000 rad/s and faster chatter
  between the rails; below about 2000 rad/s the sampled cancellation of the filter's resonance
  is inexact.
- No computation delay is modelled: u computed from the sample at t acts from t.
- The CPL model is singular at 0 V: inside the law v_out is replaced by max(v_out, v_g)
  (parameter ``v_guard``). Below v_g the law no longer cancels the load.
- The reference must be at least four (two on the single stage) times differentiable: use a
  shaping filter of order >= 5 (order 4 makes the 4th derivative step, and u with it).
- Measurement noise on currents reaches u with a gain that grows with P/V^2.
- u is clamped to [0, V_dc]; while clamped the error dynamics are not those designed.

References
----------
M. Fliess, J. Levine, P. Martin and P. Rouchon, "Flatness and defect of non-linear systems:
introductory theory and examples", Int. J. Control 61(6), 1327-1361, 1995.
A. Isidori, *Nonlinear Control Systems*, 3rd ed., Springer, 1995, ch. 4 (input-output
linearisation, relative degree).
K. J. Astrom and T. Hagglund, *Advanced PID Control*, ISA, 2006, sec. 3.5 (conditional
integration against windup).
"""
from math import comb

import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, Param, Signal, Tunable

# indices into p
(TS, ORDER, L1, R1, C1, L2, R2, C2, K0, K1, K2, K3, KI, V_DC, V_GUARD, U_GAIN, E_BAND) = range(17)
# indices into y (the order of DECLARATION.reads)
Y_VOUT, Y_IOUT, Y_IL1, Y_VC1, Y_IL2 = range(5)

TWO_STAGE_STATES = ("i_L1", "v_C1", "i_L2", "v_out")
SINGLE_STAGE_STATES = ("i_L1", "v_out")


def _variant(ctx) -> int:
    """Relative degree of v_out for the plant in ``ctx``: 4 (two-stage) or 2 (single-stage)."""
    states = tuple(ctx.plant_states)
    if states == TWO_STAGE_STATES:
        return 4
    if states == SINGLE_STAGE_STATES:
        return 2
    if not states:
        # a context without plant states (a direct pack() in a script): go by the parameters
        keys = set(ctx.plant)
        if {"L1", "C1", "L2", "C2"} <= keys:
            return 4
        if {"L", "C"} <= keys:
            return 2
    raise ValueError(
        f"controller 'flatness' supports the two-stage filter (states {', '.join(TWO_STAGE_STATES)}) "
        f"and the single-stage filter (states {', '.join(SINGLE_STAGE_STATES)}); plant "
        f"{ctx.plant_name or '?'!r} has states {', '.join(states) or 'unknown'}: choose one of "
        f"those plants or another controller")


def error_coefficients(order: int, pole: float, pole_int: float) -> np.ndarray:
    """Coefficients [a_0, ..., a_{n-1}, a_I] of the error dynamics.

    Without integral action (``pole_int == 0``): ``(s + pole)^n = s^n + sum a_k s^k``, a_I = 0.
    With it: ``(s + pole)^n (s + pole_int) = s^(n+1) + sum_k a_k s^(k+1) + a_I``.
    """
    n = int(order)
    base = np.array([comb(n, k) * pole ** (n - k) for k in range(n + 1)])  # ascending, s^0..s^n
    if pole_int == 0.0:
        return np.concatenate((base[:n], [0.0]))
    # multiply by (s + pole_int): ascending coefficients of the product
    prod = np.zeros(n + 2)
    prod[1:] += base
    prod[:-1] += pole_int * base
    return np.concatenate((prod[1:n + 1], [prod[0]]))


def _build(values, ctx):
    n = _variant(ctx)
    plant = ctx.plant
    need = ("V_dc", "L1", "R1", "C1", "L2", "R2", "C2") if n == 4 else ("V_dc", "L", "R", "C")
    missing = [k for k in need if k not in plant]
    if missing:
        raise ValueError(f"controller 'flatness' needs the plant parameters {', '.join(need)}; "
                         f"missing: {', '.join(missing)}")
    rs, ls = float(values["model_R_scale"]), float(values["model_LC_scale"])
    if n == 4:
        l1, r1, c1 = plant["L1"] * ls, plant["R1"] * rs, plant["C1"] * ls
        l2, r2, c2 = plant["L2"] * ls, plant["R2"] * rs, plant["C2"] * ls
        gain = l1 * c1 * l2 * c2
    else:
        l1, r1, c1 = plant["L"] * ls, plant["R"] * rs, plant["C"] * ls
        l2, r2, c2 = 0.0, 0.0, 0.0
        gain = l1 * c1
    a = error_coefficients(n, float(values["pole"]), float(values["pole_int"]))
    k = np.zeros(4)
    k[:n] = a[:n]
    return np.array([ctx.Ts, float(n), l1, r1, c1, l2, r2, c2, k[0], k[1], k[2], k[3], a[n],
                     float(plant["V_dc"]), float(values["v_guard"]), gain, float(values["int_band"])])


#: the design's error pole as a share of the sampling rate: p = POLE_TS / Ts
POLE_TS = 0.25


def _design(values, ctx):
    """The error pole from the control period (runtime/analysis/design.py scores the
    candidates over the design range and keeps the first below its target): p = 0.25 / Ts
    first (5000 rad/s at 50 us), then 0.15 / Ts and 0.35 / Ts. Over six test plants at 25 and
    50 us, p Ts = 0.25 held every range; the usable window ends near p Ts = 0.4, where the
    sampled error dynamics meet the filter's unmodelled sampling (docs/design-notes.md)."""
    return [dict(pole=POLE_TS / ctx.Ts), dict(pole=0.15 / ctx.Ts), dict(pole=0.35 / ctx.Ts)]


DECLARATION = Declaration(
    kind="controller",
    name="flatness",
    summary="Flatness-based tracking (exact input-output linearisation) with a constant-power "
            "load estimate, optional integral action, DC-link clamp",
    params=(
        Param("pole", "rad/s", 5000.0, (0.0, 1e6),
              "magnitude p of the n-fold real error pole (s + p)^n, n = 4 two-stage, 2 single-stage",
              lower_open=True),
        Param("pole_int", "rad/s", 0.0, (0.0, 1e6),
              "pole p_I of the integral action, error dynamics (s + p)^n (s + p_I); removes "
              "offsets from resistance errors; 0 turns it off"),
        Param("int_band", "V", 5.0, (0.0, 1e5),
              "the integral state integrates only while |v_out - v_ref| is below this (keeps "
              "large transient errors, e.g. after the DC-link clamp, out of it)", lower_open=True),
        Param("v_guard", "V", 10.0, (0.0, 1e4),
              "low-voltage guard: the law uses max(v_out, v_guard) where the load model divides by v_out",
              lower_open=True),
        Param("model_R_scale", "-", 1.0, (0.0, 100.0),
              "factor on the plant's resistances in the controller's model (robustness studies)"),
        Param("model_LC_scale", "-", 1.0, (0.0, 100.0),
              "factor on the plant's inductances and capacitances in the controller's model",
              lower_open=True),
    ),
    states=(Signal("xi", "V s", "integral of the tracking error v_out - v_ref"),),
    reads=("v_out", "i_out", "i_L1", "v_C1", "i_L2"),
    outputs=(Signal("u", "V", "converter voltage command, clamped to [0, V_dc]"),),
    source="Fliess, Levine, Martin, Rouchon, Int. J. Control 61(6), 1327-1361, 1995 (flatness); "
           "Isidori, Nonlinear Control Systems, 3rd ed., 1995, ch. 4 (input-output "
           "linearisation); Astrom & Hagglund, Advanced PID Control, 2006, sec. 3.5 (anti-windup)",
    build=_build,
    tunable=(Tunable("pole", 100.0, 1e5),),
    design=_design,
    design_method="error pole p = 0.25 / Ts (then 0.15 / Ts, 0.35 / Ts), the first whose worst "
                  "largest closed-loop |z| over the design range is below the target",
)
#: signals this controller accepts in place of ones a plant does not have (single stage)
READ_FALLBACKS = {"v_C1": "v_out", "i_L2": "i_L1"}


@njit(cache=True, inline="always")
def _law(p, xi, y, r):
    """Unclamped command [V] and tracking error e = v_out - v_ref [V] for integrator state xi.

    Also returns u_rest: the command for the same reference and error with the plant at rest in
    the model (all derivative estimates zero), for the bumpless preset."""
    v_out = y[Y_VOUT]
    i_out = y[Y_IOUT]
    v = v_out
    if not (v >= p[V_GUARD]):  # also replaces NaN: the CPL model is singular at 0 V
        v = p[V_GUARD]
    # the estimated load power, the whole load taken as constant power; q = i_out for v >= v_g
    q = v_out * i_out / v
    e = v_out - r[0]
    i_l1 = y[Y_IL1]
    rest = r[4] - p[K0] * e
    if p[ORDER] == 4.0:
        l1, r1, c1, l2, r2, c2 = p[L1], p[R1], p[C1], p[L2], p[R2], p[C2]
        v_c1, i_l2 = y[Y_VC1], y[Y_IL2]
        y1 = (i_l2 - q) / c2
        di2 = (v_c1 - r2 * i_l2 - v_out) / l2
        dq = -q * y1 / v
        y2 = (di2 - dq) / c2
        d2i2 = ((i_l1 - i_l2) / c1 - r2 * di2 - y1) / l2
        d2q = q * (2.0 * y1 * y1 / (v * v) - y2 / v)
        y3 = (d2i2 - d2q) / c2
        d3q = q * (-6.0 * y1 * y1 * y1 / (v * v * v) + 6.0 * y1 * y2 / (v * v) - y3 / v)
        nu = (r[4] - p[K3] * (y3 - r[3]) - p[K2] * (y2 - r[2]) - p[K1] * (y1 - r[1])
              - p[K0] * e - p[KI] * xi)
        di1 = c1 * (l2 * (c2 * nu + d3q) + r2 * d2i2 + y2) + di2
        u = l1 * di1 + r1 * i_l1 + v_c1
        rest += p[K3] * r[3] + p[K2] * r[2] + p[K1] * r[1]
        u_rest = r1 * i_l1 + v_c1 + p[U_GAIN] * rest
    else:
        l, rr, c = p[L1], p[R1], p[C1]
        y1 = (i_l1 - q) / c
        dq = -q * y1 / v
        nu = r[2] - p[K1] * (y1 - r[1]) - p[K0] * e - p[KI] * xi
        u = l * (c * nu + dq) + rr * i_l1 + v_out
        rest = r[2] + p[K1] * r[1] - p[K0] * e
        u_rest = rr * i_l1 + v_out + p[U_GAIN] * rest
    return u, e, u_rest


@njit(cache=True)
def init(p, xc, y, r):
    xc[0] = 0.0
    if p[KI] == 0.0:
        return
    u, e, u_rest = _law(p, 0.0, y, r)
    # u is affine in xi with slope -U_GAIN * KI: choose xi so that the first command is u_rest
    xi = (u - u_rest) / (p[U_GAIN] * p[KI])
    if xi - xi == 0.0:  # finite
        xc[0] = xi


@njit(cache=True)
def step(t, p, xc, y, r, u):
    xi = xc[0]
    u_raw, e, _ = _law(p, xi, y, r)
    uc = u_raw
    if uc > p[V_DC]:
        uc = p[V_DC]
    elif not (uc >= 0.0):  # also catches NaN (e.g. from an overflow): 0 V, the plant's own clamp
        uc = 0.0
    u[0] = uc
    if p[KI] != 0.0:
        # conditional integration: xi decreasing (e < 0) raises u, so hold it while u is clamped
        # in that direction; hold it also outside the error band, where the error is a transient
        # (a recovery from the clamp, a load step) rather than an offset of the model
        if not ((u_raw > p[V_DC] and e < 0.0) or (u_raw < 0.0 and e > 0.0)
                or not (u_raw == u_raw) or not (abs(e) < p[E_BAND])):
            xn = xi + p[TS] * e
            if xn - xn == 0.0:
                xc[0] = xn
    return 0
