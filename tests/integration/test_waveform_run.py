"""A run whose reference and load come from CSV files records exactly what the same profile
given as TOML tables records (bit for bit): the file is only another way to write the table.

Demo data: a made-up 40 ms profile (a ramp and a step) and load (a power step and a ramp) on the
combination the other integration tests compile already (two_stage_lc + cascaded_pi + profile).
"""
import h5py
import numpy as np

from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

HEAD = """\
title = "waveform files (demo data)"
demo_data = true
mode = "sil"
seed = 1

[timing]
Ts = "50 us"
duration = "40 ms"

[plant]
plugin = "two_stage_lc"

[controller]
plugin = "cascaded_pi"
"""

FILES = HEAD + """
[reference]
plugin = "profile"
file = "ref.csv"
time = "t"
value = "v_ref"

[load]
interpolation = "linear"
file = "load.csv"
time = "t"
P = "P"
"""

TABLES = HEAD + """
[reference]
plugin = "profile"
points = [[0, "400 V"], ["8 ms", "400 V"], ["14 ms", "415.5 V"], ["14.05 ms", "395 V"],
          ["40 ms", "395 V"]]

[load]
interpolation = "linear"
[[load.points]]
t = "0 ms"
P = "10 kW"
[[load.points]]
t = "20 ms"
P = "10 kW"
[[load.points]]
t = "22 ms"
P = "35.5 kW"
[[load.points]]
t = "40 ms"
P = "-5 kW"
"""


def test_profile_and_load_from_csv_record_the_toml_tables_bit_for_bit(tmp_path):
    (tmp_path / "ref.csv").write_text("# demo data\nt [ms], v_ref [V]\n0, 400\n8, 400\n"
                                      "14, 415.5\n14.05, 395\n40, 395\n")
    (tmp_path / "load.csv").write_text("# demo data\nt [ms], P [kW]\n0, 10\n20, 10\n22, 35.5\n"
                                       "40, -5\n")
    (tmp_path / "files.toml").write_text(FILES)
    (tmp_path / "tables.toml").write_text(TABLES)
    rec = {}
    for name in ("files", "tables"):
        res = run_scenario(load_scenario(tmp_path / f"{name}.toml"), tmp_path / f"run_{name}")
        assert res.summary["completed"], res.summary
        with h5py.File(res.folder / "recording.h5", "r") as f:
            rec[name] = {k: f["signals"][k][()] for k in ("v_ref_raw", "v_ref", "P_load", "v_out")}
    for k in rec["files"]:
        assert np.array_equal(rec["files"][k], rec["tables"][k]), k
    # the profile did act: the step and the load ramp are in the recording
    assert rec["files"]["v_ref_raw"].max() == 415.5 and rec["files"]["P_load"].min() < 0


def test_a_bad_waveform_file_is_one_line_and_exit_2(tmp_path):
    from tests.integration.test_cli import run_cli
    (tmp_path / "ref.csv").write_text("t [s], v_ref [V]\n0, 400\n0.01, 400\n0.01, 410\n")
    (tmp_path / "load.csv").write_text("t [s], P [W]\n0, 0\n")
    (tmp_path / "files.toml").write_text(FILES)
    p = run_cli("run", tmp_path / "files.toml", "--out", tmp_path / "r", "--headless")
    assert p.returncode == 2, p.stdout + p.stderr
    errors = [line for line in p.stdout.splitlines() if line.startswith("error:")]
    assert len(errors) == 1 and "reference.file" in errors[0] and "line 4: time 0.01 s repeats" \
        in errors[0], p.stdout
    assert "Traceback" not in p.stdout + p.stderr and not (tmp_path / "r").exists()
