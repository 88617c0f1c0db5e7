"""Progress reporting of the CLI: shown only for runs that take longer than about a second."""
import io

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
