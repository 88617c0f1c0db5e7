"""The sampled loop linearised at an operating point, from the plugins' own compiled kernels.

An operating point is a reference voltage V and a constant load power P (the scenario's load
conductance and constant current at t = 0 stay as they are). At it:

1. **Steady state.** Plant state x, command u and controller state xc that solve together

   - ``derivs(x, u, d) = 0`` (the plant at rest under the held command and load),
   - ``xc = xc'`` and ``u = u'``, where ``step(xc, y, r)`` gives ``xc'`` and ``u'`` for the
     measurement ``y = outputs(x, u, d)`` and the constant reference ``r = [V, 0, 0, 0, 0]``

   by Newton's method with a finite-difference Jacobian, from the plant's equilibrium at V and
   the controller's own ``init``. A controller with integral action ends at v_out = V; one
   without ends where its own steady-state error puts it.
2. **Plant.** The continuous-time Jacobians of ``derivs`` and ``outputs`` with respect to x, u
   and the load's constant-current input d[2] (central differences; the plant is affine in x
   and u except for its load, so the steps only meet the load's curvature). The constant-power
   load's incremental conductance -P/V^2 is inside A. For the output impedance the same is done
   with the load replaced by a current sink of the same current (the emulator alone).
3. **Controller.** The discrete-time Jacobians of ``step`` with respect to xc and its reads of
   y (central differences, or the plugin's own ``linear_model`` kernel where it has one).
4. **Sampled loop.** Zero-order hold at the control period Ts (matrix exponential of the
   augmented matrix), with the scenario's actuation delay of 0-4 half periods exactly as the
   loop applies it (``runtime/loop.py`` ``actuate``: the first half of a period with the command
   of ceil(delay/2) ticks ago, the second with floor(delay/2)), queue states for the delayed
   commands, and the measurement taken at the tick's start (before the command of that tick).

Plant states whose derivative is identically zero (the records of a switching-level plant,
unused phases) and controller states that the step leaves unchanged (an integrator switched
off) are left out: they never move from their steady values, and would only add poles at z = 1
that are not the loop's.

Limits: the model is linear, valid for small deviations; a command at its clamp has no small-
signal effect (the model says so in ``notes``); the sensor chain (``[[sensors]]``) is not in the
model; a switching-level plant is analysed through its averaged ``derivs``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.linalg

#: relative finite-difference step of the Jacobians
FD_REL = 1e-6
#: Newton's method for the steady state: iterations, and the relative step that ends it
NEWTON_MAX = 40
NEWTON_TOL = 1e-11
#: the reference vector's length (v_ref and four derivatives, plugins/base.py)
NR = 5


class AnalysisError(ValueError):
    """An operating point the analysis cannot linearise at (no steady state, a fault code)."""


@dataclass
class OperatingPoint:
    """The steady state of plant, load and controller at (v_ref, p_load)."""

    v_ref: float
    p_load: float
    #: the load vector [P W, G S, I A]
    d: np.ndarray
    x: np.ndarray
    u: np.ndarray
    xc: np.ndarray
    y: np.ndarray
    v_out: float
    #: the largest residual of the steady-state equations, relative to their scale
    residual: float
    notes: list[str] = field(default_factory=list)
    #: the scenario's trip interlocks whose condition holds at this steady state (their
    #: descriptions): the point is beyond the rating the scenario protects, whatever its stability
    interlocks_beyond: list[str] = field(default_factory=list)


@dataclass
class LoopModel:
    """The linearised sampled loop at one operating point.

    Continuous plant (with the load at its operating point): ``A, B, C, D`` (x' = A x + B u,
    y = C x + D u), ``E, F`` the same for the load's constant-current input. ``As, Cs, Es, Fs``:
    the same with the load replaced by a current sink of the same current (for the output
    impedance). Controller (discrete, over its reads): ``Ac, Bc, Cc, Dc``. Sampled loop: the
    open loop ``Ao, Bo, Co`` from the applied command u_in to the controller's command u_out
    (no feedthrough; the loop gain is L = -Co (zI - Ao)^-1 Bo), the closed loop ``Acl``, and
    the output impedance's closed loop ``Az, Bz, Cz, Dz`` (input: current drawn [A], output:
    v_out [V], Z_out = -(Cz (zI - Az)^-1 Bz + Dz)).
    """

    plant: str
    controller: str
    Ts: float
    delay_halves: int
    op: OperatingPoint
    plant_states: list[str]
    controller_states: list[str]
    outputs: list[str]
    reads: list[str]
    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    E: np.ndarray
    F: np.ndarray
    As: np.ndarray
    Cs: np.ndarray
    Es: np.ndarray
    Fs: np.ndarray
    Ac: np.ndarray
    Bc: np.ndarray
    Cc: np.ndarray
    Dc: np.ndarray
    Ao: np.ndarray
    Bo: np.ndarray
    Co: np.ndarray
    Acl: np.ndarray
    Az: np.ndarray
    Bz: np.ndarray
    Cz: np.ndarray
    Dz: np.ndarray
    #: the load's incremental conductance d i_load / d v_out at the operating point [S]
    y_load: float
    #: names of the sampled loop's states (plant, delayed commands, controller)
    loop_states: list[str]
    #: where the controller's linear model came from: "finite differences" or "declared"
    controller_model: str = "finite differences"
    #: index of v_out in outputs
    i_vout: int = 0
    #: every declared plant state (op.x is over these; plant_states only the live ones)
    all_plant_states: list[str] = field(default_factory=list)

    @property
    def nu(self) -> int:
        return self.B.shape[1]


# -- the kernels as plain functions -------------------------------------------------------------

class _Kernels:
    """The compiled kernels of one prepared scenario, called from Python."""

    def __init__(self, prep):
        sc = prep.sc
        a = prep.args
        self.prep = prep
        self.plant_mod = sc.plant.plugin.module
        self.ctrl_mod = sc.controller.plugin.module
        self.pdecl = sc.plant.plugin.declaration
        self.cdecl = sc.controller.plugin.declaration
        self.pp = a["pp"]
        self.pc = a["pc"]
        self.iyc = np.asarray(a["iyc"], dtype=np.int64)
        self.nx = a["x"].shape[0]
        self.nc = a["xc"].shape[0]
        self.nu = a["u"].shape[0]
        self.ny = a["y"].shape[0]
        self.n_reads = len(self.cdecl.reads)
        #: sampled plants of loop_only linearisations (see _zoh_cached)
        self.zoh_cache: dict = {}

    def f(self, x, u, d) -> np.ndarray:
        return np.array(self.plant_mod.derivs(0.0, self.pp, x, u, d), dtype=np.float64)

    def h(self, x, u, d) -> np.ndarray:
        y = np.zeros(self.ny)
        self.plant_mod.outputs(0.0, self.pp, x, u, d, y)
        return y

    def reads(self, y) -> np.ndarray:
        return np.ascontiguousarray(y[self.iyc]) if self.n_reads else np.zeros(1)

    def step(self, xc, yc, r):
        xc2 = np.array(xc, dtype=np.float64)
        u = np.zeros(self.nu)
        code = int(self.ctrl_mod.step(0.0, self.pc, xc2, np.ascontiguousarray(yc), r, u))
        return xc2, u, code

    def init(self, y, r) -> np.ndarray:
        xc = np.zeros(self.nc)
        self.ctrl_mod.init(self.pc, xc, self.reads(y), r)
        return xc


def _steps(z: np.ndarray, floor: np.ndarray) -> np.ndarray:
    return FD_REL * np.maximum(np.abs(z), floor)


def _jac(fun, z: np.ndarray, floor: np.ndarray) -> np.ndarray:
    """Central-difference Jacobian of fun at z."""
    hs = _steps(z, floor)
    cols = []
    for j in range(z.size):
        zp, zm = z.copy(), z.copy()
        zp[j] += hs[j]
        zm[j] -= hs[j]
        cols.append((fun(zp) - fun(zm)) / (2.0 * hs[j]))
    return np.column_stack(cols) if cols else np.zeros((fun(z).size, 0))


def load_vector(prep, p_load: float) -> np.ndarray:
    """The load [P, G, I] of the operating point: the scenario's load at t = 0 with its
    constant power replaced by p_load."""
    d = np.array(prep.sc.load_v[:, 0], dtype=np.float64).copy()
    d[0] = float(p_load)
    return d


def reference_vector(v: float) -> np.ndarray:
    r = np.zeros(NR)
    r[0] = float(v)
    return r


def operating_point(prep, v_ref: float, p_load: float, kern: _Kernels | None = None) -> OperatingPoint:
    """Steady state of plant, load and controller at the reference v_ref [V] and load power
    p_load [W] (module docstring, step 1). Raises AnalysisError when there is none."""
    k = kern or _Kernels(prep)
    sc = prep.sc
    d = load_vector(prep, p_load)
    r = reference_vector(v_ref)
    nx, nc, nu = k.nx, k.nc, k.nu
    notes: list[str] = []
    try:
        x = np.asarray(k.pdecl.equilibrium(sc.plant.values, float(v_ref), d), dtype=np.float64)
    except (ValueError, ArithmeticError) as exc:
        raise AnalysisError(f"plant {k.pdecl.name!r} has no equilibrium at {v_ref:g} V, "
                            f"{p_load:g} W: {exc}") from None
    u = np.zeros(nu)
    y = k.h(x, u, d)
    xc = k.init(y, r)
    xc1, u, code = k.step(xc, k.reads(y), r)
    if code != 0:
        raise AnalysisError(f"controller {k.cdecl.name!r} returned fault code {code} at "
                            f"{v_ref:g} V, {p_load:g} W")
    # scales: states' own magnitudes, at least 1 (V, A) so that zero currents get a step
    floor = np.concatenate([np.maximum(np.abs(x), 1.0), np.maximum(np.abs(xc), 1.0),
                            np.maximum(np.abs(u), 1.0)])

    def split(z):
        return z[:nx], z[nx:nx + nc], z[nx + nc:]

    def residual(z):
        xx, cc, uu = split(z)
        yy = k.h(xx, uu, d)
        c2, u2, _ = k.step(cc, k.reads(yy), r)
        return np.concatenate([k.f(xx, uu, d), c2 - cc, u2 - uu])

    z = np.concatenate([x, xc, u])
    # Newton's method, the Jacobian kept while the residual falls fast (the equations are
    # affine but for the load and the controller's clamps, so one Jacobian usually serves)
    J = None
    last = np.inf
    res = residual(z)
    for _ in range(NEWTON_MAX):
        if not np.all(np.isfinite(res)):
            raise AnalysisError(f"no steady state at {v_ref:g} V, {p_load:g} W: the plant or "
                                f"controller gives a non-finite value")
        size = float(np.max(np.abs(res))) if res.size else 0.0
        if J is None or not size < 0.1 * last:
            J = _jac(residual, z, floor)
        last = size
        dz = np.linalg.lstsq(J, -res, rcond=None)[0]
        z = z + dz
        res = residual(z)
        if np.all(np.abs(dz) <= NEWTON_TOL * np.maximum(np.abs(z), floor)):
            break
    xx, cc, uu = split(z)
    scale = np.maximum(np.abs(J) @ np.maximum(np.abs(z), floor), 1e-300)
    rel = float(np.max(np.abs(res) / scale)) if res.size else 0.0
    if not (rel < 1e-8):
        raise AnalysisError(f"no steady state of plant and controller at {v_ref:g} V, "
                            f"{p_load:g} W (residual {rel:.2g} of scale): a limit of the "
                            f"controller or the converter (a current or command clamp) cannot "
                            f"hold this point, or the loop has no equilibrium there")
    yy = k.h(xx, uu, d)
    _, _, code = k.step(cc, k.reads(yy), r)
    if code != 0:
        raise AnalysisError(f"controller {k.cdecl.name!r} returns fault code {code} at the "
                            f"steady state of {v_ref:g} V, {p_load:g} W")
    v_out = float(yy[prep.y_names.index("v_out")])
    if v_out < sc.v_collapse:
        raise AnalysisError(f"the steady state at {v_ref:g} V, {p_load:g} W has v_out = "
                            f"{v_out:g} V, below the collapse limit {sc.v_collapse:g} V")
    if abs(v_out - v_ref) > 1e-6 * max(1.0, abs(v_ref)):
        notes.append(f"steady-state error: v_out = {v_out:.6g} V at v_ref = {v_ref:g} V")
    return OperatingPoint(v_ref=float(v_ref), p_load=float(p_load), d=d, x=xx, u=uu, xc=cc,
                          y=yy, v_out=v_out, residual=rel, notes=notes,
                          interlocks_beyond=_beyond(prep, yy, uu))


def _beyond(prep, y: np.ndarray, u: np.ndarray) -> list[str]:
    """The trip interlocks (above, below, magnitude) whose condition holds at rest."""
    from hilrig.safety.interlocks import SIDE_ABOVE, SIDE_BELOW, SIDE_MAGNITUDE
    values = dict(zip(prep.y_names, y.tolist()))
    values.update(zip(prep.u_names, u.tolist()))
    if "v_out" in values and "i_out" in values:
        values["p_out"] = values["v_out"] * values["i_out"]
    values["dv_out_dt"] = 0.0
    out = []
    for il in prep.sc.interlocks:
        if il.action != "trip" or il.signal not in values:
            continue
        x, side = values[il.signal], il.side_code
        if ((side == SIDE_ABOVE and x > il.threshold) or (side == SIDE_BELOW and x < il.threshold)
                or (side == SIDE_MAGNITUDE and abs(x) > il.threshold)):
            out.append(f"{il.describe()} (at rest: {il.signal} = {x:.6g})")
    return out


def _plant_jacobians(k: _Kernels, op: OperatingPoint, d: np.ndarray):
    """Continuous (A, B, C, D) and the load-current input's (E, F) at op with load d."""
    x, u = op.x, op.u
    fx = np.maximum(np.abs(x), 1.0)
    fu = np.maximum(np.abs(u), 1.0)
    A = _jac(lambda z: k.f(z, u, d), x, fx)
    B = _jac(lambda z: k.f(x, z, d), u, fu)
    C = _jac(lambda z: k.h(z, u, d), x, fx)
    D = _jac(lambda z: k.h(x, z, d), u, fu)
    fi = np.array([max(abs(d[2]), 1.0)])

    def with_i(i):
        dd = d.copy()
        dd[2] = i[0]
        return dd

    E = _jac(lambda i: k.f(x, u, with_i(i)), d[2:3].copy(), fi)
    F = _jac(lambda i: k.h(x, u, with_i(i)), d[2:3].copy(), fi)
    return A, B, C, D, E, F


