"""Linear state feedback with integral action, designed at one operating point of the plant.

The design runs in Python when the parameter array is built; the kernel only evaluates the
resulting affine law.

Design (build hook)
-------------------
1. Operating point. The plant's equilibrium ``x0`` at the output voltage ``V0`` [V] with a
   constant-power load ``P0`` [W] (load vector ``d = [P0, 0, 0]``) comes from the plant's
   ``DECLARATION.equilibrium``; the command ``u0`` [V] that holds it solves ``f(x0, u0) = 0``
   (``f`` is affine in ``u`` inside the plant's clamp ``[0, V_dc]``).
2. Linearisation by central finite differences of the plant's ``derivs`` around
   ``(x0, u0)``, generic over the plant's state count:

   .. math::

       A_{:,j} = \\frac{f(x_0 + h_j e_j, u_0) - f(x_0 - h_j e_j, u_0)}{2 h_j}, \\qquad
       B = \\frac{f(x_0, u_0 + h_u) - f(x_0, u_0 - h_u)}{2 h_u}

   with ``A`` [1/s] and ``B`` [1/s per unit of the input, V]; ``h_j = 1e-5 max(1, |x0_j|)``.
3. Zero-order-hold sampling at the control period ``Ts`` [s] (``scipy.linalg.expm`` of the
   augmented matrix ``[[A, B], [0, 0]] Ts``) and augmentation with a discrete integrator of the
   voltage error:

   .. math::

       \\begin{bmatrix} \\delta x_{k+1} \\\\ x_{i,k+1} \\end{bmatrix} =
       \\underbrace{\\begin{bmatrix} A_d & 0 \\\\ -T_s c & 1 \\end{bmatrix}}_{A_a}
       \\begin{bmatrix} \\delta x_k \\\\ x_{i,k} \\end{bmatrix} +
       \\underbrace{\\begin{bmatrix} B_d \\\\ 0 \\end{bmatrix}}_{B_a} \\delta u_k +
       \\begin{bmatrix} 0 \\\\ T_s \\end{bmatrix} (v_{ref,k} - V_0)

   where ``c`` picks the plant state ``v_out`` [V], ``x_i`` [V s] is the integral of the
   tracking error, ``delta x = x - x0``, ``delta u = u - u0``.
4. Gains ``K = [K_x, K_i]`` for ``delta u = -K [delta x; x_i]`` on ``(A_a, B_a)``:

   - ``method = "place"``: closed-loop poles requested in continuous time ``s_j`` [rad/s] and
     mapped to ``z_j = exp(s_j Ts)``; gains from ``scipy.signal.place_poles`` (Kautsky, Nichols,
     Van Dooren). The poles are the table ``poles`` (rows ``[re, im]`` in rad/s; a row with
     ``im > 0`` stands for the conjugate pair) when given, else the poles of the Bessel
     low-pass prototype of order ``n + 1`` with its -3 dB frequency at ``omega_c``
     (``scipy.signal.besselap`` with ``norm="mag"``, scaled by ``omega_c``): well damped (the
     least damped pair has a damping ratio of about 0.55 at order 5) and distinct, which
     single-input pole placement needs. The default ``omega_c = 2000 rad/s`` puts the five
     poles of the two-stage filter at 3000-3500 rad/s (``|s| Ts`` about 0.15-0.18 at 50 us),
     between the slow (~2.3 krad/s) and the fast (~9.2 krad/s) filter resonance of the demo
     plant at 400 V / 50 kW.
   - ``method = "lqr"``: the discrete-time linear-quadratic regulator minimising
     ``sum(z' Q z + R du^2)``, ``P = solve_discrete_are(A_a, B_a, Q, R)``,
     ``K = (R + B_a' P B_a)^-1 B_a' P A_a``. ``Q`` and ``R`` are diagonal by Bryson's rule:
     each weight is the inverse square of the largest acceptable excursion, ``1/lqr_dv^2``
     [1/V^2] on voltage states, ``1/lqr_di^2`` [1/A^2] on current states, ``1/lqr_dxi^2``
     [1/(V s)^2] on the integrator and ``R = 1/lqr_du^2`` [1/V^2] on the command. The defaults
     (1 V, 10 A, 2e-4 V s, 20 V) give closed-loop poles, as ``ln(z)/Ts``, of about -2.8,
     -2.1 +- j4.7 and -16.8 +- j17.6 krad/s on the demo plant at 400 V / 50 kW.

Kernel law (servo structure)
----------------------------
The gains are mapped onto the controller's reads by state name (a read that is not a plant state,
such as ``i_out`` or a fallback read on the single-stage plant, gets zero gain):

.. math::

    u_k = \\mathrm{clamp}_{[0, V_{dc}]}\\Big(u_0 - K_x (x_k - x_0) - K_i x_{i,k}\\Big), \\qquad
    x_{i,k+1} = x_{i,k} + T_s (v_{ref,k} - v_{out,k})

with ``u`` [V], ``x`` the measured plant state (A and V), ``K_x`` [V/A or V/V], ``K_i``
[V/(V s)] (negative with this sign convention: a positive error raises the command), ``x_i``
[V s]. The reference enters only through the integrator of the tracking error (the classic
servo structure with integral control): at any constant reference at which the loop is
stable the integrator can only be at rest when ``v_out = v_ref``, so the steady-state error is
zero at any reference and any load, not only at ``V0``. There is no reference feed-forward:
the tracking bandwidth is that of the closed-loop poles (a ramp leaves a small constant lag).

Anti-windup: conditional integration; the integrator holds on a tick where the unclamped
command is beyond a clamp and the integrator's increment (``-K_i Ts e``) would push it further.
Bumpless start: ``init`` presets ``x_i`` so that the first command equals the steady-state
command of the linearised plant at the measured state, ``u0 + F (x - x0)`` with
``F = -B^+ A`` (for the filters here the input enters only the linear first inductor
equation, so this is their steady-state command ``u = v_C1 + R1 i_L1``, up to the rounding of
the finite differences, ~1e-9 relative).

Limits of validity: the gains are designed at one operating point. Under a constant-power load
the plant's incremental conductance ``-P/V^2`` (negative incremental resistance ``-V^2/P``)
grows in magnitude as the voltage falls, so the linearised plant's unstable output pole moves
far from where the gains were designed: the loop degrades and finally loses stability well
below ``V0`` (on the demo plant designed at 400 V / 50 kW, below roughly 160-180 V at 50 kW
with the defaults of either method; see the tests for measured values). The averaged plant
model ignores switching ripple; the law assumes no computation delay (u computed from the
samples of the same tick, as the runtime's stage order does).

References
----------
G. F. Franklin, J. D. Powell, M. L. Workman, *Digital Control of Dynamic Systems*, 3rd ed.,
Addison-Wesley, 1998, ch. 4 (ZOH equivalents) and ch. 8 (pole placement, reference input and
integral control). J. Kautsky, N. K. Nichols, P. Van Dooren, "Robust pole assignment in linear
state feedback", Int. J. Control 41(5), 1129-1155, 1985 (the algorithm of
``scipy.signal.place_poles``). B. D. O. Anderson and J. B. Moore, *Optimal Control: Linear
Quadratic Methods*, Prentice Hall, 1990 (discrete-time LQR). A. E. Bryson and Y.-C. Ho,
*Applied Optimal Control*, Hemisphere, 1975 (weights from acceptable excursions). G. F. Franklin,
J. D. Powell, A. Emami-Naeini, *Feedback Control of Dynamic Systems*, Prentice Hall, ch. 7
(prototype pole locations, Bessel). K. J. Astrom and T. Hagglund, *Advanced PID Control*, ISA,
2006, sec. 3.5 (conditional integration).
"""
from __future__ import annotations

