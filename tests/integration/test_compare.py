"""hilrig compare: the same scenario with several controllers, one table, overlaid plots."""
import json
import subprocess
import sys
from pathlib import Path

import pytest

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from hilrig.runtime.compare import JSON_KEYS, compare, folder_name

ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "examples" / "step_100V.toml"


def test_compare_cli_json_folders_and_plots(tmp_path):
    out = tmp_path / "cmp"
    p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "compare", str(SCENARIO),
                        "--controllers", "cascaded_pi,flatness", "--out", str(out), "--json",
                        "--set", 'timing.duration="25 ms"'],
                       capture_output=True, text=True, timeout=900)
    assert p.returncode == 0, p.stderr
    res = json.loads(p.stdout)
    assert list(res) == ["cascaded_pi", "flatness"]
    for name, m in res.items():
        assert set(m) == set(JSON_KEYS)
        assert (out / name / "recording.h5").is_file() and (out / name / "summary.json").is_file()
        assert m["trips"] == 0
        # 100 V step at 50 kW: sub-millisecond 10-90 % rise is expected of a battery emulator
        # (common practice, no source)
        assert m["rise_time_s"] < 1e-3
        # every segment of the reference, the step's being the table's step columns
        assert [g["kind"] for g in m["segments"]] == ["hold", "step", "hold"]
        assert m["segments"][1]["rise_time_s"] == m["rise_time_s"]
    for png in ("compare_v_out.png", "compare_error.png", "compare_u.png"):
        assert (out / png).stat().st_size > 1000
        # each folder's scenario.toml is the scenario that ran: its controller, the override
        ran = tomllib.loads((out / name / "scenario.toml").read_text())
        assert ran["controller"]["plugin"] == name
        assert ran["timing"]["duration"] == "25 ms"
        assert json.loads((out / name / "summary.json").read_text())["controller"] == name
    saved = json.loads((out / "comparison.json").read_text())
    assert saved["flatness"]["rise_time_s"] == res["flatness"]["rise_time_s"]


def test_compare_checks_every_candidate_before_running(tmp_path):
    with pytest.raises(Exception, match="no controller plugin named 'flatnes'; did you mean flatness"):
        compare(SCENARIO, ["cascaded_pi", "flatnes"], tmp_path / "x")
    assert not (tmp_path / "x").exists()
    with pytest.raises(ValueError, match="names a controller twice"):
        compare(SCENARIO, ["flatness", "flatness"], tmp_path / "y")


def test_folder_names():
    assert folder_name("flatness") == "flatness"
    assert folder_name("/some/where/my ctrl.py") == "my_ctrl"
