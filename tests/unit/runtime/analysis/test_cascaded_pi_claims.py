"""The cascaded PI controller's documented stability figures (plugins/controllers/cascaded_pi.py
docstring) measured with the analysis on the shipped demo plant (demo.toml, two_stage_lc).

The claims are the project's own; what checks them from outside is the stability test itself:
a sampled loop is stable iff every closed-loop eigenvalue lies inside the unit circle
(Franklin, Powell, Workman, Digital Control of Dynamic Systems, 3rd ed., 1998, ch. 4, from
memory), and test_against_python_control.py shows eig(m.Acl) equal to python-control's.
"""
import numpy as np
import pytest

from hilrig.runtime.analysis import linear, point

from .loops import prepared


@pytest.fixture(scope="module")
def demo_pi():
    # the declared numbers, which the docstring's figures are about (a scenario's defaults are
    # otherwise designed for its plant and range: docs/plugins.md)
    prep = prepared("demo", "cascaded_pi", 0.0, (("design__defaults", "declared"),))
    return prep, linear.kernels(prep)


def test_largest_pole_over_the_design_range(demo_pi):
    # docstring: "largest closed-loop eigenvalue magnitude ... over 300-500 V and -40..80 kW on
    # the demo plant: it is 0.89-0.92 there". An 11 x 13 grid (every other point of the
    # 21 x 25 grid the figure was measured on, corners included): measured 0.8946-0.9213,
    # the claim to its two decimals.
    prep, k = demo_pi
    top = [point.largest_pole(linear.linearize(prep, v, p, k))
           for v in np.linspace(300.0, 500.0, 11) for p in np.linspace(-40e3, 80e3, 13)]
    assert 0.885 <= min(top) < 0.90
    assert 0.91 < max(top) < 0.925


def _boundary(prep, k, p_load, lo, hi, tol=0.25):
    """The output voltage [V] below which the loop is unstable at p_load, by bisection on the
    largest pole (lo unstable, hi stable)."""
    def unstable(v):
        return point.largest_pole(linear.linearize(prep, v, p_load, k)) >= 1.0

    assert unstable(lo) and not unstable(hi)
    while hi - lo > tol:
        mid = 0.5 * (lo + hi)
        if unstable(mid):
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


@pytest.mark.parametrize("p_load,claimed,lo,hi", [(100e3, 250.0, 170.0, 400.0),
                                                   (50e3, 180.0, 120.0, 400.0)])
def test_where_the_loop_loses_stability(demo_pi, p_load, claimed, lo, hi):
    # docstring: "loses stability below about 250 V at 100 kW or about 180 V at 50 kW";
    # measured 251.6 V and 177.9 V. Within +-10 % of the claim.
    prep, k = demo_pi
    v = _boundary(prep, k, p_load, lo, hi)
    assert abs(v - claimed) <= 0.1 * claimed, v
    # and stable just above, unstable just below (the boundary is a crossing, not a point
    # without a steady state)
    assert point.largest_pole(linear.linearize(prep, v + 1.0, p_load, k)) < 1.0
    assert point.largest_pole(linear.linearize(prep, v - 1.0, p_load, k)) > 1.0