import numpy as np
import scipy.linalg
import scipy.signal
from numba import njit

from hilrig.plugins.base import (BuildContext, ChoiceParam, Declaration, Param, Signal,
                                 TableParam, Tunable, table_array)

#: the controller's reads, in the order of y
READS = ("v_out", "i_out", "i_L1", "v_C1", "i_L2")
NY = len(READS)
Y_VOUT = 0
# indices into p: scalars, then per read: gain K_y, design-point value y0, bumpless map F
TS, U0, UMIN, UMAX, KI = range(5)
KY = 5
Y0 = KY + NY
FB = Y0 + NY
NP = FB + NY

METHODS = ("place", "lqr")


# --------------------------------------------------------------------------------------------
# Design (Python, build time)
# --------------------------------------------------------------------------------------------

def _derivs(module, pp, x, u, d):
    return np.asarray(module.derivs(0.0, pp, np.asarray(x, dtype=np.float64),
                                    np.array([u], dtype=np.float64), d), dtype=np.float64)


def linearise(plant_module, plant_values, v0, p0):
    """Equilibrium and Jacobians of a plant at output voltage v0 [V] with constant power p0 [W].

    Returns
    -------
    A : (n, n) ndarray, df/dx [1/s]
    B : (n, 1) ndarray, df/du [1/s per V]
    x0 : (n,) ndarray, equilibrium state (SI units of the plant's states)
    u0 : float, equilibrium command [V]
    """
    decl = plant_module.DECLARATION
    pp = decl.pack(plant_values, BuildContext(Ts=1.0, plant=dict(plant_values)))
    d = np.array([float(p0), 0.0, 0.0])
    x0 = np.asarray(decl.equilibrium(plant_values, float(v0), d), dtype=np.float64)
    n = x0.size
    v_dc = float(plant_values.get("V_dc", np.inf))

    def f(x, u):
        return _derivs(plant_module, pp, x, u, d)

    # f is affine in u inside the plant's clamp: one secant from inside gives u0 exactly
    ug = min(float(v0), 0.5 * v_dc)
    hu = 1e-3 * max(1.0, abs(ug))
    b = (f(x0, ug + hu) - f(x0, ug - hu)) / (2 * hu)
    f0 = f(x0, ug)
    if not np.any(b):
        raise ValueError(f"plant {decl.name!r}: the command u has no effect at u = {ug:g} V; "
                         f"cannot design state feedback")
    u0 = ug - float(b @ f0) / float(b @ b)
    if not (0.0 < u0 < v_dc):
        raise ValueError(f"state_feedback: the design point V0 = {v0:g} V, P0 = {p0:g} W needs "
                         f"u0 = {u0:g} V, outside (0, {v_dc:g}) V of the plant; choose another "
                         f"design point")
    res = f(x0, u0)
    scale = np.abs(b) * max(1.0, abs(u0))
    if np.any(np.abs(res) > 1e-9 * np.max(scale)):
        raise ValueError(f"state_feedback: no equilibrium of plant {decl.name!r} at V0 = {v0:g} V, "
                         f"P0 = {p0:g} W (residual {np.max(np.abs(res)):g}); choose another "
                         f"design point")
    # central differences; the step keeps u0 +- h inside (0, V_dc)
    hu = min(1e-5 * max(1.0, abs(u0)), 0.5 * u0, 0.5 * (v_dc - u0))
    B = ((f(x0, u0 + hu) - f(x0, u0 - hu)) / (2 * hu)).reshape(n, 1)
    A = np.zeros((n, n))
    for j in range(n):
        h = 1e-5 * max(1.0, abs(x0[j]))
        xp, xm = x0.copy(), x0.copy()
        xp[j] += h
        xm[j] -= h
        A[:, j] = (f(xp, u0) - f(xm, u0)) / (2 * h)
    return A, B, x0, float(u0)


