"""Progress reporting of the CLI (shown only for runs that take longer than about a second)
and its tables of reference segments."""
import io

import numpy as np
from rich.console import Console

from hilrig.runtime import cli
class FakeClock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def _progress(monkeypatch, plain=True):
    clock = FakeClock()
    monkeypatch.setattr(cli.time, "perf_counter", clock)
    buf = io.StringIO()
    console = Console(file=buf, force_terminal=False, width=100)
    return cli._Progress(console, plain), clock, buf


def test_short_run_shows_no_progress(monkeypatch):
    prog, clock, buf = _progress(monkeypatch)
    clock.now = 0.1
    prog(50, 100)     # projected 0.2 s in all: below the one-second threshold
    clock.now = 0.2
    prog(100, 100)
    prog.close()
    assert buf.getvalue() == ""


def test_long_run_prints_plain_progress_lines(monkeypatch):
    prog, clock, buf = _progress(monkeypatch)
    clock.now = 1.0
    prog(10, 100)     # projected 10 s
    clock.now = 1.5
    prog(20, 100)     # within 2 s of the last line: no new line
    clock.now = 4.0
    prog(40, 100)
    prog.close()
    lines = buf.getvalue().splitlines()
    assert lines == ["progress: 10/100 ticks (10 %)", "progress: 40/100 ticks (40 %)"]


def _segments(tau=1e-3):
    """Demo data: hold, 50 V step, hold, 1 ms ramp of 50 V, hold, followed by a discrete
    first-order lag (time constant tau)."""
    from hilrig.runtime.trials.metrics import segment_metrics
    t = np.arange(800) * 50e-6
    r = np.interp(t, [0, 10e-3, 10e-3, 20e-3, 21e-3], [400, 400, 450, 450, 500])
    y = np.empty_like(r)
    y[0], k = r[0], 50e-6 / tau
    for i in range(1, r.size):
        y[i] = y[i - 1] + k * (r[i - 1] - y[i - 1])
    return segment_metrics(t, y, r)


def _console():
    buf = io.StringIO()
    return Console(file=buf, force_terminal=False, width=80), buf


def test_run_segments_table_shows_every_segment_whole_at_80_columns():
    segs, info = _segments()
    console, buf = _console()
    cli._segments_table(console, segs, info)
    out = buf.getvalue()
    assert "…" not in out                       # nothing cut off
    for i, g in enumerate(segs):
        assert f"{i + 1} {g['kind']}" in out
    step, ramp = segs[1], segs[3]
    assert f"{step['rise_time_s'] * 1e3:.3g}" in out and f"{ramp['lag_s'] * 1e3:.3g}" in out
    assert f"{ramp['max_abs_error_V']:.2f}" in out and "450->500" in out
    assert f"above {info['threshold_V']:.3g} V count" in out


def test_compare_segments_one_table_when_the_references_split_alike_else_one_each():
    segs_a, _ = _segments(1e-3)
    segs_b, _ = _segments(2e-3)
    console, buf = _console()
    cli._compare_segments(console, {"ctl_a": segs_a, "ctl_b": segs_b})
    out = buf.getvalue()
    assert "…" not in out
    assert "  4 ramp: t 0.02..0.021 s, v_ref 450->500 V" in out
    assert out.count("ctl_a") == out.count("ctl_b") == len(segs_a)
    for g in (segs_a[3], segs_b[3]):
        assert f"{g['lag_s'] * 1e3:.3g}" in out
    # a reference that split otherwise (a battery model follows each controller's output)
    console, buf = _console()
    cli._compare_segments(console, {"ctl_a": segs_a, "ctl_b": segs_a[:2]})
    out = buf.getvalue()
    assert "reference segments: ctl_a" in out and "reference segments: ctl_b" in out
    assert out.count("2 step") == 2 and out.count("4 ramp") == 1
