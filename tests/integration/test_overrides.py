"""The record tells the truth about --set overrides: an override a candidate cannot take is
listed as not applied (or refused before anything runs), never listed as applied.

The record is checked from outside hilrig's own bookkeeping: the recorded scenario.toml is read
with Python's standard TOML reader (tomllib), and whether an override acted is decided by the
recordings themselves (h5py): a candidate that did not take it records bit for bit the run it
records without it, one that took it records another (common practice, no source).

Uses only plugin combinations the other tests compile already (two_stage_lc with a profile
reference and cascaded_pi, flatness or state_feedback), and runs of a few milliseconds.
"""
import json
from pathlib import Path

import h5py
import numpy as np
import pytest

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from hilrig.runtime import cli
from hilrig.runtime.errors import ScenarioError

ROOT = Path(__file__).resolve().parents[2]
STEP = ROOT / "examples" / "step_100V.toml"
# 12 ms: the step at 10 ms is inside the run, so that different controllers give different
# recordings (before it the plant rests at its equilibrium under any of them)
SHORT = "timing.duration=0.012"
METHOD = 'controller.method="place"'
NOT_TAKEN = "controller flatness has no parameter 'method'"


@pytest.fixture
def sf_scenario(tmp_path):
    """The demo step scenario with state_feedback as its own controller (state_feedback
    declares `method`, flatness and cascaded_pi do not)."""
    text = STEP.read_text()
    assert 'plugin = "cascaded_pi"' in text
    path = tmp_path / "sf.toml"
    path.write_text(text.replace('plugin = "cascaded_pi"', 'plugin = "state_feedback"'))
    return path


def header(path: Path) -> tuple[list[str], list[str]]:
    """The override lines of a recorded scenario.toml's header: (applied, not applied)."""
    applied, skipped, part = [], [], None
    for line in path.read_text().splitlines():
        if not line.startswith("#"):
            break
        if "overrides applied" in line:
            part = applied
        elif "overrides NOT applied" in line:
            part = skipped
        elif line.startswith("#   ") and part is not None:
            part.append(line[4:])
    return applied, skipped


def v_out(folder: Path) -> np.ndarray:
    with h5py.File(folder / "recording.h5", "r") as f:
        return f["signals/v_out"][()]


def test_compare_lists_a_controller_parameter_as_applied_only_where_it_acted(
        sf_scenario, tmp_path, capsys):
    out = tmp_path / "cmp"
    argv = ["compare", str(sf_scenario), "--controllers", "state_feedback,flatness",
            "--set", SHORT]
    assert cli.main(argv + ["--set", METHOD, "--out", str(out)]) == 0
    printed = " ".join(capsys.readouterr().out.split())
    # one notice before the runs start
    assert printed.index(f"notice: override controller.method is not applied to flatness "
                         f"({NOT_TAKEN}); applied to state_feedback") \
        < printed.index("running state_feedback")

    # state_feedback takes it: listed as applied, and in the scenario that ran
    applied, skipped = header(out / "state_feedback" / "scenario.toml")
    assert 'controller.method = "place"' in applied and skipped == []
    ran = tomllib.loads((out / "state_feedback" / "scenario.toml").read_text())
    assert ran["controller"] == {"plugin": "state_feedback", "method": "place"}
    s = json.loads((out / "state_feedback" / "summary.json").read_text())
    assert {"key": "controller.method", "value": '"place"'} in s["overrides"]["applied"]
    assert s["overrides"]["not_applied"] == []

    # flatness does not: never listed as applied, listed as not applied with the reason
    applied, skipped = header(out / "flatness" / "scenario.toml")
    assert not any(a.startswith("controller.method") for a in applied), applied
    assert skipped == [f'controller.method = "place": {NOT_TAKEN}']
    ran = tomllib.loads((out / "flatness" / "scenario.toml").read_text())
    assert ran["controller"] == {"plugin": "flatness"}
    s = json.loads((out / "flatness" / "summary.json").read_text())
    assert "controller.method" not in [a["key"] for a in s["overrides"]["applied"]]
    assert s["overrides"]["not_applied"] == [
        {"key": "controller.method", "value": '"place"', "reason": NOT_TAKEN}]
    saved = json.loads((out / "comparison.json").read_text())
    assert saved["flatness"]["overrides"] == s["overrides"]

    # the report shows the recorded header, so it says the same
    from hilrig.runtime.recording import open_run
    from hilrig.runtime.trials.report import write_report
    report = write_report(open_run(out / "flatness")).read_text()
    assert f'controller.method = "place": {NOT_TAKEN}' in report

    # and the record is true: without the override flatness runs bit for bit the same, while
    # state_feedback's run changes (the override acted there)
    plain = tmp_path / "plain"
    assert cli.main(argv + ["--out", str(plain), "--json"]) == 0
    capsys.readouterr()
    assert np.array_equal(v_out(out / "flatness"), v_out(plain / "flatness"))
    assert not np.array_equal(v_out(out / "state_feedback"), v_out(plain / "state_feedback"))
    s = json.loads((plain / "flatness" / "summary.json").read_text())
    assert s["overrides"]["not_applied"] == []