def _controller_jacobians(k: _Kernels, op: OperatingPoint):
    """Discrete (Ac, Bc, Cc, Dc) of the controller over its reads, at op."""
    r = reference_vector(op.v_ref)
    yc = k.reads(op.y)
    model = getattr(k.ctrl_mod, "linear_model", None)
    if model is not None:
        nr = yc.size
        Ac, Bc = np.zeros((k.nc, k.nc)), np.zeros((k.nc, nr))
        Cc, Dc = np.zeros((k.nu, k.nc)), np.zeros((k.nu, nr))
        model(k.pc, np.array(op.xc), yc, r, Ac, Bc, Cc, Dc)
        return Ac, Bc, Cc, Dc, "declared"
    fc = np.maximum(np.abs(op.xc), 1.0)
    fy = np.maximum(np.abs(yc), 1.0)
    Ac = _jac(lambda z: k.step(z, yc, r)[0], op.xc, fc)
    Cc = _jac(lambda z: k.step(z, yc, r)[1], op.xc, fc)
    Bc = _jac(lambda z: k.step(op.xc, z, r)[0], yc, fy)
    Dc = _jac(lambda z: k.step(op.xc, z, r)[1], yc, fy)
    if k.n_reads == 0:
        Bc, Dc = Bc[:, :0], Dc[:, :0]
    return Ac, Bc, Cc, Dc, "finite differences"


