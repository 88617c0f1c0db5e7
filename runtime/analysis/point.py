"""The figures of one operating point from its linear model (:mod:`.linear`).

- **Closed-loop poles** z (eigenvalues of the sampled closed loop), their equivalent s = ln(z)/Ts,
  damping ratio and natural frequency. The loop is stable iff every |z| < 1.
- **Loop gain** broken at the converter command, L(z) = -Co (zI - Ao)^-1 Bo (negative-feedback
  convention: the closed loop is L / (1 + L)), on the unit circle up to the Nyquist frequency;
  its **gain margin** at each phase crossover (L real and negative), **phase margin** at each gain
  crossover (|L| = 1). The margins shown are the ones closest to instability: the gain margin
  with the smallest |GM| in dB and the smallest phase margin. With the open loop itself unstable
  (a constant-power load, an integrator), positive margins do not prove stability: the poles do
  (Nyquist criterion); both are shown.
- **Output impedance** Z_out(f) of the controlled emulator (the load replaced by a current sink
  of the same current), sampled: the injected current held over a period, v_out taken at the
  ticks, valid below the Nyquist frequency. **Load input impedance** Z_load = 1 / (dI/dV), for a
  constant-power load -V^2/P (negative). **Middlebrook's criterion**: with the emulator and the
  load each stable, |Z_out| < |Z_load| at every frequency (minor loop gain Z_out / Z_load below
  1) is sufficient for the two to be stable together; the margin is how far below, in dB.

References: G. F. Franklin, J. D. Powell, M. L. Workman, *Digital Control of Dynamic Systems*,
3rd ed., 1998 (ZOH sampling, z-plane margins); R. D. Middlebrook, "Input filter considerations
in design and application of switching regulators", IEEE IAS Annual Meeting, 1976.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.optimize import brentq

from .linear import LoopModel

#: points of the frequency grid on which crossovers are searched (then refined)
GRID_POINTS = 4000
#: lowest frequency searched, as a fraction of the Nyquist frequency
F_LOW_REL = 1e-6
#: a pole with |z| at least this far below 1 counts as stable (round-off of the eigenvalues)
STABLE_BELOW = 1.0 - 1e-9
#: an open-loop pole closer than this to z = 1 is an integrator: no phase crossover at f = 0
DC_POLE_TOL = 1e-6
#: Middlebrook: the impedance ratio margin [dB] below which the summary warns (a common design
#: target, 6 dB; common practice, no source)
MIDDLEBROOK_MARGIN_DB = 6.0


def poles(m: LoopModel) -> list[dict[str, Any]]:
    """Closed-loop poles, largest |z| first."""
    z = np.linalg.eigvals(m.Acl)
    out = []
    for zi in sorted(z, key=lambda c: (-abs(c), -c.imag)):
        mag = abs(zi)
        if mag > 0.0:
            s = complex(np.log(complex(zi))) / m.Ts
            wn = abs(s)
            zeta = -s.real / wn if wn > 0 else 1.0
        else:
            s, wn, zeta = None, None, None
        out.append(dict(z=complex(zi), abs_z=float(mag), s=s, wn_rad_s=wn, f_n_hz=(
            wn / (2 * math.pi) if wn is not None else None), damping=zeta))
    return out


def largest_pole(m: LoopModel) -> float:
    return float(np.max(np.abs(np.linalg.eigvals(m.Acl)))) if m.Acl.size else 0.0


#: a closed-loop pole this close (relative) to a pole of the sampled plant is a fixed mode
FIXED_MODE_TOL = 1e-7


def movable_poles(m: LoopModel) -> tuple[float, float]:
    """(largest |z| of the closed-loop poles that feedback moves, largest |z| of the fixed
    modes): a mode of the plant that the controller can neither excite nor see (the balance of
    a multi-phase converter's phase currents, say) is a pole of the open and the closed loop
    alike; no gain changes it, so a design's search leaves it out (0.0 when there is none)."""
    if not m.Acl.size:
        return 0.0, 0.0
    cl = np.linalg.eigvals(m.Acl)
    nz = m.Ao.shape[0] - m.Ac.shape[0]
    ol = np.linalg.eigvals(m.Ao[:nz, :nz]) if nz else np.zeros(0)
    fixed = np.zeros(cl.size, dtype=bool)
    used = np.zeros(ol.size, dtype=bool)
    for i, z in enumerate(cl):
        for j, w in enumerate(ol):
            if not used[j] and abs(z - w) <= FIXED_MODE_TOL * max(1.0, abs(w)):
                fixed[i] = used[j] = True
                break
    mov = np.abs(cl[~fixed])
    fix = np.abs(cl[fixed])
    return (float(mov.max()) if mov.size else 0.0), (float(fix.max()) if fix.size else 0.0)


#: the loop-gain perturbations of guarded_radius: +-3 dB of gain and +-20 degrees of phase
#: (the stability check's margin thresholds, runtime/analysis/check.py)
GUARD_GAINS = (10 ** (-3 / 20), 10 ** (3 / 20), np.exp(1j * np.radians(20.0)),
               np.exp(-1j * np.radians(20.0)))


def guarded_radius(m: LoopModel, gains=GUARD_GAINS) -> float:
    """The largest closed-loop |z| (of the poles that feedback moves) over the loop with its
    gain multiplied by 1 and by each of ``gains``: Acl(g) = Ao + g Bo Co. All inside the unit
    circle for g = 10^(+-3/20) and e^(+-j 20 deg) means a gain margin of at least 3 dB either
    way and a phase margin of at least 20 degrees at every crossover (a complex gain e^(j phi)
    rotates the Nyquist curve by phi: the loop stays stable for every rotation up to the phase
    margin; Astrom & Murray, Feedback Systems, 2008, sec. 9.3, from memory). A search that
    minimises this cannot buy a fast decay with a loop on the edge of its margins."""
    top = movable_poles(m)[0]
    if not m.Acl.size:
        return top
    nz = m.Ao.shape[0] - m.Ac.shape[0]
    ol = np.linalg.eigvals(m.Ao[:nz, :nz]) if nz else np.zeros(0)
    BC = m.Bo @ m.Co
    for g in gains:
        cl = np.linalg.eigvals(m.Ao + g * BC)
        keep = np.ones(cl.size, dtype=bool)
        for w in ol:  # the fixed modes, as in movable_poles
            d = np.abs(cl - w)
            j = int(np.argmin(d)) if d.size else -1
            if j >= 0 and keep[j] and d[j] <= FIXED_MODE_TOL * max(1.0, abs(w)):
                keep[j] = False
        if np.any(keep):
            top = max(top, float(np.max(np.abs(cl[keep]))))
    return top


def _response(A, B, C, D, theta: np.ndarray) -> np.ndarray:
    """C (e^{j theta} I - A)^-1 B + D for SISO (first input, first output), vectorised."""
    n = A.shape[0]
    zs = np.exp(1j * np.asarray(theta, dtype=float))
    M = zs[:, None, None] * np.eye(n)[None, :, :] - A[None, :, :]
    x = np.linalg.solve(M, np.broadcast_to(B[:, :1].astype(complex), (zs.size, n, 1)))
    return (C[:1, :] @ x)[:, 0, 0] + D[0, 0]


def loop_gain(m: LoopModel, f_hz: np.ndarray) -> np.ndarray:
    """L(e^{j 2 pi f Ts}) broken at the (first) converter command."""
    theta = 2 * math.pi * np.asarray(f_hz, dtype=float) * m.Ts
    return -_response(m.Ao, m.Bo, m.Co, np.zeros((1, 1)), theta)


def output_impedance(m: LoopModel, f_hz: np.ndarray) -> np.ndarray:
    """Z_out(e^{j 2 pi f Ts}) [ohm] of the controlled emulator (module docstring)."""
    theta = 2 * math.pi * np.asarray(f_hz, dtype=float) * m.Ts
    return -_response(m.Az, m.Bz, m.Cz, m.Dz, theta)


def load_impedance(m: LoopModel) -> float:
    """Z_load = 1 / (dI/dV) [ohm] of the load at the operating point (inf with no slope)."""
    return 1.0 / m.y_load if m.y_load != 0.0 else math.inf


def nyquist_hz(m: LoopModel) -> float:
    return 0.5 / m.Ts


def frequency_grid(m: LoopModel, n: int = GRID_POINTS) -> np.ndarray:
    fn = nyquist_hz(m)
    return np.geomspace(F_LOW_REL * fn, fn, n)


def _refine(fun, a: float, b: float) -> float:
    try:
        return brentq(fun, a, b, xtol=1e-14 * max(b, 1e-300), rtol=4 * np.finfo(float).eps,
                      maxiter=200)
    except ValueError:
        return 0.5 * (a + b)


def margins(m: LoopModel, f_hz: np.ndarray | None = None) -> dict[str, Any]:
    """Every gain and phase crossover below the Nyquist frequency, and the governing margins
    (module docstring). Frequencies in Hz, gain margins as ratios and dB, phase margins in
    degrees. Only for a single command."""
    if m.nu != 1:
        return dict(available=False, why=f"the plant has {m.nu} commands; margins are given "
                                         f"for one")
    # the Nyquist frequency itself is left out: L is real there, and its imaginary part's
    # sign is round-off (python-control leaves it out too)
    f = frequency_grid(m)[:-1] if f_hz is None else np.asarray(f_hz, dtype=float)
    L = loop_gain(m, f)

    def mag_log(x):
        return math.log(abs(loop_gain(m, np.array([x]))[0]))

    def imag(x):
        return loop_gain(m, np.array([x]))[0].imag

    gain_cross, phase_cross = [], []
    lm = np.log(np.abs(L))
    for i in np.nonzero(np.sign(lm[:-1]) * np.sign(lm[1:]) < 0)[0]:
        fc = _refine(mag_log, f[i], f[i + 1])
        Lc = loop_gain(m, np.array([fc]))[0]
        pm = 180.0 + math.degrees(math.atan2(Lc.imag, Lc.real))
        pm = (pm + 180.0) % 360.0 - 180.0
        gain_cross.append(dict(f_hz=fc, phase_margin_deg=pm))
    # f = 0: L(1) is real; finite and negative, it is a phase crossover too (a real closed-loop
    # pole passes z = 1 when the gain grows by 1/|L(1)|; python-control counts it). With an
    # open-loop pole at z = 1 (an integrator) L(1) is infinite: none there.
    if m.Ao.size == 0 or np.min(np.abs(np.linalg.eigvals(m.Ao) - 1.0)) > DC_POLE_TOL:
        L0 = loop_gain(m, np.array([0.0]))[0]
        if np.isfinite(L0) and L0.real < 0:
            gm = 1.0 / abs(L0)
            phase_cross.append(dict(f_hz=0.0, gain_margin=gm,
                                    gain_margin_db=20 * math.log10(gm)))
    im = L.imag
    for i in np.nonzero(np.sign(im[:-1]) * np.sign(im[1:]) < 0)[0]:
        fp = _refine(imag, f[i], f[i + 1])
        Lp = loop_gain(m, np.array([fp]))[0]
        if Lp.real < 0:
            gm = 1.0 / abs(Lp)
            phase_cross.append(dict(f_hz=fp, gain_margin=gm, gain_margin_db=20 * math.log10(gm)))
    out: dict[str, Any] = dict(available=True, gain_crossovers=gain_cross,
                               phase_crossovers=phase_cross)
    if phase_cross:
        g = min(phase_cross, key=lambda c: abs(c["gain_margin_db"]))
        out.update(gain_margin=g["gain_margin"], gain_margin_db=g["gain_margin_db"],
                   f_phase_crossover_hz=g["f_hz"])
    else:
        out.update(gain_margin=math.inf, gain_margin_db=math.inf, f_phase_crossover_hz=None)
    if gain_cross:
        g = min(gain_cross, key=lambda c: abs(c["phase_margin_deg"]))
        out.update(phase_margin_deg=g["phase_margin_deg"], f_gain_crossover_hz=g["f_hz"])
    else:
        out.update(phase_margin_deg=math.inf, f_gain_crossover_hz=None)
    return out


def middlebrook(m: LoopModel, f_hz: np.ndarray | None = None) -> dict[str, Any]:
    """The minor loop gain Z_out / Z_load over frequency: its largest magnitude, where, and
    the margin in dB (positive: |Z_out| below |Z_load| everywhere)."""
    f = frequency_grid(m, 1000) if f_hz is None else np.asarray(f_hz, dtype=float)
    z = output_impedance(m, f)
    zl = load_impedance(m)
    if math.isinf(zl):
        return dict(z_load_ohm=zl, max_minor_loop_gain=0.0, f_at_max_hz=None,
                    margin_db=math.inf, met=True, z_out_max_ohm=float(np.max(np.abs(z))))
    t = np.abs(z) / abs(zl)
    i = int(np.argmax(t))
    margin = -20 * math.log10(t[i]) if t[i] > 0 else math.inf
    return dict(z_load_ohm=zl, max_minor_loop_gain=float(t[i]), f_at_max_hz=float(f[i]),
                margin_db=margin, met=bool(t[i] < 1.0), z_out_max_ohm=float(np.max(np.abs(z))))


def summary(m: LoopModel) -> dict[str, Any]:
    """Plain data for a table and --json."""
    ps = poles(m)
    top = max((p["abs_z"] for p in ps), default=0.0)
    op = m.op
    mg = margins(m)
    mb = middlebrook(m)
    return dict(
        plant=m.plant, controller=m.controller, Ts_s=m.Ts, actuation_delay_periods=m.delay_halves / 2,
        v_ref_V=op.v_ref, p_load_W=op.p_load, v_out_V=op.v_out,
        steady_state=dict(plant=dict(zip(m.all_plant_states, op.x.tolist())),
                          command=op.u.tolist(), controller=op.xc.tolist(),
                          load=dict(P_W=float(op.d[0]), G_S=float(op.d[1]), I_A=float(op.d[2]))),
        controller_model=m.controller_model,
        stable=bool(top < STABLE_BELOW), largest_pole_abs=top,
        poles=[_pole_json(p) for p in ps],
        margins=mg, middlebrook=mb, notes=list(op.notes),
        interlocks_beyond=list(op.interlocks_beyond),
        loop_states=list(m.loop_states),
    )


def _pole_json(p: dict[str, Any]) -> dict[str, Any]:
    z, s = p["z"], p["s"]
    return dict(z_re=z.real, z_im=z.imag, abs_z=p["abs_z"],
                s_re=None if s is None else s.real, s_im=None if s is None else s.imag,
                wn_rad_s=p["wn_rad_s"], f_n_hz=p["f_n_hz"], damping=p["damping"])
