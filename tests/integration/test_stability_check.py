"""The stability check before run, compare and envelope (runtime/analysis/check.py): a notice at
an unstable start, none at a stable one, and --strict makes it an error before anything runs.

The unstable start: state_feedback's declared design (400 V, 50 kW; held_point's scenarios say
``[design] defaults = "declared"``) on the demo plant started at 200 V with 100 kW, where the linearised loop's largest closed-loop |z| is above 1 (the map of
docs/analysis.md; checked here with the analysis itself and by the run's own outcome).
"""
from pathlib import Path

from hilrig.runtime.analysis import linear, point
from hilrig.runtime.scenario import load_scenario
from tests.integration.test_analyze import held_point
from tests.integration.test_cli import run_cli

ROOT = Path(__file__).resolve().parents[2]

def _write(tmp_path, name, controller, v, p, duration="20 ms"):
    """The held operating point of the analysis' SIL checks (demo plant, demo data), with its
    duration set here; v [V], p [kW]."""
    f = tmp_path / name
    f.write_text(held_point(controller, v, p * 1e3).replace('duration = "20 ms"',
                                                              f'duration = "{duration}"'))
    return f


def test_an_unstable_start_is_a_notice_and_strict_refuses_it(tmp_path):
    f = _write(tmp_path, "unstable.toml", "state_feedback", 200, 100)
    m = linear.model_at(load_scenario(f), 200.0, 100e3)
    assert point.largest_pole(m) > 1.0  # the premise, by the analysis
    out = tmp_path / "strict"
    p = run_cli("run", f, "--out", out, "--headless", "--strict")
    assert p.returncode == 2, p.stdout + p.stderr
    assert "stability check: state_feedback at 200 V, 100 kW" in p.stdout
    assert "unstable" in p.stdout and "--strict: nothing ran" in p.stdout
    assert not out.exists()
    p = run_cli("run", f, "--out", tmp_path / "run", "--headless")
    assert "notice: stability check: state_feedback at 200 V, 100 kW" in p.stdout, p.stdout
    # the run goes ahead and does not complete: the prediction holds
    assert p.returncode == 1, p.stdout + p.stderr
    assert (tmp_path / "run" / "summary.json").exists()


def test_a_stable_start_says_nothing(tmp_path):
    f = _write(tmp_path, "stable.toml", "state_feedback", 400, 50, duration="2 ms")
    p = run_cli("run", f, "--out", tmp_path / "run", "--headless", "--strict")
    assert p.returncode == 0, p.stdout + p.stderr
    assert "stability check:" not in p.stdout, p.stdout


def test_compare_and_envelope_strict_refuse_before_anything_runs(tmp_path):
    f = _write(tmp_path, "unstable.toml", "cascaded_pi", 200, 100)
    out = tmp_path / "cmp"
    p = run_cli("compare", f, "--controllers", "cascaded_pi,state_feedback", "--out", out,
                "--strict")
    assert p.returncode == 2, p.stdout + p.stderr
    assert "state_feedback at 200 V, 100 kW" in p.stdout and not out.exists()
    env = tmp_path / "env"
    p = run_cli("envelope", ROOT / "examples" / "envelope.toml", "--controllers", "state_feedback",
                "--grid", "3x3", "--out", env, "--strict", "--headless")
    assert p.returncode == 2, p.stdout + p.stderr
    assert "state_feedback: the linear analysis predicts no tracking: unstable at" in p.stdout
    assert not env.exists()
