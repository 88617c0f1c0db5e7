"""Voltage reference from a piecewise-linear table: steps, ramps and any profile.

.. math::

    v_{ref}(t) = v_j + (v_{j+1} - v_j)\\,\\frac{t - t_j}{t_{j+1} - t_j}, \\quad t_j \\le t < t_{j+1}

held at the first and last value outside the table. Two rows with the same time make a step
(the later row applies from that instant). Units: t [s], v [V].
"""
import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, TableParam, table_array
from hilrig.plugins.tables import interp_hold


def _build(values, ctx):
    tab = table_array(values["points"])
    n = tab.shape[0]
    return np.concatenate(([float(n)], tab[:, 0], tab[:, 1]))


DECLARATION = Declaration(
    kind="reference",
    name="profile",
    summary="Piecewise-linear voltage profile (steps where two rows share a time, ramps between rows)",
    params=(
        TableParam("points", (("t", "s"), ("v", "V")),
                   ((0.0, 400.0), (0.01, 400.0), (0.01, 500.0)),
                   "rows [t, v]: times non-decreasing; equal times make a step",
                   allow_equal_first=True, min_rows=1,
                   column_bounds=((0.0, 1e9, False), (-1e5, 1e5, False))),
    ),
    states=(),
    reads=(),
    source="piecewise-linear interpolation (common practice, no source)",
    build=_build,
)


@njit(cache=True)
def init(p, xr, y):
    pass


@njit(cache=True)
def step(t, dt, p, xr, y, w):
    n = int(p[0])
    w[0] = interp_hold(p[1:1 + n], p[1 + n:1 + 2 * n], t)
