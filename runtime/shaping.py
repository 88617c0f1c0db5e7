"""Reference shaping: a rate limiter followed by an n-th order linear filter with all poles at -w.

The raw reference (from a profile or a battery model) may step. Controllers that invert the
plant (flatness-based control of the 4-state filter) need the reference and its first four
derivatives, bounded. The shaping stage yields them without numerical differentiation:

1. rate limiter: ``s_k = s_{k-1} + clip(w_k - s_{k-1}, -S Ts, S Ts)`` with the slew-rate limit
   S [V/s]; s is piecewise linear in time with slope at most S.
2. filter ``F(s) = w^n / (s + w)^n`` in controllable canonical form, state
   ``z = [y, y', ..., y^(n-1)]``, discretised exactly for a piecewise-linear input (first-order
   hold), so ``z`` at each tick is the continuous filter's state at that instant.

Because F has unit DC gain and a non-negative impulse response (all real poles), the output
slope never exceeds S and the output never overshoots a step: ``|y'| <= S``.
The 4th derivative comes from the state for n >= 5; for n = 4 it is the algebraic
``y'''' = w^4 (s - y) - 4 w^3 y' - 6 w^2 y'' - 4 w y'''``, which steps with s.

References
----------
G. F. Franklin, J. D. Powell, M. L. Workman, *Digital Control of Dynamic Systems*, 3rd ed.,
1998, sec. 6.3 (triangle / first-order-hold equivalent). The bound on y' follows from
``y' = h * s'`` with ``h >= 0`` and ``integral h = 1`` (common practice, no source).
"""
from __future__ import annotations

from functools import lru_cache
from math import comb

import numpy as np
from numba import njit
from scipy.linalg import expm


@lru_cache(maxsize=64)
def design(order: int, pole: float, ts: float):
    """Return (ad, g1, g2, cr, dr) for :func:`shape_step`.

    Parameters
    ----------
    order : int
        Filter order n >= 4.
    pole : float
        The n-fold pole magnitude w [rad/s].
    ts : float
        Control period [s].
    """
    n = int(order)
    if n < 4:
        raise ValueError(f"shaping order {n} < 4: the controllers need four derivatives")
    w = float(pole)
    # (s + w)^n = sum_k comb(n, k) w^(n-k) s^k ; companion matrix of the chain of integrators
    a = np.zeros((n, n))
    a[:-1, 1:] = np.eye(n - 1)
    a[-1, :] = [-comb(n, k) * w ** (n - k) for k in range(n)]
    b = np.zeros(n)
    b[-1] = w ** n
    # First-order hold: expm([[A T, B T, 0], [0, 0, 1], [0, 0, 0]]), computed in normalised time.
    # A's entries span 1 .. C(n, k) w^n (1e46 for n = 12 at 7500 rad/s); expm of A T directly
    # loses every digit from order ~8 on, or overflows (an unstable or NaN filter). With
    # z = D zeta, D = diag(1, w, ..., w^(n-1)): D^-1 A D = w A1 and D^-1 B = w e_n, A1 the
    # companion matrix of (s + 1)^n, so expm only sees w T A1 and the result is scaled back.
    a1 = np.zeros((n, n))
    a1[:-1, 1:] = np.eye(n - 1)
    a1[-1, :] = [-comb(n, k) for k in range(n)]
    m = np.zeros((n + 2, n + 2))
    m[:n, :n] = a1 * (w * ts)
    m[n - 1, n] = w * ts
    m[n, n + 1] = 1.0
    e = expm(m)
    scale = w ** np.arange(n, dtype=np.float64)
    ad = e[:n, :n] * scale[:, None] / scale[None, :]
    g1 = e[:n, n] * scale
    g2 = e[:n, n + 1] * scale
    # output map r = cr z + dr s (value and four derivatives)
    cr = np.zeros((5, n))
    dr = np.zeros(5)
    for j in range(min(n, 5)):
        cr[j, j] = 1.0
    if n == 4:
        cr[4, :] = a[-1, :]
        dr[4] = b[-1]
    out = (np.ascontiguousarray(ad), np.ascontiguousarray(g1), np.ascontiguousarray(g2),
           np.ascontiguousarray(cr), dr)
    for a in out:  # shared between runs through the cache: never written
        a.flags.writeable = False
    return out


@njit(cache=True)
def shape_init(w0, z, s):
    """Rest at the raw reference w0: z = [w0, 0, ...], limiter state s[0] = w0."""
    z[:] = 0.0
    z[0] = w0
    s[0] = w0


@njit(cache=True, inline="always")
def _advance(ad, g1, g2, z, zt, s_prev, ds, n):
    """z <- ad z + g1 s_prev + g2 ds for the first n states."""
    for i in range(n):
        acc = g1[i] * s_prev + g2[i] * ds
        for j in range(n):
            acc += ad[i, j] * z[j]
        zt[i] = acc
    for i in range(n):
        # After a transient the derivative states decay towards zero and would enter the
        # subnormal range (below ~2e-308) within ~0.1 s; subnormal arithmetic is ~100x slower
        # on x86. Values this small are zero for any physical purpose.
        v = zt[i]
        z[i] = v if not (-1e-200 < v < 1e-200) else 0.0


@njit(cache=True)
def shape_step(ad, g1, g2, cr, dr, slew, ts, z, s, zt, w_raw, r):
    """Advance the shaping filter from the previous tick to this one and write r (5 values).

    z: filter state (n); s: [limiter output at the previous tick]; zt: scratch (n).
    """
    s_prev = s[0]
    ds = w_raw - s_prev
    lim = slew * ts
    if ds > lim:
        ds = lim
    elif ds < -lim:
        ds = -lim
    elif not (ds == ds):  # NaN raw reference: hold (the protect stage trips on it)
        ds = 0.0
    s_now = s_prev + ds
    n = z.shape[0]
    # the default order and its neighbours with the order as a literal, so that the compiler
    # unrolls the matrix-vector product (the same operations in the same order: same bits)
    if n == 5:
        _advance(ad, g1, g2, z, zt, s_prev, ds, 5)
    elif n == 4:
        _advance(ad, g1, g2, z, zt, s_prev, ds, 4)
    elif n == 6:
        _advance(ad, g1, g2, z, zt, s_prev, ds, 6)
    else:
        _advance(ad, g1, g2, z, zt, s_prev, ds, n)
    s[0] = s_now
    if n >= 5:
        # the first five states are the value and its four derivatives (cr = [I 0], dr = 0)
        for k in range(5):
            r[k] = z[k]
        return
    for k in range(5):
        acc = dr[k] * s_now
        for j in range(n):
            acc += cr[k, j] * z[j]
        r[k] = acc
