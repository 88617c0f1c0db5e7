"""Compiled helpers for interpolation tables shared by plugins and the runtime."""
from numba import njit


@njit(cache=True)
def interp_hold(xs, ys, x):
    """Piecewise-linear interpolation of ys over breakpoints xs, held constant outside.

    Equal consecutive breakpoints make a step: at exactly that x the later value applies.
    """
    n = xs.shape[0]
    if n == 1 or x <= xs[0]:
        if n > 1 and x == xs[0]:
            # at a step placed on the first breakpoint the later value applies
            j = 0
            while j + 1 < n and xs[j + 1] == x:
                j += 1
            return ys[j]
        return ys[0]
    if x >= xs[n - 1]:
        return ys[n - 1]
    # binary search for the last j with xs[j] <= x
    lo = 0
    hi = n - 1
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if xs[mid] <= x:
            lo = mid
        else:
            hi = mid
    x0 = xs[lo]
    x1 = xs[lo + 1]
    if x1 == x0:
        return ys[lo + 1]
    return ys[lo] + (ys[lo + 1] - ys[lo]) * (x - x0) / (x1 - x0)


@njit(cache=True)
def interp_rows(xs, ys, x, cur, out):
    """Interpolate every row of ys (m x n) at x over breakpoints xs (n), held outside.

    ``cur[0]`` keeps the segment found last time, so a caller moving forward in time pays O(1)
    per call. Equal consecutive breakpoints make a step; at exactly that x the later row applies.
    """
    n = xs.shape[0]
    m = ys.shape[0]
    j = cur[0]
    if j < 0 or j >= n:
        j = 0
    # move to the last j with xs[j] <= x (or 0 when x is before the table)
    while j > 0 and xs[j] > x:
        j -= 1
    while j + 1 < n and xs[j + 1] <= x:
        j += 1
    cur[0] = j
    if j + 1 >= n or x < xs[0]:
        for i in range(m):
            out[i] = ys[i, j]
        return
    x0 = xs[j]
    x1 = xs[j + 1]
    f = (x - x0) / (x1 - x0)
    for i in range(m):
        out[i] = ys[i, j] + (ys[i, j + 1] - ys[i, j]) * f
