"""Reference shaping (rate limiter + w^n/(s+w)^n filter) against scipy and closed forms.

Outside references:

* ``scipy.signal.lsim`` with ``interp=True`` (linear interpolation of the input between samples,
  i.e. the first-order-hold response) of ``s^k w^n / (s + w)^n`` gives the k-th derivative of the
  filter output for the same piecewise-linear input [general-purpose library].
* The step response of ``w^n / (s + w)^n`` is the Erlang(n, w) distribution function
  ``1 - exp(-w t) sum_{j<n} (w t)^j / j!`` (Laplace pair ``t^(n-1) e^(-w t) / (n-1)!`` <->
  ``1/(s+w)^n``, any Laplace-transform table), evaluated with ``scipy.stats.gamma``.

scipy is run in normalised time ``tau = w t`` (filter ``1/(s+1)^n``, time step ``w Ts``, k-th
derivative scaled back by ``w^k``): time scaling is exact for an LTI system, and it keeps the
coefficients of scipy's own companion realisation near 1 instead of up to ``w^n`` (1e46 for
n = 12 at 7500 rad/s), which would otherwise spoil the reference itself.

The rate limiter has no outside reference beyond its definition
``s_k = s_{k-1} + clip(w_k - s_{k-1}, -S Ts, S Ts)`` (common practice, no source); the test
writes it out in numpy to build the filter input.
"""
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import signal, stats

from hilrig.runtime.shaping import design, shape_init, shape_step

# The scenario defaults (runtime/scenario.py SHAPING and TIMING): Ts 50 us, 7500 rad/s, 2e5 V/s.
TS = 50e-6
POLE = 7500.0
SLEW = 2e5


def _run(order, pole, ts, slew, raw, step=shape_step):
    """Drive the shaping stage as the loop does: shape_init on tick 0, then shape_step."""
    ad, g1, g2, cr, dr = design(order, pole, ts)
    z = np.zeros(order)
    s = np.zeros(1)
    zt = np.zeros(order)
    r = np.zeros(5)
    out = np.empty((raw.size, 5))
    shape_init(raw[0], z, s)
    for k in range(raw.size):
        step(ad, g1, g2, cr, dr, slew, ts, z, s, zt, raw[k], r)
        out[k] = r
    return out


def _rate_limit(raw, slew, ts):
    """The rate limiter by its definition (module docstring), independent of shape_step."""
    s = np.empty_like(raw)
    s[0] = raw[0]
    for k in range(1, raw.size):
        s[k] = s[k - 1] + np.clip(raw[k] - s[k - 1], -slew * ts, slew * ts)
    return s


def _lsim_derivative(k, order, pole, ts, u):
    """k-th derivative of the output of w^n/(s+w)^n for input samples u (linear in between),
    starting from rest at u[0]: scipy.signal.lsim of s^k/(s+1)^n in normalised time."""
    num = np.zeros(k + 1)
    num[0] = 1.0
    den = np.poly(np.full(order, -1.0))
    tau = np.arange(u.size) * (pole * ts)
    _, y, _ = signal.lsim((num, den), u - u[0], tau, interp=True)
    return y * pole ** k + (u[0] if k == 0 else 0.0)


def _demo_raw(n):
    """Raw reference (demo data): 400 V, a step to 500 V at 1 ms, a step down to 380 V at 4 ms
    (both faster than the slew limit), then a 5e4 V/s ramp (slower than it) to 420 V."""
    t = np.arange(n) * TS
    raw = np.full(n, 400.0)
    raw[t >= 1e-3] = 500.0
    raw[t >= 4e-3] = 380.0
    ramp = t >= 7e-3
    raw[ramp] = np.minimum(380.0 + 5e4 * (t[ramp] - 7e-3), 420.0)
    return raw


def test_design_rejects_order_below_four():
    for order in (0, 1, 3):
        with pytest.raises(ValueError, match="order"):
            design(order, POLE, TS)


@pytest.mark.parametrize("order", [4, 5, 12])
def test_value_and_derivatives_match_scipy_lsim(order):
    """Orders 4 (algebraic 4th derivative), 5 (the default) and 12 (the largest the scenario
    accepts) at the default pole and period."""
    raw = _demo_raw(260)
    s = _rate_limit(raw, SLEW, TS)
    out = _run(order, POLE, TS, SLEW, raw)
    for k in range(5):
        ref = _lsim_derivative(k, order, POLE, TS, s)
        peak = np.max(np.abs(ref))
        # Both sides discretise the same filter exactly for a piecewise-linear input, so only
        # round-off separates them. Largest difference seen: 3e-14 of the peak; 1e-11 leaves a
        # wide margin and still catches an ill-conditioned discretisation (8e-11 at order 5,
        # divergence at order 12, when expm was taken of the unscaled companion matrix).
        np.testing.assert_allclose(out[:, k], ref, rtol=0, atol=1e-11 * peak, err_msg=f"y^({k})")


def test_order_four_fourth_derivative_formula():
    """For n = 4 the 4th derivative is y'''' = w^4 (s - y) - 4 w^3 y' - 6 w^2 y'' - 4 w y''',
    the filter's ODE (s + w)^4 y = w^4 s solved for y'''' [derived]; checked with the limiter
    output s written out in the test."""
    raw = _demo_raw(260)
    s = _rate_limit(raw, SLEW, TS)
    out = _run(4, POLE, TS, SLEW, raw)
    w = POLE
    y, d1, d2, d3, d4 = out.T
    expected = w ** 4 * (s - y) - 4 * w ** 3 * d1 - 6 * w ** 2 * d2 - 4 * w * d3
    # w^4 (s - y) subtracts two ~400 V values scaled by 3e15: round-off ~3e15 * 400 * 1e-16
    # = 1e2 V/s^4 against a peak of ~1.6e16 V/s^4 (1e-14 of it seen); allow 1e-11 of the peak.
    np.testing.assert_allclose(d4, expected, rtol=0, atol=1e-11 * np.max(np.abs(d4)))
    assert np.max(np.abs(d4)) > 1e15  # the input did excite the 4th derivative


