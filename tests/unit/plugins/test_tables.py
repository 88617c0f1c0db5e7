"""Interpolation tables against numpy.interp (general-purpose reference library).

``numpy.interp`` requires strictly increasing breakpoints, so a table with steps (equal
consecutive breakpoints) is checked piece by piece: the table is split at its steps into strictly
increasing pieces, and x is looked up with ``numpy.interp`` in the piece it falls in; exactly on a
step the later piece applies (right-continuous, the rule the tables document).
"""
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from hilrig.plugins.tables import interp_hold, interp_rows

# Both implementations evaluate y0 + dy * (x - x0) / dx, numpy in a different order of operations
# (slope first), so they may differ by a few ulp of the largest |y|; 1e-12 relative covers that.
RTOL = 1e-12


def _pieces(xs, ys):
    """Split a table at its steps into strictly increasing pieces (lists of (xs, ys))."""
    cuts = [0] + [j + 1 for j in range(len(xs) - 1) if xs[j + 1] == xs[j]] + [len(xs)]
    return [(xs[a:b], ys[a:b]) for a, b in zip(cuts[:-1], cuts[1:])]


def _reference(xs, ys, x):
    """numpy.interp in the piece that x falls in; the later piece from a step on."""
    pieces = _pieces(xs, ys)
    chosen = pieces[0]
    for px, py in pieces[1:]:
        if x >= px[0]:
            chosen = (px, py)
    return float(np.interp(x, chosen[0], chosen[1]))


@st.composite
def tables(draw, allow_steps):
    """Random tables: 1 to 8 rows, gaps in [1e-3, 10] (or 0 for a step), values in +-1e3."""
    n = draw(st.integers(1, 8))
    x0 = draw(st.floats(-100.0, 100.0))
    gap = st.floats(1e-3, 10.0)
    if allow_steps:
        gap = st.one_of(gap, st.just(0.0))
    gaps = draw(st.lists(gap, min_size=n - 1, max_size=n - 1))
    xs = x0 + np.concatenate(([0.0], np.cumsum(gaps)))
    ys = np.array(draw(st.lists(st.floats(-1e3, 1e3), min_size=n, max_size=n)))
    return xs, ys


@st.composite
def tables_and_queries(draw, allow_steps):
    """A table and 1 to 12 query points: on breakpoints, between them and outside the table,
    in random order, so a cursor has to move both forwards and backwards."""
    xs, ys = draw(tables(allow_steps))
    near = st.floats(float(xs[0]) - 5.0, float(xs[-1]) + 5.0)
    on = st.sampled_from([float(v) for v in xs])
    qs = draw(st.lists(st.one_of(near, on), min_size=1, max_size=12))
    return xs, ys, qs


def _close(a, b, ys):
    return abs(a - b) <= RTOL * max(1.0, float(np.max(np.abs(ys))))


@settings(max_examples=60, deadline=None)
@given(tables_and_queries(allow_steps=False))
def test_interp_hold_matches_numpy_interp(case):
    xs, ys, qs = case
    for x in qs:
        # reference: numpy.interp, which holds the end values outside the table as we do
        assert _close(interp_hold(xs, ys, x), float(np.interp(x, xs, ys)), ys), x


@settings(max_examples=60, deadline=None)
@given(tables_and_queries(allow_steps=True))
def test_interp_hold_with_steps_matches_numpy_interp_by_piece(case):
    xs, ys, qs = case
    for x in qs:
        assert _close(interp_hold(xs, ys, x), _reference(xs, ys, x), ys), x


@settings(max_examples=60, deadline=None)
@given(tables_and_queries(allow_steps=True), st.integers(-2, 10))
def test_interp_rows_cursor_forwards_and_backwards(case, cur0):
    """The remembered segment must never change the result, whichever way x moves and whatever
    (even out-of-range) cursor the caller starts from."""
    xs, ys, qs = case
    rows = np.vstack((ys, -0.5 * ys + 3.0, np.arange(ys.size, dtype=float)))
    cur = np.array([cur0], dtype=np.int64)
    out = np.empty(3)
    for x in qs:
        interp_rows(xs, rows, x, cur, out)
        for i in range(3):
            assert _close(out[i], _reference(xs, rows[i], x), rows[i]), (x, i)
        assert 0 <= cur[0] < xs.size


def test_step_later_value_applies_exactly_at_the_step():
    """Hand-made table: step on the first breakpoint, a double step inside, step on the last."""
    xs = np.array([0.0, 0.0, 1.0, 2.0, 2.0, 2.0, 3.0, 3.0])
    ys = np.array([10.0, 20.0, 30.0, 40.0, 50.0, 60.0, 70.0, 80.0])
    # values read off the table by hand: at a step the last row with that x applies
    expected = {-1.0: 10.0, 0.0: 20.0, 0.5: 25.0, 1.0: 30.0, 1.5: 35.0, 2.0: 60.0, 2.5: 65.0,
                3.0: 80.0, 4.0: 80.0}
    cur = np.zeros(1, dtype=np.int64)
    out = np.empty(1)
    # forwards, then backwards over the same points
    order = sorted(expected) + sorted(expected, reverse=True)
    for x in order:
        assert interp_hold(xs, ys, x) == expected[x], x
        interp_rows(xs, ys[None, :], x, cur, out)
        assert out[0] == expected[x], x
    # just before a step the earlier side still applies (ramp 30 -> 40 on [1, 2])
    x = np.nextafter(2.0, 0.0)
    assert interp_hold(xs, ys, x) == pytest.approx(40.0, rel=1e-12)


@pytest.mark.parametrize("fn", ["compiled", "python"])
def test_single_row_table_holds_everywhere(fn):
    """A one-row table is a constant (numpy.interp behaves the same); also run uncompiled so a
    failure here shows a Python traceback."""
    hold = interp_hold if fn == "compiled" else interp_hold.py_func
    rows = interp_rows if fn == "compiled" else interp_rows.py_func
    xs = np.array([2.0])
    ys = np.array([7.5])
    cur = np.zeros(1, dtype=np.int64)
    out = np.empty(1)
    for x in (-1.0, 2.0, 5.0):
        assert hold(xs, ys, x) == np.interp(x, xs, ys) == 7.5
        rows(xs, ys[None, :], x, cur, out)
        assert out[0] == 7.5