def zoh(A: np.ndarray, B: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Zero-order-hold discretisation over h: (e^{A h}, integral_0^h e^{A s} ds B)."""
    n, m = A.shape[0], B.shape[1]
    M = np.zeros((n + m, n + m))
    M[:n, :n] = A
    M[:n, n:] = B
    e = scipy.linalg.expm(M * h)
    return e[:n, :n], e[:n, n:]


def _live_states(A: np.ndarray, B: np.ndarray, E: np.ndarray) -> np.ndarray:
    """Indices of the plant states that take part: a state whose derivative is identically
    zero (a record, an unused phase) never moves from its steady value, whatever reads it; it
    is a constant input to the others, and its pole at z = 1 is not the loop's."""
    n = A.shape[0]
    keep = [j for j in range(n) if np.any(A[j, :]) or np.any(B[j, :]) or np.any(E[j, :])]
    return np.array(keep, dtype=np.int64)


def _live_controller_states(Ac: np.ndarray, Bc: np.ndarray) -> np.ndarray:
    """Indices of the controller states that take part: a state that the step leaves as it is
    (xc' = xc, whatever the reads; an integrator switched off, a stored setting) is a constant
    here; its pole at z = 1 is not the loop's."""
    n = Ac.shape[0]
    keep = []
    for j in range(n):
        row = Ac[j, :].copy()
        own = row[j]
        row[j] = 0.0
        if not (own == 1.0 and not np.any(row) and not np.any(Bc[j, :])):
            keep.append(j)
    return np.array(keep, dtype=np.int64)


def _zoh_cached(cache: dict | None, A, BE, h):
    """zoh(), remembered for matrices equal to single precision (a search linearises the same
    plant at the same points again and again: only the controller changes). The key rounds
    to about 7 digits; the value is the exact result for the first matrix seen."""
    if cache is None:
        return zoh(A, BE, h)
    key = (h, A.shape, BE.shape, A.astype(np.float32).tobytes(), BE.astype(np.float32).tobytes())
    out = cache.get(key)
    if out is None:
        if len(cache) > 4096:
            cache.clear()
        out = cache[key] = zoh(A, BE, h)
    return out


def _sampled_plant(A, B, C, D, E, F, Ts: float, delay_halves: int, cache: dict | None = None):
    """The plant's sampled model from the tick's command u_k (and the held injected current
    i_k) to the tick's measurement y_k, with the actuation delay's queue.

    State z = [x, u_{k-1}, ..., u_{k-q}]. Returns (Ap, Bp, Ep, Cp, Fp, q)."""
    nx, nu = B.shape
    l1, l2 = (delay_halves + 1) // 2, delay_halves // 2
    q = max(l1, 1 if np.any(D) else 0)
    nz = nx + q * nu
    Ap = np.zeros((nz, nz))
    Bp = np.zeros((nz, nu))
    Ep = np.zeros((nz, E.shape[1]))
    BE = np.hstack([B, E])
    if l1 == l2:
        Phi, G = _zoh_cached(cache, A, BE, Ts)
        parts = [(l1, G[:, :nu])]
    else:
        Phih, Gh = _zoh_cached(cache, A, BE, Ts / 2)
        Phi = Phih @ Phih
        G = np.hstack([Phih @ Gh[:, :nu] + Gh[:, :nu], Phih @ Gh[:, nu:] + Gh[:, nu:]])
        parts = [(l1, Phih @ Gh[:, :nu]), (l2, Gh[:, :nu])]
    Ap[:nx, :nx] = Phi
    Ep[:nx, :] = G[:, nu:]
    for lag, g in parts:
        if lag == 0:
            Bp[:nx, :] += g
        else:
            Ap[:nx, nx + (lag - 1) * nu: nx + lag * nu] += g
    if q:
        Bp[nx:nx + nu, :] = np.eye(nu)
        for m in range(1, q):
            Ap[nx + m * nu: nx + (m + 1) * nu, nx + (m - 1) * nu: nx + m * nu] = np.eye(nu)
    Cp = np.zeros((C.shape[0], nz))
    Cp[:, :nx] = C
    if q:
        Cp[:, nx:nx + nu] = D
    return Ap, Bp, Ep, Cp, F.copy(), q


def _close(Ap, Bp, Ep, Cp, Fp, Ac, Bc, Cc, Dc, S):
    """Series and closed-loop assembly. S selects the controller's reads from y."""
    Cr, Fr = S @ Cp, S @ Fp
    nz, nc = Ap.shape[0], Ac.shape[0]
    Ao = np.block([[Ap, np.zeros((nz, nc))], [Bc @ Cr, Ac]])
    Bo = np.vstack([Bp, np.zeros((nc, Bp.shape[1]))])
    Co = np.hstack([Dc @ Cr, Cc])
    Acl = Ao + Bo @ Co
    Bi = np.vstack([Bp @ Dc @ Fr + Ep, Bc @ Fr])
    return Ao, Bo, Co, Acl, Bi


def linearize(prep, v_ref: float, p_load: float, kern: _Kernels | None = None, *,
              loop_only: bool = False) -> LoopModel:
    """The linear model of the sampled loop at (v_ref, p_load) (module docstring).
    ``loop_only``: the loop alone (poles, loop gain), without the output impedance's model
    (``As, Cs, Es, Fs, Az, Bz, Cz, Dz`` empty, ``y_load`` NaN): for searches that only need the
    closed-loop poles (runtime/analysis/design.py)."""
    k = kern or _Kernels(prep)
    sc = prep.sc
    op = operating_point(prep, v_ref, p_load, k)
    A, B, C, D, E, F = _plant_jacobians(k, op, op.d)
    from hilrig.plugins.plants.loads import load_current
    v_min = float(sc.plant.values.get("v_load_min", 0.0))
    if loop_only:
        As = Cs = Es = Fs = None
        y_load = float("nan")
    else:
        # the emulator alone: the load replaced by a current sink of the same current
        i_op = float(load_current(op.v_out, op.d, v_min))
        d_sink = np.array([0.0, 0.0, i_op])
        As, _, Cs, _, Es, Fs = _plant_jacobians(k, op, d_sink)
        hv = 1e-6 * max(abs(op.v_out), 1.0)
        y_load = float((load_current(op.v_out + hv, op.d, v_min)
                        - load_current(op.v_out - hv, op.d, v_min)) / (2 * hv))
    Ac, Bc, Cc, Dc, how = _controller_jacobians(k, op)
    cnames = [s.name for s in k.cdecl.states][:k.nc]
    cnames += [f"x{j}" for j in range(len(cnames), k.nc)]
    live_c = _live_controller_states(Ac, Bc)
    Ac, Bc, Cc = Ac[np.ix_(live_c, live_c)], Bc[live_c], Cc[:, live_c]
    cnames = [cnames[j] for j in live_c]
    at_limit = np.any(op.u <= 0.0) or ("V_dc" in sc.plant.values
                                       and np.any(op.u >= float(sc.plant.values["V_dc"])))
    if at_limit or not np.any(B):
        u_txt = ", ".join(f"{u:.6g}" for u in op.u)
        raise AnalysisError(f"no steady state inside the converter's range at {v_ref:g} V, "
                            f"{p_load:g} W: the loop rests with the command at the converter's "
                            f"limit (u = {u_txt} V), where it has no effect on the plant (the "
                            f"loop is open; v_out = {op.v_out:.6g} V)")
    live = _live_states(A, B, E)
    names = [s.name for s in k.pdecl.states]
    A, B, E, C = A[np.ix_(live, live)], B[live], E[live], C[:, live]
    if not loop_only:
        As, Es, Cs = As[np.ix_(live, live)], Es[live], Cs[:, live]
    delay = int(round(2 * sc.actuation_delay))
    S = np.zeros((max(k.n_reads, 0), C.shape[0]))
    for row, j in enumerate(k.iyc[:k.n_reads]):
        S[row, j] = 1.0
    Ap, Bp, Ep, Cp, Fp, q = _sampled_plant(A, B, C, D, E, F, sc.Ts, delay,
                                           k.zoh_cache if loop_only else None)
    Ao, Bo, Co, Acl, _ = _close(Ap, Bp, Ep, Cp, Fp, Ac, Bc, Cc, Dc, S)
    iv = prep.y_names.index("v_out")
    if loop_only:
        As = Cs = Es = Fs = Az = Bz = Cz = Dz = np.zeros((0, 0))
    else:
        Aps, Bps, Eps, Cps, Fps, _ = _sampled_plant(As, B, Cs, D, Es, Fs, sc.Ts, delay)
        _, _, _, Az, Bz = _close(Aps, Bps, Eps, Cps, Fps, Ac, Bc, Cc, Dc, S)
        Cz = np.hstack([Cps[iv:iv + 1, :], np.zeros((1, Ac.shape[0]))])
        Dz = Fps[iv:iv + 1, :]
    u_names = prep.u_names
    loop_states = ([names[j] for j in live]
                   + [f"{u_names[j]}[k-{m}]" for m in range(1, q + 1) for j in range(k.nu)]
                   + [f"controller.{n}" for n in cnames])
    return LoopModel(
        plant=k.pdecl.name, controller=k.cdecl.name, Ts=sc.Ts, delay_halves=delay, op=op,
        plant_states=[names[j] for j in live],
        controller_states=cnames,
        outputs=list(prep.y_names), reads=list(k.cdecl.reads),
        A=A, B=B, C=C, D=D, E=E, F=F, As=As, Cs=Cs, Es=Es, Fs=Fs,
        Ac=Ac, Bc=Bc, Cc=Cc, Dc=Dc, Ao=Ao, Bo=Bo, Co=Co, Acl=Acl,
        Az=Az, Bz=Bz, Cz=Cz, Dz=Dz, y_load=y_load, loop_states=loop_states,
        controller_model=how, i_vout=iv, all_plant_states=names)


def kernels(prep) -> _Kernels:
    """The kernels of a prepared scenario, for many operating points in a row."""
    return _Kernels(prep)


def model_at(sc, v_ref: float, p_load: float) -> LoopModel:
    """Prepare the scenario and linearise at one operating point."""
    from hilrig.runtime.run import prepare
    return linearize(prepare(sc), v_ref, p_load)


def describe_matrices(m: LoopModel) -> dict[str, Any]:
    """The model's matrices as plain lists (for --json)."""
    keys = ("A", "B", "C", "D", "Ac", "Bc", "Cc", "Dc", "Ao", "Bo", "Co", "Acl")
    return {key: np.asarray(getattr(m, key)).tolist() for key in keys}
