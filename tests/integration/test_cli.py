"""The hilrig command line, run as a user would: console script, exit codes, messages."""
import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.recording import open_run
from tests.unit.safety.test_caution import LOW_48V  # a 48 V-class scenario (test data)

HILRIG = [sys.executable, "-m", "hilrig.runtime.cli"]


def run_cli(*args, cwd=None, timeout=600):
    return subprocess.run(HILRIG + [str(a) for a in args], capture_output=True, text=True,
                          cwd=cwd, timeout=timeout, env=dict(os.environ, COLUMNS="120"))


def test_console_script_is_installed():
    script = Path(sys.executable).parent / "hilrig"
    assert script.exists()
    p = subprocess.run([str(script), "--help"], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0
    for cmd in ("demo", "run", "report", "plugins", "export"):
        assert cmd in p.stdout
    from importlib.metadata import version
    p = subprocess.run([str(script), "--version"], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0 and p.stdout.strip() == f"hilrig {version('hilrig')}"


@pytest.fixture(scope="module")
def demo_folder(tmp_path_factory):
    out = tmp_path_factory.mktemp("cli") / "demo"
    p = run_cli("demo", "--headless", "--out", out)
    assert p.returncode == 0, p.stdout + p.stderr
    return out, p.stdout


def test_demo_writes_run_folder_and_shows_caution(demo_folder):
    out, stdout = demo_folder
    for name in ("recording.h5", "summary.json", "scenario.toml", "overview.png"):
        assert (out / name).is_file(), name
    # high-voltage caution above 60 V DC (ISO 6469-3 voltage class B)
    assert "WARNING: HAZARDOUS VOLTAGE" in stdout and "CAUTION" not in stdout
    assert "not safety-rated" in stdout.replace("\n", " ").replace("NOT", "not")
    assert "demo data" in stdout
    assert "RMS tracking error" in stdout
    # every reference segment of summary.json has its row in the segments table
    segs = json.loads((out / "summary.json").read_text())["segments"]
    assert "reference segments" in stdout and len(segs) > 1
    for i, g in enumerate(segs):
        assert f"{i + 1} {g['kind']}" in stdout


def test_report_json_and_export_csv(demo_folder, tmp_path):
    out, _ = demo_folder
    p = run_cli("report", out, "--json")
    assert p.returncode == 0, p.stderr
    summary = json.loads(p.stdout)
    assert summary["completed"] and summary["demo_data"] is True
    dest = tmp_path / "rec.csv"
    p = run_cli("export", out, "--csv", "--out", dest)
    assert p.returncode == 0, p.stderr
    run = open_run(out)
    with open(dest) as fh:
        header = next(csv.reader(fh))
    assert header[0] == "time [s]" and "v_out [V]" in header and "u [V]" in header
    data = np.loadtxt(dest, delimiter=",", skiprows=1)
    assert data.shape == (run.time.shape[0], len(run.signals) + 1)
    # %.17g round-trips IEEE 754 double precision exactly (IEEE 754-2008, clause 5.12.2)
    j = header.index("v_out [V]")
    assert np.array_equal(data[:, j], run.signals["v_out"])
    # exporting again to an existing foreign file is refused, nothing overwritten
    before = dest.read_bytes()
    p = run_cli("export", out, "--csv", "--out", dest)
    assert p.returncode == 2 and "nothing was overwritten" in p.stdout
    assert dest.read_bytes() == before


def test_plugins_json_schema():
    p = run_cli("plugins", "--json")
    assert p.returncode == 0, p.stderr
    items = json.loads(p.stdout)
    kinds = {(d["kind"], d["name"]) for d in items}
    assert {("plant", "two_stage_lc"), ("plant", "single_lc"), ("controller", "cascaded_pi"),
            ("reference", "profile"), ("reference", "battery_ecm")} <= kinds
    for d in items:
        assert set(d) >= {"kind", "name", "summary", "params"}
        for prm in d["params"]:
            assert set(prm) >= {"name", "unit", "default", "min", "max", "description"}
    l1 = next(q for d in items if d["name"] == "two_stage_lc" for q in d["params"] if q["name"] == "L1")
    assert l1["unit"] == "H" and l1["default"] == pytest.approx(150e-6)


def test_bad_scenario_is_one_message_no_traceback(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[plant]\nplugin = "two_stage_lc"\nL1 = "-200 uH"\n')
    p = run_cli("run", bad, "--out", tmp_path / "r", "--headless")
    assert p.returncode == 2
    assert "Traceback" not in p.stdout + p.stderr
    assert "bad.toml: plant.L1 = -0.0002 H is outside (0, 1] H" in p.stdout
    assert not (tmp_path / "r").exists()


@pytest.mark.parametrize("extra, key", [
    ('[[faults]]\nkind = "nan_output"\nstart = "2 s"\n', "faults[0].start = 2 s"),
    ('resets = ["0.3 s"]\n', "resets[0] = 0.3 s"),
], ids=["fault", "reset"])
def test_a_fault_or_reset_after_the_end_of_the_run_is_a_scenario_error(tmp_path, extra, key):
    # it would never act, yet summary.json would list the fault as active from its start
    bad = tmp_path / "late.toml"
    bad.write_text(extra + LOW_48V if extra.startswith("resets") else LOW_48V + extra)
    p = run_cli("run", bad, "--out", tmp_path / "r", "--headless")
    assert p.returncode == 2, p.stdout + p.stderr
    assert "Traceback" not in p.stdout + p.stderr
    msg = " ".join(p.stdout.split())
    assert (f"late.toml: {key} is after the run's last tick at 0.03995 s "
            f"(timing.duration = 0.04 s at Ts = 5e-05 s)") in msg
    assert not (tmp_path / "r").exists()


def test_a_48_v_scenario_has_no_caution_and_its_remote_bridge_no_high_voltage_refusal(tmp_path):
    """60 V DC: the top of voltage class A (ISO 6469-3, from memory). The cascaded PI's default
    command clamp (10 kV) is not a voltage on any equipment; a value the scenario sets is."""
    low = tmp_path / "low.toml"
    low.write_text(LOW_48V)
    remote = ["--bridge", "tcp://192.0.2.1:47810", "--allow-remote", "--out", tmp_path / "r",
              "--headless"]
    p = run_cli("run", low, *remote)
    # refused only by the next check: a remote ZeroMQ peer needs CurveZMQ keys
    assert p.returncode == 2 and "needs CurveZMQ keys" in p.stdout, p.stdout + p.stderr
    assert "WARNING" not in p.stdout and "CAUTION" not in p.stdout \
        and "--acknowledge-high-voltage" not in p.stdout
    high = tmp_path / "high.toml"
    high.write_text(LOW_48V.replace('plugin = "cascaded_pi"\n', 'plugin = "cascaded_pi"\nu_max = "100 V"\n'))
    p = run_cli("run", high, *remote)
    assert p.returncode == 2 and "--acknowledge-high-voltage" in p.stdout, p.stdout + p.stderr
    assert "WARNING: HAZARDOUS VOLTAGE" in p.stdout
    assert "controller.u_max = 100 V" in " ".join(p.stdout.split())
    assert not (tmp_path / "r").exists()


def test_missing_files_are_clear(tmp_path):
    p = run_cli("run", tmp_path / "nope.toml", "--headless")
    assert p.returncode == 2 and "does not exist" in p.stdout and "Traceback" not in p.stderr
    p = run_cli("report", tmp_path)
    assert p.returncode == 2 and "no recording" in p.stdout


def test_set_override_and_refuse_overwrite(demo_folder, tmp_path):
    out, _ = demo_folder
    p = run_cli("run", out / "scenario.toml", "--out", out, "--headless")
    assert p.returncode == 2 and "nothing was overwritten" in p.stdout
    p = run_cli("run", out / "scenario.toml", "--out", tmp_path / "short", "--headless",
                "--set", 'timing.duration="0.05 s"')
    assert p.returncode == 0, p.stdout + p.stderr
    s = json.loads((tmp_path / "short" / "summary.json").read_text())
    assert s["ticks_run"] == 1000
