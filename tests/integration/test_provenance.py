"""Traceable run records: every plugin's origin, source hashes, version and resolved parameters
(defaults included, with units) in summary.json, the recording's attributes and report.md.

Outside references: the source hashes are recomputed with Python's hashlib (sha256, FIPS 180-4)
from the files Python's import system finds for the plugin modules; a table's hash from the
scenario's own numbers packed as little-endian float64 with the struct module."""
import hashlib
import importlib.util
import json
import struct
import subprocess
from pathlib import Path

import pytest

from hilrig.plugins.base import ChoiceParam, Param, TableParam
from hilrig.runtime import registry
from hilrig.runtime.recording import open_run
from tests.integration.standin import CLI

ROOT = Path(__file__).resolve().parents[2]
STEP = ROOT / "examples" / "step_100V.toml"  # two_stage_lc + cascaded_pi + profile
FOUR = ROOT / "examples" / "units" / "four_units.toml"


def _sha(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _module_file(module: str) -> str:
    return importlib.util.find_spec(module).origin


def _run(scen: Path, out: Path, *sets: str) -> dict:
    argv = CLI + ["run", str(scen), "--out", str(out), "--headless"]
    for s in sets:
        argv += ["--set", s]
    p = subprocess.run(argv, capture_output=True, text=True, timeout=900)
    assert p.returncode == 0, p.stdout[-3000:] + p.stderr[-3000:]
    return json.loads((out / "summary.json").read_text())


@pytest.fixture(scope="module")
def step_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("prov") / "run"
    s = _run(STEP, out, 'timing.duration="20 ms"', 'plant.R2="4 mohm"', 'controller.I_max="500 A"')
    return out, s


def test_every_plugin_with_its_source_hash_version_and_every_parameter(step_run):
    _, s = step_run
    prov = s["provenance"]
    by_role = {e["role"]: e for e in prov["plugins"]}
    assert set(by_role) == {"plant", "controller", "reference"}
    for role, name, module in (("plant", "two_stage_lc", "hilrig.plugins.plants.two_stage_lc"),
                               ("controller", "cascaded_pi", "hilrig.plugins.controllers.cascaded_pi"),
                               ("reference", "profile", "hilrig.plugins.references.profile")):
        e = by_role[role]
        assert e["name"] == name and e["origin"] == module and e["origin_kind"] == "entry point"
        # a built-in is installed with hilrig: its version is hilrig's
        assert e["version"] == s["versions"]["hilrig"]
        assert e["sources"] == [{"role": "plugin module", "file": _module_file(module),
                                 "sha256": _sha(_module_file(module))}]
        # every declared parameter, with the unit its declaration gives
        decl = registry.load(role, name).declaration
        params = {q["name"]: q for q in e["parameters"]}
        assert list(params) == [q.name for q in decl.params]
        for q in decl.params:
            rec = params[q.name]
            if isinstance(q, Param):
                assert rec["unit"] == q.unit and isinstance(rec["value"], float)
            elif isinstance(q, ChoiceParam):
                assert rec["unit"] == "-"
            elif isinstance(q, TableParam):
                assert rec["unit"] == " | ".join(f"{c} [{u}]" for c, u in q.columns)
            assert rec["set"] in ("given", "default", "designed")
    plant = {q["name"]: q for q in by_role["plant"]["parameters"]}
    # the scenario gives no plant value: the defaults, marked so; the override is given
    assert plant["R2"] == {"name": "R2", "value": 4e-3, "unit": "ohm", "set": "given"}
    assert plant["L1"] == {"name": "L1", "value": 150e-6, "unit": "H", "set": "default"}
    assert plant["V_dc"]["set"] == "default" and plant["V_dc"]["value"] == 800.0
    ctrl = {q["name"]: q for q in by_role["controller"]["parameters"]}
    assert ctrl["I_max"] == {"name": "I_max", "value": 500.0, "unit": "A", "set": "given"}
    # the design from the plant sets what the scenario leaves out: those are marked designed,
    # and each carries the value the run summary reports for the controller
    for n in s["design"]["designed"]:
        assert ctrl[n]["set"] == "designed", n
    for n, v in s["controller_values"].items():
        if n in ctrl and isinstance(v, float):
            assert ctrl[n]["value"] == v, n
    # the profile's table: shape and hash of its rows (0, 400 V), (10 ms, 400 V), (10 ms, 500 V)
    pts = {q["name"]: q for q in by_role["reference"]["parameters"]}["points"]
    rows = struct.pack("<6d", 0.0, 400.0, 0.01, 400.0, 0.01, 500.0)
    assert pts["shape"] == [3, 2] and pts["set"] == "given"
    assert pts["sha256"] == hashlib.sha256(rows).hexdigest()


def test_recording_attribute_equals_the_summary_entry(step_run):
    out, s = step_run
    run = open_run(out)
    assert json.loads(run.attrs["provenance"]) == s["provenance"]


def test_report_shows_what_ran(step_run):
    out, s = step_run
    p = subprocess.run(CLI + ["report", str(out)], capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stdout[-3000:] + p.stderr[-3000:]
    md = (out / "report.md").read_text()
    assert "## What ran" in md
    section = md.split("## What ran", 1)[1].split("\n## ", 1)[0]
    for e in s["provenance"]["plugins"]:
        assert f"### {e['role']}: {e['name']}" in section
        assert e["sources"][0]["sha256"] in section
    assert "| R2 | 0.004 | ohm | given |" in section
    assert "| L1 | 0.00015 | H | default |" in section
    assert "| points | table 3 x 2, sha256 " in section
    assert "| t [s] \\| v [V] | given |" in section  # a table's units, the cell's bar escaped


def test_units_run_lists_each_units_plant_and_controller(tmp_path):
    s = _run(FOUR, tmp_path / "units", 'timing.duration="20 ms"',
             'units.unit3.controller.Kp_v=0.9')
    prov = s["provenance"]
    by_role = {e["role"]: e for e in prov["plugins"]}
    # the generated bus plant and units' controller: their generated modules, hashed
    for role in ("plant", "controller"):
        e = by_role[role]
        assert e["origin_kind"] == "file" and e["version"] == "file"
        gen = e["sources"][0]
        assert gen["role"] == "generated module" and gen["sha256"] == _sha(gen["file"])
    units = prov["units"]
    assert [u["unit"] for u in units] == [1, 2, 3, 4]
    pi = _module_file("hilrig.plugins.controllers.cascaded_pi")
    lc = _module_file("hilrig.plugins.plants.two_stage_lc")
    for u in units:
        assert u["controller"]["name"] == "cascaded_pi"
        assert u["controller"]["sources"][0]["sha256"] == _sha(pi)
        assert u["plant"]["name"] == "two_stage_lc"
        assert u["plant"]["sources"][0]["sha256"] == _sha(lc)
    ctrl3 = {q["name"]: q for q in units[2]["controller"]["parameters"]}
    ctrl1 = {q["name"]: q for q in units[0]["controller"]["parameters"]}
    assert ctrl3["Kp_v"] == {"name": "Kp_v", "value": 0.9, "unit": "A/V", "set": "given"}
    # [design] defaults = "declared": unit 1's gains are the declared defaults
    assert ctrl1["Kp_v"] == {"name": "Kp_v", "value": 5.0, "unit": "A/V", "set": "default"}
    plant2 = {q["name"]: q for q in units[1]["plant"]["parameters"]}
    assert plant2["L1"]["set"] == "given" and abs(plant2["L1"]["value"] - 162e-6) < 1e-18
    assert {q["name"]: q for q in units[0]["plant"]["parameters"]}["L1"]["set"] == "default"


# ---- generated and file plugins: the record of the scenario as loaded (no run, no compile) --

def test_a_controller_in_c_records_its_c_source_and_a_file_plugin_its_path():
    from hilrig.runtime.provenance import record
    from hilrig.runtime.scenario import load_scenario
    from tests.fmu import build as fmu_build
    if fmu_build.compiler() is None:
        pytest.skip("needs a C compiler")
    folder = ROOT / "examples" / "c_controller"
    c = {e["role"]: e for e in record(load_scenario(folder / "pi_c.toml"))["plugins"]}["controller"]
    assert c["origin_kind"] == "file" and c["version"] == "file"
    gen, src = c["sources"]
    assert gen["role"] == "generated module" and gen["sha256"] == _sha(gen["file"])
    assert src == {"role": "C source", "file": str((folder / "pi.c").resolve()),
                   "sha256": _sha(folder / "pi.c")}
    params = {q["name"]: q for q in c["parameters"]}
    assert params["Kp_v"] == {"name": "Kp_v", "value": 5.0, "unit": "A/V", "set": "given"}
    n = {e["role"]: e for e in record(load_scenario(folder / "pi_numba.toml"))["plugins"]}
    n = n["controller"]
    path = str((folder / "pi_numba.py").resolve())
    assert n["origin"] == path and n["version"] == "file"
    assert n["sources"] == [{"role": "plugin module", "file": path, "sha256": _sha(path)}]


def test_an_fmu_plant_records_the_fmu_file(tmp_path):
    from hilrig.runtime.provenance import record
    from hilrig.runtime.scenario import load_scenario
    from tests.fmu import build as fmu_build
    if fmu_build.compiler() is None:
        pytest.skip("needs a C compiler")
    lib = fmu_build.compile_library(tmp_path / "build")
    fmu = fmu_build.pack(tmp_path, lib)
    scen = tmp_path / "me.toml"
    scen.write_text(fmu_build.scenario(fmu))
    p = {e["role"]: e for e in record(load_scenario(scen))["plugins"]}["plant"]
    files = {s["role"]: s for s in p["sources"]}
    assert files["FMU"]["file"] == str(Path(fmu).resolve()) or Path(files["FMU"]["file"]).samefile(fmu)
    assert files["FMU"]["sha256"] == _sha(fmu)
    assert files["generated module"]["sha256"] == _sha(files["generated module"]["file"])


def test_units_designed_from_the_plant_record_the_values_each_unit_ran_with():
    # [design] defaults = "plant": each unit's controller gets the parameters the scenario
    # leaves out designed; the record shows those numbers (the ones packed for the run)
    from hilrig.runtime.provenance import record
    from hilrig.runtime.run import prepare
    from hilrig.runtime.scenario import load_scenario
    prep = prepare(load_scenario(FOUR, overrides={"design.defaults": "plant"}))
    units = record(prep.sc)["units"]
    ran = prep.sc.controller.values["units"]
    designed = 0
    for u, r in zip(units, ran):
        params = {q["name"]: q for q in u["controller"]["parameters"]}
        for n, v in r["values"].items():
            if n in params and isinstance(v, float):
                assert params[n]["value"] == v, (u["unit"], n)
                designed += params[n]["set"] == "designed"
    assert designed > 0