@pytest.mark.parametrize("kernel", ["compiled", "python"])
def test_step_without_rate_limit_matches_erlang_response(kernel):
    """A huge slew limit passes a 400 -> 500 V step straight to the filter. The limiter output
    then ramps over the one tick before the step tick (the hold is first order), so the exact
    response is the Erlang step response averaged over that tick:
    y(t) = 400 + 100/Ts * int_{t - t1}^{t - t0} F(tau) dtau, y' = 100/Ts (F(t - t0) - F(t - t1)),
    y'' = 100/Ts (f(t - t0) - f(t - t1)), with t0, t1 the ticks before and at the step and F, f
    the Erlang(n, w) distribution and density [derived]. The integral of F is
    x F_n(x) - (n/w) F_{n+1}(x) (integration by parts) [derived].

    Also runs the uncompiled kernel, so a failure shows a Python traceback."""
    order, k1 = 5, 10
    raw = np.full(120, 400.0)
    raw[k1:] = 500.0
    step = shape_step if kernel == "compiled" else shape_step.py_func
    out = _run(order, POLE, TS, 1e12, raw, step=step)
    t = np.arange(raw.size) * TS
    t0, t1 = (k1 - 1) * TS, k1 * TS
    F = lambda x, n=order: stats.gamma.cdf(x, n, scale=1.0 / POLE)  # noqa: E731
    f = lambda x: stats.gamma.pdf(x, order, scale=1.0 / POLE)  # noqa: E731
    integral = lambda x: np.where(x > 0, x * F(x) - order / POLE * F(x, order + 1), 0.0)  # noqa: E731
    y = 400.0 + 100.0 / TS * (integral(t - t0) - integral(t - t1))
    d1 = 100.0 / TS * (F(t - t0) - F(t - t1))
    d2 = 100.0 / TS * (f(t - t0) - f(t - t1))
    # round-off only (see test_value_and_derivatives_match_scipy_lsim): 1e-14 of each peak
    # seen, 1e-11 allowed
    for k, ref in enumerate((y, d1, d2)):
        np.testing.assert_allclose(out[:, k], ref, rtol=0, atol=1e-11 * np.max(np.abs(ref)),
                                   err_msg=f"y^({k})")


@pytest.mark.parametrize("order", [4, 5, 12])
def test_unit_dc_gain(order):
    """After a step the output settles on the new value and every derivative on zero
    (w^n/(s+w)^n has gain 1 at s = 0 [derived])."""
    raw = np.full(2000, 400.0)
    raw[5:] = 500.0
    out = _run(order, POLE, TS, SLEW, raw)
    # settled: 2000 ticks = 0.1 s, i.e. 750 time constants 1/w
    # round-off of the discrete filter's fixed point: 2e-13 V seen, 1e-10 V allowed
    assert abs(out[-1, 0] - 500.0) < 1e-10
    peaks = np.max(np.abs(out), axis=0)
    for k in range(1, 5):
        # the derivative states settle on round-off: 2e-15 of their peak seen, 1e-12 allowed
        assert abs(out[-1, k]) < 1e-12 * peaks[k], (k, out[-1, k], peaks[k])


@pytest.mark.parametrize("slew", [SLEW, 1e12])
@pytest.mark.parametrize("order", [4, 5, 12])
def test_step_does_not_overshoot(order, slew):
    """With all poles real the impulse response is non-negative, so a step response rises
    monotonically to the final value [derived] -- up and down, with and without rate limit."""
    raw = np.full(400, 400.0)
    raw[5:] = 500.0
    raw[200:] = 300.0
    y = _run(order, POLE, TS, slew, raw)[:, 0]
    up, down = y[:200], y[200:]
    eps = 1e-9  # V, round-off
    assert up.max() <= 500.0 + eps and np.all(np.diff(up) >= -eps)
    assert down.min() >= 300.0 - eps and np.all(np.diff(down) <= eps)
    assert up[-1] == pytest.approx(500.0, abs=1e-6) and down[-1] == pytest.approx(300.0, abs=1e-6)


@settings(max_examples=25, deadline=None)
@given(
    order=st.sampled_from([4, 5, 8, 12]),
    slew=st.floats(1e3, 1e7),
    segments=st.lists(st.tuples(st.floats(-1000.0, 1000.0), st.integers(1, 40)),
                      min_size=1, max_size=6),
)
def test_slope_bounded_by_slew_rate_for_any_input(order, slew, segments):
    """|y'| <= S and y within the range of the raw reference, for any piecewise-constant raw
    reference: y' is the non-negative, unit-area impulse response convolved with the limiter's
    slope, which is at most S [derived]."""
    raw = np.concatenate([np.full(n, v) for v, n in segments] + [np.full(40, segments[-1][0])])
    out = _run(order, POLE, TS, slew, raw)
    # round-off of y' is ~w |y| eps ~ 1e-9 V/s here, far below 1e-9 S (S >= 1e3 V/s)
    assert np.max(np.abs(out[:, 1])) <= slew * (1.0 + 1e-9)
    span = 1e-9 * max(1.0, np.max(np.abs(raw)))
    assert raw.min() - span <= out[:, 0].min() and out[:, 0].max() <= raw.max() + span