def augment(A, B, i_v, Ts):
    """ZOH-sample (A, B) at Ts [s] and append the integrator of the error of state i_v.

    Returns (Aa, Ba) of sizes (n+1, n+1) and (n+1, 1)."""
    n = A.shape[0]
    m = np.zeros((n + 1, n + 1))
    m[:n, :n] = A
    m[:n, n:] = B
    e = scipy.linalg.expm(m * Ts)
    Aa = np.zeros((n + 1, n + 1))
    Aa[:n, :n] = e[:n, :n]
    Aa[n, i_v] = -Ts
    Aa[n, n] = 1.0
    Ba = np.zeros((n + 1, 1))
    Ba[:n, :] = e[:n, n:]
    return Aa, Ba


def requested_poles(values, n_aug):
    """Continuous-time closed-loop poles [rad/s] for pole placement, n_aug of them."""
    rows = values.get("poles", ())
    if rows is not None and len(rows):
        poles = []
        for re, im in table_array(rows):
            poles.append(complex(re, im))
            if im != 0.0:
                poles.append(complex(re, -im))
        if len(poles) != n_aug:
            raise ValueError(f"state_feedback: poles has {len(poles)} poles (a row with im > 0 "
                             f"counts twice); the plant with integrator needs {n_aug}")
        return np.array(poles)
    _, p, _ = scipy.signal.besselap(n_aug, norm="mag")
    return np.asarray(p) * float(values["omega_c"])


def lqr_weights(values, state_units):
    """Diagonal Q (states then integrator) and R by Bryson's rule."""
    q = []
    for name, unit in state_units:
        if unit == "V":
            q.append(1.0 / values["lqr_dv"] ** 2)
        elif unit == "A":
            q.append(1.0 / values["lqr_di"] ** 2)
        else:
            raise ValueError(f"state_feedback: no LQR weight for plant state {name!r} [{unit}]; "
                             f"weights exist for states in V and A")
    q.append(1.0 / values["lqr_dxi"] ** 2)
    return np.diag(q), np.array([[1.0 / values["lqr_du"] ** 2]])


