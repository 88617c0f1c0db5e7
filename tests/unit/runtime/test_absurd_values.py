"""Absurd input that used to get through: a peer's 1e308 values in the overview plot, and a
recording larger than the free disk space.

1.7e308 is near the largest finite double (IEEE 754 binary64: about 1.798e308, from memory):
the difference of two such values, and an axis range spanning them, overflow to inf.
"""
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.errors import RecordingError
from hilrig.runtime.trials.plots import PLOT_LIMIT, _Shown, overview_png
from hilrig.runtime.recording import Run, check_free_space, projected_bytes

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)


def _run(folder: Path, value: float, start: int) -> Run:
    """A synthetic 200-tick run (test data): 400 V held, then the peer's value from ``start``."""
    n = 200
    t = np.arange(n) * 50e-6
    v = np.full(n, 400.0)
    v[start:] = value
    sig = {"v_out": v.copy(), "v_ref": np.full(n, 400.0), "u": np.full(n, 410.0),
           "v_dc": np.full(n, 800.0), "i_L1": v.copy(), "i_out": -v,
           "interlock_word": np.where(np.arange(n) >= max(start, 1), float(1 << 50), 0.0)}
    return Run(folder=folder, time=t, signals=sig, units={}, attrs={"title": "absurd (test data)"},
               summary={})


@pytest.mark.parametrize("value, start", [(1e308, 0), (-1e308, 0), (1.7e308, 100), (1e308, 1)])
def test_the_overview_plot_is_drawn_for_values_near_the_largest_double(tmp_path, value, start):
    run = _run(tmp_path, value, start)
    dest = overview_png(run, tmp_path / "overview.png")
    assert dest.read_bytes()[:8] == PNG_MAGIC
    # nothing lost: the recording's values are untouched by the plot
    assert run.signals["v_out"][-1] == value


def test_clipping_for_the_plot_only_and_said():
    shown = _Shown()
    x = np.array([1.0, -1.5e308, np.nan, np.inf, 2e9, 5.0])
    y = shown(x)
    assert y[0] == 1.0 and y[1] == -PLOT_LIMIT and np.isnan(y[2]) and y[3] == np.inf
    assert y[4] == PLOT_LIMIT and y[5] == 5.0
    assert x[1] == -1.5e308  # the input is not changed
    assert shown.largest == 1.5e308 and "1.5e+308" in shown.note()
    assert _Shown().note() is None


def test_a_recording_larger_than_the_free_space_is_refused_with_both_figures(tmp_path):
    # 1e5 s at Ts = 50 us is 2e9 rows; 18 signals and time, 8 bytes each: 2e9 x 19 x 8 bytes
    # = 3.04e11 bytes (arithmetic)
    assert projected_bytes(2_000_000_000, 18) == 304_000_000_000
    with pytest.raises(RecordingError) as e:
        check_free_space(tmp_path / "new" / "run", 2_000_000_000, 18, free=80_000_000_000)
    msg = str(e.value)
    assert "304.0 GB" in msg and "80.0 GB free" in msg and str(tmp_path) in msg
    assert "nothing was written" in msg and not (tmp_path / "new").exists()
    # it fits: no refusal, no notice
    assert check_free_space(tmp_path, 1000, 18, free=10**9) is None
    # gzip: the projection is an upper bound, a notice instead of a refusal
    note = check_free_space(tmp_path, 2_000_000_000, 18, "gzip", free=80_000_000_000)
    assert "304.0 GB" in note and "gzip" in note
