"""The live view of paralleled units: frames carry each unit's current, its deviation from its
share and its state, and the units' trips; the viewer shows a compact cell per unit and which
unit tripped, on an 80 x 24 screen and in its plain line, and a single-unit frame shows no
units at all. The share and its renormalisation while a unit is blocked are the definitions of
runtime/trials/sharing.py; the numbers below are worked out by hand from them.

Trip semantics (a unit's latch, its cause bits): runtime/multi/control.py; a gate-blocked
unit carrying no share is common practice, no source.
"""
import io
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console

from hilrig.runtime.live.telemetry import Telemetry
from hilrig.runtime.live.watch import View
from hilrig.safety.interlocks import LATCH_SIZE, InterlockTable
from tests import locks

CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
EXAMPLE = Path(__file__).resolve().parents[2] / "examples" / "units" / "four_units.toml"
INFO = {"title": "three units (test data)", "mode": "sil", "demo_data": False, "caution": None,
        "n_total": 1000, "Ts": 1e-4}
UNITS = ["unit1", "unit2", "unit3"]


def _names():
    names = ["v_out", "v_ref", "i_out", "interlock_word"]
    for u in UNITS:
        names += [f"{u}_i_out", f"{u}_enable", f"{u}_trip"]
    return names


def _telemetry(tmp_path, units_info):
    names = _names()
    return Telemetry(f"ipc://{tmp_path}/tel", info=INFO, names=names,
                     units=["-"] * len(names), table=InterlockTable.build([], ["v_out"]),
                     units_info=units_info), names


def _render(view) -> str:
    con = Console(width=80, height=24, record=True, file=io.StringIO())
    con.print(view.render(80))
    return con.export_text()


def test_frames_and_the_view_show_each_unit_and_which_tripped(tmp_path):
    info = {"i_out": [f"{u}_i_out" for u in UNITS], "enable": [f"{u}_enable" for u in UNITS],
            "trip": [f"{u}_trip" for u in UNITS], "weights": [0.5, 0.25, 0.25]}
    tel, names = _telemetry(tmp_path, info)
    try:
        ix = {n: i for i, n in enumerate(names)}
        rows = np.zeros((10, len(names)))
        rows[:, ix["v_out"]], rows[:, ix["v_ref"]], rows[:, ix["i_out"]] = 495.0, 500.0, 100.0
        for u in UNITS:
            rows[:, ix[f"{u}_enable"]] = 1.0
        rows[:, ix["unit1_i_out"]], rows[:, ix["unit2_i_out"]], rows[:, ix["unit3_i_out"]] = 52, 23, 25
        tel.add_rows(0, rows, INFO["Ts"])
        latch, evlog, evn = np.zeros(LATCH_SIZE), np.zeros((8, 4)), np.zeros(1)
        f = tel.frame(latch, evlog, evn)
        # total 100 A, shares 50 / 25 / 25 A: deviations +2, -2, 0 A (+4 %, -8 %, 0 %)
        r = f["units"]["rows"]
        assert [x[0] for x in r] == [1, 2, 3]
        assert r[0][1:5] == [52.0, 50.0, 2.0, pytest.approx(4.0)]
        assert r[1][3:5] == [-2.0, pytest.approx(-8.0)] and r[2][5:8] == [1, 0, None]
        assert f["units"]["trips"] == []
        # unit 3 trips on over-current (bit 1) at tick 14 and carries nothing: units 1 and 2
        # share the 100 A 2:1 (66.67 / 33.33 A): 70 A is +3.33 A, +5 %
        more = rows.copy()
        more[4:, ix["unit3_trip"]] = 1.0
        more[4:, ix["unit3_enable"]] = 0.0
        more[4:, ix["unit3_i_out"]] = 0.0
        more[4:, ix["unit1_i_out"]], more[4:, ix["unit2_i_out"]] = 70.0, 30.0
        tel.add_rows(10, more, INFO["Ts"])
        f = tel.frame(latch, evlog, evn)
        r = f["units"]["rows"]
        assert r[0][2] == pytest.approx(200.0 / 3.0) and r[0][4] == pytest.approx(5.0)
        assert r[2][2] == 0.0 and r[2][4] is None and r[2][5:8] == [0, 1, "over-current"]
        assert f["units"]["trips"] == [[3, "over-current", pytest.approx(14 * INFO["Ts"])]]
        # the latch holds on the next chunk: no second trip
        tel.add_rows(20, np.repeat(more[-1:], 10, axis=0), INFO["Ts"])
        assert len(tel.frame(latch, evlog, evn)["units"]["trips"]) == 1
    finally:
        tel.close()
    view = View()
    view.frame = f
    screen = _render(view)
    assert all(len(line) <= 80 for line in screen.splitlines())
    assert len(screen.splitlines()) <= 24
    assert "units: A, % off share" in screen
    assert " 1   70.0A  +5.0%" in screen and " 2   30.0A" in screen
    assert " 3    0.0A    off" in screen
    assert "unit TRIPPED: 3 (over-current)" in screen and "armed, no trip" in screen
    line = view.plain_line()
    assert "units 1   70.0A  +5.0%" in line and "unit TRIPPED: 3 (over-current)" in line


