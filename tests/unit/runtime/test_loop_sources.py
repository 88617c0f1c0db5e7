"""The loop cache's key covers the sources that compiled code depends on, and only those."""
from pathlib import Path

from hilrig.runtime import loop, registry


def test_the_key_covers_compiled_code_and_leaves_out_trials_live_analysis_and_cli():
    plugins = [registry.load("plant", "two_stage_lc"), registry.load("controller", "cascaded_pi"),
               registry.load("reference", "profile")]
    files = {Path(f).as_posix() for f in loop._sources(plugins)}
    ends = lambda tail: any(f.endswith(tail) for f in files)  # noqa: E731
    for needed in ("runtime/loop.py", "runtime/sensors.py", "runtime/shaping.py",
                   "runtime/borrow.py", "runtime/clock.py", "safety/interlocks.py",
                   "safety/faults.py", "bridge/wire.py", "plugins/tables.py",
                   "plugins/plants/two_stage_lc.py", "plugins/controllers/cascaded_pi.py"):
        assert ends(needed), needed
    for left_out in ("runtime/cli.py", "runtime/trials/report.py", "runtime/live/paced.py",
                     "runtime/analysis/linear.py"):
        assert not ends(left_out), left_out
    # and no compiled code lives in the parts left out
    root = Path(loop.__file__).resolve().parent
    for part in loop._NOT_COMPILED:
        for f in ([root / part] if part.endswith(".py") else (root / part).rglob("*.py")):
            assert "njit" not in f.read_text() and "@jit" not in f.read_text(), f
