"""Reference and load waveforms read from CSV and HDF5 files (runtime/waveforms.py).

References outside the project: the files are read back with numpy.loadtxt (CSV) and h5py
(HDF5), the values before t = 0 are cut with numpy.interp (linear interpolation). SI prefixes:
BIPM SI Brochure, 9th ed., 2019, Table 7 (from memory). A file must give exactly the doubles the
same table in TOML gives, so that a run cannot tell them apart: checked with array_equal.
"""
import re

import h5py
import numpy as np
import pytest

from hilrig.runtime import waveforms
from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.scenario import parse_scenario

HEAD = """\
title = "waveforms"
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

#: demo data: a reference profile with a ramp and a step (steps in a file need two times)
CSV_REF = """\
# demo data: a made-up reference profile
# second comment line
t [ms], v_ref [V], note [-]
0, 400, 1
5, 400, 2   # a trailing comment
12.5, 430.25, 3
12.501, 380, 4
40, 3.8e2, 5
"""


def _sc(tmp_path, body: str):
    path = tmp_path / "s.toml"
    text = HEAD + body
    path.write_text(text)
    return parse_scenario(text, name="s.toml", path=str(path))


def _ref_file(tmp_path, csv=CSV_REF, extra=""):
    (tmp_path / "ref.csv").write_text(csv)
    return _sc(tmp_path, '[reference]\nplugin = "profile"\nfile = "ref.csv"\n'
                         f'time = "t"\nvalue = "v_ref"\n{extra}')


def test_csv_reference_matches_numpy_loadtxt(tmp_path):
    sc = _ref_file(tmp_path)
    pts = np.array(sc.reference.values["points"])
    # numpy.loadtxt as the outside reader: 3 lines before the samples (2 comments, the header)
    ref = np.loadtxt(tmp_path / "ref.csv", delimiter=",", comments="#", skiprows=3)
    np.testing.assert_allclose(pts[:, 0], ref[:, 0] * 1e-3, rtol=1e-15, atol=0)  # ms -> s
    assert np.array_equal(pts[:, 1], ref[:, 1])  # already in V


def test_csv_reference_is_the_toml_table_bit_for_bit(tmp_path):
    from_file = _ref_file(tmp_path)
    table = _sc(tmp_path, '[reference]\nplugin = "profile"\npoints = [[0, "400 V"], '
                          '["5 ms", "400 V"], ["12.5 ms", "430.25 V"], ["12.501 ms", "380 V"], '
                          '["40 ms", "3.8e2 V"]]\n')
    assert from_file.reference.values["points"] == table.reference.values["points"]


def test_load_csv_with_prefixed_units_is_the_toml_points_bit_for_bit(tmp_path):
    (tmp_path / "drive.csv").write_text(
        "time [ms],P_in [kW],R_aux [kohm],I_d [mA]\n"
        "0,20,open,0\n1.5,-40.5,0.2,1500\n3,80,1,-250\n")
    for interp in ("step", "linear"):
        a = _sc(tmp_path, f'[load]\ninterpolation = "{interp}"\nfile = "drive.csv"\n'
                          'time = "time"\nP = "P_in"\nR = "R_aux"\nI = "I_d"\n')
        b = _sc(tmp_path, f'[load]\ninterpolation = "{interp}"\n'
                          '[[load.points]]\nt = "0 ms"\nP = "20 kW"\nR = "open"\nI = "0 mA"\n'
                          '[[load.points]]\nt = "1.5 ms"\nP = "-40.5 kW"\nR = "0.2 kohm"\nI = "1500 mA"\n'
                          '[[load.points]]\nt = "3 ms"\nP = "80 kW"\nR = "1 kohm"\nI = "-250 mA"\n')
        assert np.array_equal(a.load_t, b.load_t) and np.array_equal(a.load_v, b.load_v), interp
    # and against numpy.loadtxt: P in kW, 1/R in S, I in mA
    ref = np.loadtxt(tmp_path / "drive.csv", delimiter=",", skiprows=1,
                     converters={2: lambda s: np.inf if s.strip() == b"open" or s.strip() == "open"
                                 else float(s)})
    np.testing.assert_allclose(a.load_t, ref[:, 0] * 1e-3, rtol=1e-15)
    np.testing.assert_allclose(a.load_v[0], ref[:, 1] * 1e3, rtol=1e-15)
    np.testing.assert_allclose(a.load_v[1], 1.0 / (ref[:, 2] * 1e3), rtol=1e-15)
    np.testing.assert_allclose(a.load_v[2], ref[:, 3] * 1e-3, rtol=1e-15)


def _h5(tmp_path, t_unit="ms", v_unit="kV", drop_unit=False):
    t = np.array([0.0, 2.5, 7.0, 40.0])
    v = np.array([0.4, 0.41, 0.395, 0.4])
    with h5py.File(tmp_path / "meas.h5", "w") as f:
        dt = f.create_dataset("run1/time", data=t)
        dv = f.create_dataset("run1/v", data=v)
        dt.attrs["unit"] = t_unit
        if not drop_unit:
            dv.attrs["unit"] = v_unit
    return t, v


def test_hdf5_reference_matches_h5py_and_the_toml_table(tmp_path):
    _h5(tmp_path)
    sc = _sc(tmp_path, '[reference]\nplugin = "profile"\nfile = "meas.h5"\n'
                       'time = "run1/time"\nvalue = "run1/v"\n')
    pts = np.array(sc.reference.values["points"])
    with h5py.File(tmp_path / "meas.h5", "r") as f:  # h5py as the outside reader
        np.testing.assert_allclose(pts[:, 0], f["run1/time"][()] * 1e-3, rtol=1e-15)
        np.testing.assert_allclose(pts[:, 1], f["run1/v"][()] * 1e3, rtol=1e-15)
    table = _sc(tmp_path, '[reference]\nplugin = "profile"\npoints = [[0, "0.4 kV"], '
                          '["2.5 ms", "0.41 kV"], ["7 ms", "0.395 kV"], ["40 ms", "0.4 kV"]]\n')
    assert sc.reference.values["points"] == table.reference.values["points"]


def test_samples_before_zero_are_cut_at_zero_by_linear_interpolation(tmp_path):
    csv = "t [s],v [V]\n-0.004,380\n-0.001,390\n0.002,420\n0.04,420\n"
    (tmp_path / "r.csv").write_text(csv)
    sc = _sc(tmp_path, '[reference]\nplugin = "profile"\nfile = "r.csv"\n')
    pts = np.array(sc.reference.values["points"])
    assert pts[0, 0] == 0.0 and pts.shape == (3, 2)
    # numpy.interp as the outside reference for the value at t = 0
    assert pts[0, 1] == pytest.approx(np.interp(0.0, [-0.001, 0.002], [390.0, 420.0]), rel=1e-15)


def _err(tmp_path, csv, pattern, extra="", name="ref.csv"):
    with pytest.raises(ScenarioError) as ei:
        _ref_file(tmp_path, csv, extra)
    msg = str(ei.value)
    assert "\n" not in msg and re.search(pattern, msg), msg
    assert msg.startswith("s.toml: ") and name in msg


ERRORS = {
    "missing_column": ("t [s], v [V]\n0, 400\n",
                       r"no column 'v_ref' in the header \(line 1: 't \[s\]', 'v \[V\]'\)"),
    "unsorted": ("t [s],v_ref [V]\n0,400\n0.02,400\n0.01,410\n",
                 r"line 4: time 0\.01 s goes back from 0\.02 s \(line 3\).*sort the rows"),
    "repeated": ("# c\nt [s],v_ref [V]\n0,400\n0.01,400\n0.01,410\n",
                 r"line 5: time 0\.01 s repeats 0\.01 s \(line 4\)"),
    "gap": ("t [s],v_ref [V]\n0,400\n0.5,400\n2,410\n",
            r"line 4: a gap of 1\.5 s after 0\.5 s, longer than max_gap = 1 s"),
    "nan": ("t [s],v_ref [V]\n0,400\n0.01,nan\n",
            r"line 3, column 'v_ref \[V\]': NaN; fill in the sample"),
    "empty_cell": ("t [s],v_ref [V]\n0,400\n0.01,\n", r"line 3, column 'v_ref \[V\]': no value"),
    "not_a_number": ("t [s],v_ref [V]\n0,400\n0.01,4OO\n",
                     r"line 3, column 'v_ref \[V\]': '4OO' is not a finite number"),
    "unknown_unit": ("t [s],v_ref [Volt]\n0,400\n",
                     r"column 'v_ref \[Volt\]': unit \[Volt\] is not a unit hilrig reads; write \[V\]"),
    "wrong_dimension": ("t [s],v_ref [kA]\n0,400\n",
                        r"column 'v_ref \[kA\]': unit \[kA\] is A, a quantity of another "
                        r"dimension; this column needs \[V\]"),
    "no_unit": ("t [s],v_ref\n0,400\n", r"column 'v_ref': the header gives no unit; write it as "
                r"'v_ref \[V\]'"),
    "starts_late": ("t [s],v_ref [V]\n0.002,400\n0.04,400\n",
                    r"the time starts at 0\.002 s \(line 2\); a waveform must start at or before 0 s"),
    "only_header": ("# nothing\nt [s],v_ref [V]\n\n", r"no rows of samples"),
    "empty": ("", r"the file is empty"),
    "ragged": ("t [s],v_ref [V]\n0,400,1\n", r"line 2 has 3 cells, the header 2"),
    "out_of_range": ("t [s],v_ref [MV]\n0,400\n", r"line 2: v_ref = 4e\+08 V is outside"),
}


@pytest.mark.parametrize("case", sorted(ERRORS))
def test_bad_csv_is_one_clear_line(tmp_path, case):
    csv, pattern = ERRORS[case]
    _err(tmp_path, csv, pattern)


def test_max_gap_can_be_raised(tmp_path):
    sc = _ref_file(tmp_path, "t [s],v_ref [V]\n0,400\n0.5,400\n2,410\n", 'max_gap = "2 s"\n')
    assert sc.reference.values["points"][-1] == (2.0, 410.0)


def test_missing_file(tmp_path):
    with pytest.raises(ScenarioError, match=r"s\.toml: reference\.file '.*nope\.csv': the file "
                                            r"does not exist; check the path"):
        _sc(tmp_path, '[reference]\nplugin = "profile"\nfile = "nope.csv"\n')


def test_too_large_a_file(tmp_path, monkeypatch):
    monkeypatch.setattr(waveforms, "MAX_FILE_BYTES", 1024 * 1024)
    (tmp_path / "big.csv").write_text("t [s],v [V]\n" + "0,400\n" * 200_000)
    with pytest.raises(ScenarioError, match=r"big\.csv': the file has 1200012 bytes, more than "
                                            r"the limit of 1 MiB"):
        _sc(tmp_path, '[reference]\nplugin = "profile"\nfile = "big.csv"\n')


def test_hdf5_without_a_unit_attribute_or_dataset(tmp_path):
    _h5(tmp_path, drop_unit=True)
    with pytest.raises(ScenarioError, match=r"dataset 'run1/v': no 'unit' attribute; set it"):
        _sc(tmp_path, '[reference]\nplugin = "profile"\nfile = "meas.h5"\n'
                      'time = "run1/time"\nvalue = "run1/v"\n')
    with pytest.raises(ScenarioError, match=r"dataset 'run1/vv': no such dataset \(the file "
                                            r"has: run1/time, run1/v\)"):
        _sc(tmp_path, '[reference]\nplugin = "profile"\nfile = "meas.h5"\n'
                      'time = "run1/time"\nvalue = "run1/vv"\n')
    _h5(tmp_path, t_unit="V")
    with pytest.raises(ScenarioError, match=r"dataset 'run1/time': unit \[V\] is V, a quantity "
                                            r"of another dimension; this column needs \[s\]"):
        _sc(tmp_path, '[reference]\nplugin = "profile"\nfile = "meas.h5"\n'
                      'time = "run1/time"\nvalue = "run1/v"\n')


def test_load_file_keys(tmp_path):
    (tmp_path / "d.csv").write_text("t [s],I [A]\n0,10\n")
    with pytest.raises(ScenarioError, match=r"load\.file: no column named; give at least one of P"):
        _sc(tmp_path, '[load]\nfile = "d.csv"\n')
    with pytest.raises(ScenarioError, match=r"load\.file: give either \[\[load\.points\]\] or "
                                            r"file, not both"):
        _sc(tmp_path, '[load]\nfile = "d.csv"\nI = "I"\n[[load.points]]\nt = 0\nP = 1\n')
    with pytest.raises(ScenarioError, match=r"unknown key 'load\.I'"):
        _sc(tmp_path, '[load]\nI = "I"\n')


def test_a_reference_that_takes_no_file(tmp_path):
    (tmp_path / "r.csv").write_text("t [s],v [V]\n0,400\n")
    with pytest.raises(ScenarioError, match=r"reference\.file: reference battery_ecm takes no "
                                            r"waveform file; use plugin = \"profile\""):
        _sc(tmp_path, '[reference]\nplugin = "battery_ecm"\nfile = "r.csv"\n')