def design(values, ctx):
    """Run the whole design; returns a dict with A, B, x0, u0, Aa, Ba, K (1 x n+1), and the
    requested discrete poles (place) or Q, R (lqr)."""
    if ctx.plant_module is None:
        raise ValueError("state_feedback: the build context has no plant module; the design "
                         "linearises the plant (run it through a scenario, or pass "
                         "BuildContext(plant_module=..., plant_states=...))")
    states = tuple(ctx.plant_states) or tuple(s.name for s in ctx.plant_module.DECLARATION.states)
    if "v_out" not in states:
        raise ValueError(f"state_feedback: plant {ctx.plant_name!r} has no state v_out "
                         f"(states: {', '.join(states)})")
    method = values["method"]
    if method not in METHODS:
        raise ValueError(f"state_feedback: method = {method!r} is not one of {METHODS}")
    A, B, x0, u0 = linearise(ctx.plant_module, ctx.plant, values["V0"], values["P0"])
    Aa, Ba = augment(A, B, states.index("v_out"), ctx.Ts)
    out = dict(A=A, B=B, x0=x0, u0=u0, Aa=Aa, Ba=Ba, states=states)
    if method == "place":
        s = requested_poles(values, Aa.shape[0])
        z = np.exp(s * ctx.Ts)
        K = scipy.signal.place_poles(Aa, Ba, z).gain_matrix
        out.update(poles_s=s, poles_z=z)
    else:
        units = {sig.name: sig.unit for sig in ctx.plant_module.DECLARATION.states}
        Q, R = lqr_weights(values, [(nm, units[nm]) for nm in states])
        P = scipy.linalg.solve_discrete_are(Aa, Ba, Q, R)
        K = np.linalg.solve(R + Ba.T @ P @ Ba, Ba.T @ P @ Aa)
        out.update(Q=Q, R=R)
    out["K"] = np.asarray(K, dtype=np.float64).reshape(1, -1)
    return out


def _build(values, ctx):
    des = design(values, ctx)
    K, states, x0, A, B = des["K"][0], des["states"], des["x0"], des["A"], des["B"]
    n = len(states)
    k_i = float(K[n])
    if k_i == 0.0 or not np.all(np.isfinite(K)):
        raise ValueError(f"state_feedback: the design gave gains {K}; the integrator gain must "
                         f"be finite and nonzero")
    # steady-state command at a measured state: the least-squares u that zeroes f along B
    f = -np.linalg.pinv(B) @ A
    p = np.zeros(NP)
    p[TS], p[U0], p[KI] = ctx.Ts, des["u0"], k_i
    p[UMIN] = 0.0
    # the plant clamps the converter voltage to [0, V_dc]; the law clamps the same way so that
    # the integrator sees the clamp
    p[UMAX] = float(ctx.plant.get("V_dc", np.inf))
    for j, name in enumerate(READS):
        if name in states:
            i = states.index(name)
            p[KY + j], p[Y0 + j], p[FB + j] = K[i], x0[i], f[0, i]
    return p


def _design(values, ctx):
    """Candidates for the design from the plant (runtime/analysis/design.py keeps the first
    whose worst largest closed-loop |z| over the design range is below its target, else the
    lowest). The design point comes from the range instead of fixed numbers: its middle voltage
    at half the highest load power, then its hardest corner (lowest voltage, highest power: the
    largest constant-power conductance P/V^2). LQR first (over six test plants it held the range
    where pole placement did not; docs/design-notes.md), then pole placement with the Bessel
    pattern at 4000 and 2000 rad/s."""
    rng = ctx.design_range
    if rng is None:
        return [{}]
    mid = dict(V0=rng.v_mid, P0=0.5 * rng.p_hi)
    corner = dict(V0=rng.v_lo, P0=rng.p_hi)
    return [dict(method="lqr", **mid), dict(method="lqr", **corner),
            dict(method="place", omega_c=4000.0, **mid), dict(method="place", omega_c=2000.0, **mid),
            dict(method="place", omega_c=4000.0, **corner)]