def test_a_single_unit_frame_has_no_units(tmp_path):
    tel, names = _telemetry(tmp_path, None)
    try:
        tel.add_rows(0, np.full((3, len(names)), 1.0), INFO["Ts"])
        f = tel.frame(np.zeros(LATCH_SIZE), np.zeros((8, 4)), np.zeros(1))
    finally:
        tel.close()
    assert f["units"] is None
    view = View()
    view.frame = f
    screen = _render(view)
    assert "signals" in screen and "units:" not in screen and "unit TRIPPED" not in screen
    assert "| units" not in view.plain_line()


def test_a_run_of_units_and_its_viewer_show_the_unit_that_tripped(tmp_path):
    """A run of the shipped four-unit example with unit 3 forced to trip at 40 ms publishes
    telemetry; a plain viewer started first ends on the unit's trip and its cause."""
    scen = tmp_path / "four_units_trip.toml"
    # paced, 1.5 s: a SIL run of 120 ms ends within a few hundred microseconds of its first
    # frame, before a viewer's connection (retried every 100 ms until the run binds its
    # address) is up, and then no frame reaches it; limits no shared machine breaches
    scen.write_text(EXAMPLE.read_text().replace('duration = "120 ms"', 'duration = "1.5 s"')
                    + '\n[[units.faults]]\nunit = 3\nkind = "trip"\nat = "40 ms"\n'
                    + '\n[paced]\nmiss_share_max = 1.0\nmax_lateness = "10 s"\n')
    address = f"ipc://{tmp_path}/tel"
    # the viewer waits for the run's last frame: no other test competes for the cores meanwhile
    with locks.exclusive():
        viewer = subprocess.Popen(CLI + ["watch", address, "--plain", "--exit-when-done",
                                         "--give-up", "600"],
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            p = subprocess.run(CLI + ["run", str(scen), "--paced", "--telemetry", address,
                                      "--out", str(tmp_path / "r"), "--headless"],
                               capture_output=True, text=True, timeout=900)
            out, err = viewer.communicate(timeout=120)
        finally:
            if viewer.poll() is None:
                viewer.kill()
                viewer.communicate(timeout=60)
    assert p.returncode == 0, p.stdout + p.stderr
    assert viewer.returncode == 0 and "Traceback" not in err, err
    ended = [x for x in out.splitlines() if "ended:" in x]
    assert ended, out
    assert "unit TRIPPED: 3 (forced trip)" in ended[-1], ended[-1]
    # unit 3's cell says it is off (its cable current still rings with the bus: any value)
    assert re.search(r"\| units 1 .*, 3 +-?[0-9.]+A +off, 4 ", ended[-1]), ended[-1]


def test_sixteen_units_fit_the_panel_with_the_off_and_farthest_first():
    from hilrig.runtime.live.watch import unit_lines
    # 16 units at +1 % but unit 9 off and unit 12 at -30 %: 4 lines of 2 cells hold 7 units
    # and the count of the others
    rows = [[k, 100.0, 99.0, 1.0, 1.0, 1, 0, None] for k in range(1, 17)]
    rows[8] = [9, 0.0, 0.0, 0.0, None, 0, 8, "lost"]
    rows[11] = [12, 70.0, 100.0, -30.0, -30.0, 1, 0, None]
    lines = unit_lines({"rows": rows, "trips": []}, room=4)
    assert len(lines) == 4 and all(len(x) <= 36 for x in lines)
    text = "\n".join(lines)
    assert " 9    0.0A    off" in text and "12   70.0A -30.0%" in text
    assert "(+9 more units)" in text
    # all fit: every unit in order, two to a line
    few = unit_lines({"rows": rows[:4], "trips": []}, room=4)
    assert few == [" 1  100.0A  +1.0%  2  100.0A  +1.0%", " 3  100.0A  +1.0%  4  100.0A  +1.0%"]
