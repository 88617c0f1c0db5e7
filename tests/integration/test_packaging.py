"""Packaging: the wheel holds every subpackage and data file; a third-party plugin package
registered through an entry point is found and runs."""
import json
import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
TOPS = ("runtime", "plugins", "bridge", "safety")


def _pip(*args, cwd=None, timeout=600):
    p = subprocess.run([sys.executable, "-m", "pip", *args], cwd=cwd, capture_output=True,
                       text=True, timeout=timeout)
    assert p.returncode == 0, p.stdout[-2000:] + p.stderr[-2000:]
    return p


@pytest.mark.slow
def test_wheel_holds_every_subpackage_and_data_file(tmp_path):
    _pip("wheel", str(ROOT), "--no-deps", "--no-build-isolation", "-w", str(tmp_path),
         "--no-cache-dir", "-q")
    wheel = next(tmp_path.glob("hilrig-*.whl"))
    names = set(zipfile.ZipFile(wheel).namelist())
    expected = set()
    for top in TOPS:
        for f in (ROOT / top).rglob("*"):
            if "__pycache__" in f.parts or f.is_dir() or f.suffix in (".pyc", ".nbi", ".nbc"):
                continue
            if f.suffix == ".py" or f.parent.name == "data":
                expected.add("hilrig/" + f.relative_to(ROOT).as_posix())
    assert "hilrig/runtime/data/demo.toml" in expected
    missing = expected - names
    assert not missing, f"files missing from the wheel: {sorted(missing)}"
    # no bare top-level packages that would clash with other distributions
    assert not any(n.split("/")[0] in TOPS for n in names)
    ep = next(n for n in names if n.endswith("entry_points.txt"))
    text = zipfile.ZipFile(wheel).read(ep).decode()
    for group in ("[hilrig.plants]", "[hilrig.controllers]", "[hilrig.references]", "[console_scripts]"):
        assert group in text


PLUGIN_PYPROJECT = """
[build-system]
requires = ["setuptools>=64"]
build-backend = "setuptools.build_meta"
[project]
name = "hilrig-thirdparty-example"
version = "0.0.1"
[tool.setuptools]
packages = ["thirdparty_ctl"]
[project.entry-points."hilrig.controllers"]
tp_voltage_pi = "thirdparty_ctl.voltage_pi"
"""


@pytest.mark.slow
def test_third_party_plugin_package_is_found_and_runs(tmp_path):
    from tests.integration.test_plugin_example import example_files

    files = example_files()
    pkg = tmp_path / "src"
    (pkg / "thirdparty_ctl").mkdir(parents=True)
    (pkg / "pyproject.toml").write_text(PLUGIN_PYPROJECT)
    (pkg / "thirdparty_ctl" / "__init__.py").write_text("")
    (pkg / "thirdparty_ctl" / "voltage_pi.py").write_text(
        files["voltage_pi.py"].replace('name="voltage_pi"', 'name="tp_voltage_pi"'))
    target = tmp_path / "site"
    _pip("install", "--no-deps", "--no-build-isolation", "--target", str(target), str(pkg), "-q")
    env = dict(os.environ, PYTHONPATH=str(target) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "plugins", "--json"],
                       env=env, capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stderr
    names = {(d["kind"], d["name"]) for d in json.loads(p.stdout)}
    assert ("controller", "tp_voltage_pi") in names
    scen = files["example.toml"].replace('plugin = "voltage_pi.py"', 'plugin = "tp_voltage_pi"')
    (tmp_path / "tp.toml").write_text(scen)
    p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "run", str(tmp_path / "tp.toml"),
                        "--out", str(tmp_path / "run"), "--headless"],
                       env=env, capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stdout + p.stderr
    summary = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert summary["controller"] == "tp_voltage_pi" and summary["completed"]