DECLARATION = Declaration(
    kind="controller",
    name="state_feedback",
    summary="Linear state feedback + integral action, designed at one operating point by pole "
            "placement or LQR",
    params=(
        ChoiceParam("method", METHODS, "place",
                    "design method: pole placement of the sampled augmented plant, or "
                    "discrete-time LQR"),
        Param("V0", "V", 400.0, (0.0, 1e5), "design point: output voltage", lower_open=True),
        Param("P0", "W", 50e3, (-1e8, 1e8), "design point: constant-power load (negative: "
              "power fed back)"),
        Param("omega_c", "rad/s", 2000.0, (0.0, 1e7),
              "place: -3 dB frequency of the Bessel prototype whose poles are requested "
              "(ignored when the table poles is given)", lower_open=True),
        TableParam("poles", (("re", "rad/s"), ("im", "rad/s")), (),
                   "place: continuous-time closed-loop poles, rows [re, im]; a row with im > 0 "
                   "also requests its conjugate; n_states + 1 poles in all; empty: Bessel "
                   "pattern at omega_c",
                   increasing_first=False, min_rows=0,
                   column_bounds=((-1e7, 0.0, False), (0.0, 1e7, False))),
        Param("lqr_dv", "V", 1.0, (0.0, 1e5), "lqr: acceptable voltage-state excursion "
              "(Bryson's rule, weight 1/dv^2)", lower_open=True),
        Param("lqr_di", "A", 10.0, (0.0, 1e6), "lqr: acceptable current-state excursion "
              "(weight 1/di^2)", lower_open=True),
        Param("lqr_dxi", "V s", 2e-4, (0.0, 1e3), "lqr: acceptable excursion of the error "
              "integral (weight 1/dxi^2)", lower_open=True),
        Param("lqr_du", "V", 20.0, (0.0, 1e5), "lqr: acceptable command excursion "
              "(R = 1/du^2)", lower_open=True),
    ),
    states=(Signal("x_i", "V s", "integral of the voltage error v_ref - v_out"),),
    reads=READS,
    outputs=(Signal("u", "V", "converter voltage command"),),
    source="Franklin, Powell, Workman, Digital Control of Dynamic Systems, 3rd ed., 1998, "
           "ch. 4 and 8; Kautsky, Nichols, Van Dooren, 'Robust pole assignment in linear state "
           "feedback', Int. J. Control 41(5), 1985 (scipy.signal.place_poles); Anderson & Moore, "
           "Optimal Control: Linear Quadratic Methods, 1990 (LQR); Bryson & Ho, Applied Optimal "
           "Control, 1975 (weights); Astrom & Hagglund, Advanced PID Control, 2006, sec. 3.5 "
           "(anti-windup)",
    build=_build,
    # tuning moves the LQR weights (the method the design chooses first); with method = "place"
    # they have no effect: tune omega_c with --params omega_c:LOW:HIGH then
    tunable=(Tunable("lqr_dv", 1e-3, 1e3), Tunable("lqr_di", 1e-2, 1e4),
             Tunable("lqr_dxi", 1e-7, 1.0), Tunable("lqr_du", 0.1, 1e4)),
    design=_design,
    design_method="design point and method chosen from the design range: LQR (Bryson's rule "
                  "weights) or Bessel pole placement, at the range's middle or its hardest "
                  "corner, the first whose worst largest closed-loop |z| over the range is "
                  "below the target",
)
#: signals this controller accepts in place of ones a plant does not have; they are not plant
#: states there, so they get zero gain
READ_FALLBACKS = {"v_C1": "v_out", "i_L2": "i_L1"}


# --------------------------------------------------------------------------------------------
# Kernels
# --------------------------------------------------------------------------------------------

@njit(cache=True)
def init(p, xc, y, r):
    """Preset the error integral x_i [V s] so that the first command is the steady-state
    command at the measured state (bumpless start); y are the reads, r the reference."""
    ub = p[U0]
    uf = p[U0]
    for j in range(NY):
        dy = y[j] - p[Y0 + j]
        ub += p[FB + j] * dy
        uf -= p[KY + j] * dy
    if ub > p[UMAX]:
        ub = p[UMAX]
    elif ub < p[UMIN]:
        ub = p[UMIN]
    # first command uf - K_i x_i equals the steady-state command ub
    xc[0] = (uf - ub) / p[KI]


@njit(cache=True)
def step(t, p, xc, y, r, u):
    """Write the clamped command u[0] [V] from the reads y and the integral xc[0] [V s], then
    advance the integral by Ts (r[0] - v_out) unless that winds it further into a clamp.
    Returns 0 (this law raises no fault)."""
    e = r[0] - y[Y_VOUT]
    v = p[U0] - p[KI] * xc[0]
    for j in range(NY):
        v -= p[KY + j] * (y[j] - p[Y0 + j])
    uc = v
    if uc > p[UMAX]:
        uc = p[UMAX]
    elif uc < p[UMIN]:
        uc = p[UMIN]
    u[0] = uc
    # conditional integration: hold while clamped if this tick's increment pushes further in
    du = -p[KI] * p[TS] * e
    if not ((v > p[UMAX] and du > 0.0) or (v < p[UMIN] and du < 0.0)):
        xc[0] += p[TS] * e
    return 0