def test_an_override_no_candidate_takes_is_refused_before_anything_runs(sf_scenario, tmp_path,
                                                                        capsys):
    # the scenario's own controller (state_feedback) has `method`, but neither candidate does
    out = tmp_path / "cmp"
    assert cli.main(["compare", str(sf_scenario), "--controllers", "cascaded_pi,flatness",
                     "--set", METHOD, "--set", SHORT, "--out", str(out)]) == 2
    text = " ".join(capsys.readouterr().out.split())
    assert text.startswith("error: sf.toml: unknown key 'controller.method' (an override): no "
                           "candidate controller has a parameter 'method' (cascaded_pi has "
                           "Kp_v, Ki_v,"), text
    assert "; flatness has pole, pole_int," in text and "Traceback" not in text
    assert "WARNING" not in text  # refused before the caution and the runs
    assert not out.exists()
    # the same for the envelope: nothing written
    out = tmp_path / "map"
    assert cli.main(["envelope", str(sf_scenario), "--controllers", "cascaded_pi,flatness",
                     "--grid", "1x1", "--v-range", "450:450", "--p-range", "0:0",
                     "--set", METHOD, "--out", str(out)]) == 2
    text = " ".join(capsys.readouterr().out.split())
    assert "unknown key 'controller.method' (an override): no candidate controller" in text
    assert not out.exists()


def test_run_with_an_override_its_controller_cannot_take_is_refused(tmp_path, capsys):
    out = tmp_path / "run"
    assert cli.main(["run", str(STEP), "--set", METHOD, "--set", SHORT, "--out", str(out)]) == 2
    text = " ".join(capsys.readouterr().out.split())
    assert text.startswith("error: step_100V.toml: unknown key 'controller.method' (an "
                           "override): controller cascaded_pi has no parameter 'method' (its "
                           "parameters: Kp_v, Ki_v,"), text
    assert not out.exists()


def test_an_envelope_cell_refuses_an_override_its_controller_cannot_take(tmp_path, capsys):
    # the scenario's own controller is cascaded_pi; the cell runs flatness, which has no Kp_v:
    # it used to run with Kp_v dropped and listed as applied
    out = tmp_path / "cell"
    assert cli.main(["envelope", str(STEP), "--cell", "450,0", "--controllers", "flatness",
                     "--set", "controller.Kp_v=3", "--set", SHORT, "--out", str(out)]) == 2
    text = " ".join(capsys.readouterr().out.split())
    assert "unknown key 'controller.Kp_v' (an override): no candidate controller has a " \
           "parameter 'Kp_v'" in text and "flatness has pole," in text, text
    assert not out.exists()


def test_envelope_plans_each_candidates_overrides(sf_scenario):
    """No runs: the plan the envelope and compare build their candidates from."""
    from hilrig.runtime.scenario import plan_candidates
    base, plans = plan_candidates(sf_scenario, {"controller.method": "place",
                                                "timing.duration": 0.012},
                                  ["state_feedback", "flatness"])
    assert base.duration == 0.012
    assert plans["state_feedback"].scenario.controller.values["method"] == "place"
    assert plans["state_feedback"].not_applied == []
    assert list(plans["flatness"].overrides) == ["timing.duration", "controller"]
    assert plans["flatness"].not_applied == [
        {"key": "controller.method", "value": '"place"', "reason": NOT_TAKEN}]
    # the candidates are the command's: an override cannot name one
    for k, v in (("controller.plugin", "flatness"), ("controller", {"plugin": "flatness"})):
        with pytest.raises(ScenarioError, match=f"override '{k}': the candidate controllers are "
                                                f"chosen with --controllers"):
            plan_candidates(sf_scenario, {k: v}, ["state_feedback", "flatness"])


def test_envelope_lists_a_controller_parameter_as_not_applied_where_it_cannot_act(
        sf_scenario, tmp_path):
    import subprocess
    import sys
    out = tmp_path / "map"
    p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "envelope", str(sf_scenario),
                        "--controllers", "state_feedback,flatness", "--grid", "1x2",
                        "--v-range", "450:450", "--p-range", "0:300e3", "--workers", "1",
                        "--set", METHOD, "--set", SHORT, "--out", str(out), "--json"],
                       capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stdout + p.stderr
    # the notice on standard error (standard output holds the JSON alone), before the map
    assert (f"notice: override controller.method is not applied to flatness ({NOT_TAKEN}); "
            f"applied to state_feedback") in " ".join(p.stderr.split())
    doc = json.loads(p.stdout)
    assert doc["flatness"]["overrides"]["not_applied"] == [
        {"key": "controller.method", "value": '"place"', "reason": NOT_TAKEN}]
    assert "controller.method" not in [a["key"] for a in doc["flatness"]["overrides"]["applied"]]
    assert {"key": "controller.method", "value": '"place"'} in \
        doc["state_feedback"]["overrides"]["applied"]
    assert doc["state_feedback"]["overrides"]["not_applied"] == []
    # a worst cell's rerun command gives its controller only what it takes (at 300 kW the
    # cell does not track, so each candidate has a worst cell), and reruns as a normal run
    import shlex
    for c in ("state_feedback", "flatness"):
        command = doc[c]["worst"]["command"]
        assert ("controller.method" in command) == (c == "state_feedback"), command
        words = shlex.split(command)
        assert words[:2] == ["hilrig", "run"]
        assert cli.main(words[1:] + ["--out", str(tmp_path / c), "--headless"]) in (0, 1)
        s = json.loads((tmp_path / c / "summary.json").read_text())
        assert s["controller"] == c and s["overrides"]["not_applied"] == []
        assert ({"key": "controller.method", "value": '"place"'} in s["overrides"]["applied"]) \
            == (c == "state_feedback")
