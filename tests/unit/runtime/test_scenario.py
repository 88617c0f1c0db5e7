"""Scenario validation: every mistake is one ScenarioError naming file, key, value, expectation.

Malformed scenarios are derived from the shipped demo text or from a minimal valid scenario by a
single edit, so each case tests exactly one mistake. Expected SI values are the literals the unit
strings denote (SI prefixes: BIPM SI Brochure, 9th ed., 2019, Table 7, from memory).
"""
import math
import re
from importlib.resources import files
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.scenario import (LIMITS, PACED, PACED_FLAGS, RECORDING, SHAPING, TIMING,
                                     Scenario, load_scenario, parse_scenario)
from hilrig.safety.interlocks import Interlock

DEMO = (files("hilrig.runtime") / "data" / "demo.toml").read_text(encoding="utf-8")

#: the smallest scenario that names every part explicitly (values are demo data)
MINIMAL = """\
title = "minimal"
mode = "sil"
seed = 3

[timing]
Ts = "50 us"
duration = "10 ms"

[plant]
plugin = "two_stage_lc"

[controller]
plugin = "cascaded_pi"

[reference]
plugin = "profile"

[[load.points]]
t = 0
P = "10 kW"

[[interlocks]]
signal = "v_out"
above = "480 V"
"""

NAME = "case.toml"


def edit(text: str, old: str, new: str) -> str:
    """Replace the one occurrence of ``old``; fail loudly if the base text no longer has it."""
    assert text.count(old) == 1, f"base scenario no longer contains {old!r} exactly once"
    return text.replace(old, new)


def demo(old, new):
    return edit(DEMO, old, new)


def minimal(old, new):
    return edit(MINIMAL, old, new)


PLANT = '[plant]\nplugin = "two_stage_lc"\n'
CONTROLLER = '[controller]\nplugin = "cascaded_pi"\n'
LOAD0 = '[[load.points]]\nt = 0\nP = "10 kW"\n'
INTERLOCK0 = '[[interlocks]]\nsignal = "v_out"\nabove = "480 V"\n'


def expect_error(text, *fragments, name=NAME):
    """Parse ``text``: exactly a ScenarioError (a ValueError) whose message starts with the file
    name and contains every fragment."""
    with pytest.raises(ScenarioError) as info:
        parse_scenario(text, name=name)
    assert type(info.value) is ScenarioError and isinstance(info.value, ValueError)
    msg = str(info.value)
    assert msg.startswith(f"{name}: "), msg
    for frag in fragments:
        assert frag in msg, f"{frag!r} missing from {msg!r}"
    return msg


# (id, scenario text, fragments the message must hold: dotted key, value with unit, what was
# expected, suggestion). Ranges are the bounds the plugins and the scenario format declare.
CASES = [
    ("unknown top-level key",
     minimal("[timing]", "[timming]"),
     ["unknown key 'timming'", "did you mean 'timing'?", "allowed:"]),
    ("plant parameter typo",
     demo('L1 = "150 uH"', 'L_1 = "150 uH"'),
     ["unknown key 'plant.L_1'", "did you mean 'L1'"]),
    ("plant parameter in the wrong case",
     demo('L1 = "150 uH"', 'l1 = "150 uH"'),
     ["unknown key 'plant.l1'", "did you mean 'L1'"]),
    ("wrong unit for an inductance",
     demo('L1 = "150 uH"', 'L1 = "150 uF"'),
     ["plant.L1", "'150 uF'", "expected H"]),
    ("unparsable quantity",
     minimal(PLANT, PLANT + 'L1 = "fast"\n'),
     ["plant.L1", "'fast'", "not a quantity", "H"]),
    ("boolean where a number is expected",
     minimal(PLANT, PLANT + "L1 = true\n"),
     ["plant.L1", "boolean", "number in H"]),
    ("NaN where a number is expected",
     minimal(PLANT, PLANT + "L1 = nan\n"),
     ["plant.L1", "nan", "not finite", "H"]),
    ("Ts zero",
     minimal('Ts = "50 us"', "Ts = 0"),
     ["timing.Ts = 0 s", "outside [1e-07, 1] s"]),
    ("duration not a whole number of periods",
     # 10.01 ms / 50 us = 200.2 periods
     minimal('duration = "10 ms"', 'duration = "10.01 ms"'),
     ["timing.duration = 0.01001 s", "not a whole number", "Ts = 5e-05 s"]),
    ("substeps zero",
     minimal('duration = "10 ms"', 'duration = "10 ms"\nsubsteps = 0'),
     ["timing.substeps = 0", "[1, 1000]"]),
    ("substeps not an integer",
     minimal('duration = "10 ms"', 'duration = "10 ms"\nsubsteps = 2.5'),
     ["timing.substeps = 2.5", "whole number", "[1, 1000]"]),
    ("unknown plugin name",
     minimal(CONTROLLER, '[controller]\nplugin = "cascade_pi"\n'),
     ["controller.plugin", "'cascade_pi'", "did you mean cascaded_pi"]),
    ("plugin file that does not exist",
     minimal(CONTROLLER, '[controller]\nplugin = "no_such_folder/my_ctrl.py"\n'),
     ["controller.plugin", "'no_such_folder/my_ctrl.py'", "does not exist"]),
    ("table row of the wrong width",
     demo('rc_pairs = [["0.6 mohm", "50 kF"], ', 'rc_pairs = [["0.6 mohm", "50 kF", "30 s"], '),
     ["reference.rc_pairs[0]", "has 3 values", "expected 2: R [ohm], C [F]"]),
    ("OCV table with non-increasing SOC",
     demo("soc0 = 0.8\n",
          'soc0 = 0.8\nocv = [[0.0, "3.0 V"], [0.5, "3.6 V"], [0.4, "3.7 V"], [1.0, "4.1 V"]]\n'),
     ["reference.ocv[2]", "soc = 0.4 after 0.5", "strictly increasing"]),
    ("load point without t",
     minimal(LOAD0, '[[load.points]]\nP = "10 kW"\n'),
     ["load.points[0]", "no time t [s]"]),
    ("load times not increasing",
     minimal(LOAD0, LOAD0 + '[[load.points]]\nt = "0 ms"\nP = "20 kW"\n'),
     ["load.points[1].t = 0 s", "not after the previous point (0 s)"]),
    ("load resistance zero",
     minimal(LOAD0, '[[load.points]]\nt = 0\nR = "0 ohm"\n'),
     ["load.points[0].R = 0 ohm", "outside (0, 1e+12] ohm"]),
    ("unknown load column",
     minimal(LOAD0, '[[load.points]]\nt = 0\np = "10 kW"\n'),
     ["unknown key 'load.points[0].p'", "did you mean 'P'", "allowed: I, P, R, t"]),
    ("interlock on an unknown signal",
     minimal(INTERLOCK0, '[[interlocks]]\nsignal = "v_ot"\nabove = "480 V"\n'),
     ["interlocks[0].signal = 'v_ot'", "did you mean 'v_out'", "signals: v_out"]),
    ("interlock signal that is not a name",
     minimal(INTERLOCK0, '[[interlocks]]\nsignal = ["v_out"]\nabove = "480 V"\n'),
     ["interlocks[0].signal = ['v_out']", "not a signal"]),
    ("interlock with both above and below",
     minimal(INTERLOCK0, INTERLOCK0 + 'below = "300 V"\n'),
     ["interlocks[0]", "exactly one of 'above', 'below'"]),
    ("interlock threshold in the wrong unit",
     minimal(INTERLOCK0, '[[interlocks]]\nsignal = "v_out"\nabove = "480 A"\n'),
     ["interlocks[0].above", "'480 A'", "expected V"]),
    ("debounce zero",
     minimal(INTERLOCK0, INTERLOCK0 + "debounce = 0\n"),
     ["interlocks[0].debounce = 0", "[1, 1000000]"]),
    ("bridge mode in the scenario",
     demo('mode = "sil"', 'mode = "lockstep"'),
     ["mode = 'lockstep'", "is a bridge mode", "--bridge ADDRESS --mode lockstep"]),
    ("unknown mode",
     demo('mode = "sil"', 'mode = "sill"'),
     ["mode = 'sill'", "not a mode", "did you mean 'sil'"]),
    ("negative seed",
     minimal("seed = 3", "seed = -1"),
     ["seed = -1", "whole number in [0, 2^63)"]),
    ("shaping pole too fast for Ts",
     # the shaping design needs pole * Ts <= 1: at Ts = 50 us at most 1 / 50 us = 20000 rad/s
     demo('pole = "7500 rad/s"', 'pole = "30 krad/s"'),
     ["shaping.pole = 30000 rad/s", "too fast for Ts = 5e-05 s", "at most 20000 rad/s"]),
    ("shaping order 3",
     demo("order = 5", "order = 3"),
     ["shaping.order = 3", "outside [4, 12]"]),
    ("unknown recording compression",
     MINIMAL + '[recording]\ncompression = "zip"\n',
     ["recording.compression = 'zip'", "'none', 'gzip'"]),
    # faults and resets after the run's last tick would never act (ticks at t = k Ts, k = 0 ..
    # n - 1: the last one of 10 ms at 50 us is at 9.95 ms); the summary would still list them
    ("fault starting long after the end of the run",
     MINIMAL + '[[faults]]\nkind = "nan_output"\nstart = "2 s"\n',
     ["faults[0].start = 2 s", "after the run's last tick at 0.00995 s",
      "timing.duration = 0.01 s", "would never act", "lengthen timing.duration"]),
    ("fault starting exactly at the end of the run",
     MINIMAL + '[[faults]]\nkind = "offset"\nsignal = "v_out"\nvalue = "5 V"\nstart = "10 ms"\n',
     ["faults[0].start = 0.01 s", "last tick at 0.00995 s", "timing.duration = 0.01 s"]),
    ("fault starting within the last period, after the last tick",
     MINIMAL + '[[faults]]\nkind = "open_circuit"\nstart = "9.99 ms"\n',
     ["faults[0].start = 0.00999 s", "last tick at 0.00995 s", "timing.duration = 0.01 s"]),
    ("second fault starting after the end of the run",
     MINIMAL + ('[[faults]]\nkind = "nan_output"\nstart = "5 ms"\n'
                '[[faults]]\nkind = "power_step"\nvalue = "5 kW"\nstart = "40 ms"\nend = "50 ms"\n'),
     ["faults[1].start = 0.04 s", "timing.duration = 0.01 s", "would never act"]),
    ("conditional fault watched only after the end of the run",
     MINIMAL + ('[[faults]]\nkind = "dropout"\nsignal = "v_out"\nstart = "0.3 s"\n'
                'when = { signal = "i_out", above = "150 A" }\n'),
     ["faults[0].start = 0.3 s", "timing.duration = 0.01 s", "condition would never be watched"]),
    ("link fault after the end of the run",
     MINIMAL + '[[faults]]\nkind = "link_disconnect"\nstart = "1 s"\n',
     ["faults[0].start = 1 s", "timing.duration = 0.01 s", "would never act"]),
    # a window inside one period holds no tick (ticks at 0.1 ms and 0.15 ms; Ts = 50 us)
    ("timed fault whose window holds no tick",
     MINIMAL + ('[[faults]]\nkind = "offset"\nsignal = "v_out"\nvalue = "5 V"\n'
                'start = "0.10001 ms"\nend = "0.14 ms"\n'),
     ["faults[0].end = 0.00014 s", "window from 0.00010001 s holds no tick",
      "first at or after the start is at 0.00015 s", "would never act"]),
    ("reset after the end of the run",
     minimal("seed = 3", 'seed = 3\nresets = ["5 ms", "0.3 s"]'),
     ["resets[1] = 0.3 s", "after the run's last tick at 0.00995 s", "timing.duration = 0.01 s",
      "reset would never be requested"]),
    ("reset exactly at the end of the run",
     minimal("seed = 3", 'seed = 3\nresets = ["10 ms"]'),
     ["resets[0] = 0.01 s", "timing.duration = 0.01 s"]),
    # [paced]: the timing limits a paced run is judged by and its real-time requests
    ("unknown key in [paced]",
     MINIMAL + '[paced]\nmax_latenes = "1 ms"\n',
     ["unknown key 'paced.max_latenes'", "did you mean 'max_lateness'",
      "allowed: max_lateness, miss_share_max, realtime, realtime_priority"]),
    ("miss share above 1",
     MINIMAL + "[paced]\nmiss_share_max = 2\n",
     ["paced.miss_share_max = 2", "outside [0, 1]"]),
    ("miss share as a percentage string",
     MINIMAL + '[paced]\nmiss_share_max = "1 %"\n',
     ["paced.miss_share_max = '1 %'", "is a percentage", "e.g. 0.01 for 1 %"]),
    ("negative largest lateness",
     MINIMAL + '[paced]\nmax_lateness = "-1 ms"\n',
     ["paced.max_lateness = -0.001 s", "outside [0, 10] s"]),
    ("largest lateness in the wrong unit",
     MINIMAL + '[paced]\nmax_lateness = "1 mV"\n',
     ["paced.max_lateness", "'1 mV'", "expected s"]),
    ("real-time switch that is not true or false",
     MINIMAL + '[paced]\nrealtime = "yes"\n',
     ["paced.realtime = 'yes'", "not true or false"]),
    ("real-time switch given as 1",
     MINIMAL + "[paced]\nrealtime = 1\n",
     ["paced.realtime = 1", "not true or false"]),
    ("real-time priority 0",
     MINIMAL + "[paced]\nrealtime_priority = 0\n",
     ["paced.realtime_priority = 0", "[1, 99]"]),
    ("real-time priority not whole",
     MINIMAL + "[paced]\nrealtime_priority = 49.5\n",
     ["paced.realtime_priority = 49.5", "whole number", "[1, 99]"]),
    ("[paced] not a table",
     minimal("seed = 3", 'seed = 3\npaced = "fast"'),
     ["paced is a str", "expected a table [paced]"]),
    # [initial] v_out_offset: the start excitation, percent of the start voltage or volts
    ("excitation offset beyond 10 % of the start voltage",
     MINIMAL + '[initial]\nv_out_offset = "-20 %"\n',
     ["initial.v_out_offset = '-20 %'", "outside [-10, 10] % of the start voltage",
      'such as "-0.25 %"', '"0 V" starts exactly at the equilibrium']),
    ("excitation offset in the wrong unit",
     MINIMAL + '[initial]\nv_out_offset = "-0.5 A"\n',
     ["initial.v_out_offset = '-0.5 A'", "neither a percentage nor a voltage",
      'a voltage such as "-0.5 V"']),
    ("excitation percentage that is not a number",
     MINIMAL + '[initial]\nv_out_offset = "small %"\n',
     ["initial.v_out_offset = 'small %'", "is not a percentage"]),
    ("excitation offset given as a switch",
     MINIMAL + "[initial]\nv_out_offset = false\n",
     ["initial.v_out_offset = False", "neither a percentage nor a voltage", '"0 V"']),
    ("excitation offset of too many volts",
     MINIMAL + '[initial]\nv_out_offset = "20 kV"\n',
     ["initial.v_out_offset = 20000 V", "outside [-10000, 10000] V"]),
    ("unknown key in [initial]",
     MINIMAL + '[initial]\nv_out_ofset = "0 V"\n',
     ["unknown key 'initial.v_out_ofset'", "did you mean 'v_out_offset'",
      "allowed: v_out, v_out_offset"]),
]


@pytest.mark.parametrize("text, fragments", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_malformed_scenario_is_one_clear_error(text, fragments):
    expect_error(text, *fragments)


def test_the_bases_of_the_malformed_cases_are_valid():
    # without this, a case could fail for a reason other than its one edit
    assert isinstance(parse_scenario(MINIMAL, name=NAME), Scenario)
    assert isinstance(parse_scenario(DEMO, name=NAME), Scenario)


def test_faults_and_resets_up_to_the_last_tick_and_curves_beyond_the_end_are_accepted():
    # the last tick of 10 ms at 50 us is at 9.95 ms: a fault or reset there acts on it; an end,
    # a conditional duration, reference and load points may lie beyond the run
    text = (minimal("seed = 3", 'seed = 3\nresets = ["9.95 ms", "2 ms"]')
            .replace('plugin = "profile"\n',
                     'plugin = "profile"\npoints = [[0, "400 V"], ["2 s", "400 V"], ["2 s", "420 V"]]\n')
            + '[[load.points]]\nt = "5 s"\nP = "20 kW"\n'
            + '[[faults]]\nkind = "offset"\nsignal = "v_out"\nvalue = "5 V"\nstart = "9.95 ms"\nend = "2 s"\n'
            + '[[faults]]\nkind = "dropout"\nsignal = "v_out"\nduration = "1 s"\n'
            + 'when = { signal = "i_out", above = "150 A" }\n')
    sc = parse_scenario(text, name=NAME)
    assert sc.resets == [0.002, 0.00995]
    assert [f.start for f in sc.faults] == [0.00995, 0.0] and sc.faults[0].end == 2.0
    assert sc.reference.values["points"][-1] == (2.0, 420.0) and sc.load_t[-1] == 5.0
    # a window of one tick is enough: [0.1 ms, 0.10001 ms) holds the tick at 0.1 ms
    one = parse_scenario(MINIMAL + '[[faults]]\nkind = "offset"\nsignal = "v_out"\nvalue = "5 V"\n'
                         'start = "0.1 ms"\nend = "0.10001 ms"\n', name=NAME)
    assert one.faults[0].end == 1.0001e-4
    # the same scenario one period longer also takes a fault at its new last tick
    longer = parse_scenario(text.replace('duration = "10 ms"', 'duration = "10.05 ms"')
                            .replace('start = "9.95 ms"', 'start = "10 ms"'), name=NAME)
    assert longer.faults[0].start == 0.01


def test_negative_inductance_names_the_si_value_and_the_range():
    msg = expect_error(demo('L1 = "150 uH"', 'L1 = "-200 uH"'), "plant.L1 = ", "outside (0, 1] H")
    # the value is shown in SI with its unit: -200 uH = -2e-4 H
    m = re.search(r"plant\.L1 = (\S+) H is outside", msg)
    assert m and float(m.group(1)) == -2e-4


def test_invalid_toml_names_the_line():
    text = minimal("[plant]", "[plant")
    line = text.splitlines().index("[plant") + 1  # 1-based, counted here
    expect_error(text, "not valid TOML", f"line {line}")


def test_override_into_a_value_is_an_error_not_a_crash():
    # --set plant.L1.x=1 on the command line: plant.L1 holds a quantity, not a table
    with pytest.raises(ScenarioError) as info:
        parse_scenario(demo('L1 = "150 uH"', 'L1 = "150 uH"'), name=NAME,
                       overrides={"plant.L1.x": 1.0})
    assert type(info.value) is ScenarioError
    assert str(info.value).startswith(f"{NAME}: ")
    assert "'plant.L1.x'" in str(info.value) and "not a table" in str(info.value)


def test_override_replaces_a_value():
    sc = parse_scenario(MINIMAL, name=NAME, overrides={"timing.duration": "20 ms", "plant.L1": "0.2 mH"})
    assert sc.duration == 0.02 and sc.plant.values["L1"] == 2e-4


# --- files on disk -----------------------------------------------------------------------------

def test_load_scenario_names_the_file(tmp_path):
    path = tmp_path / "rig_a.toml"
    path.write_text(minimal("[timing]", "[timming]"), encoding="utf-8")
    with pytest.raises(ScenarioError) as info:
        load_scenario(path)
    assert type(info.value) is ScenarioError
    assert str(info.value).startswith("rig_a.toml: unknown key 'timming'; did you mean 'timing'?")


def test_load_scenario_out_of_range_value_names_file_key_and_range(tmp_path):
    path = tmp_path / "rig_b.toml"
    path.write_text(demo('C2 = "680 uF"', 'C2 = "2 F"'), encoding="utf-8")
    with pytest.raises(ScenarioError) as info:
        load_scenario(str(path))
    assert str(info.value) == "rig_b.toml: plant.C2 = 2 F is outside (0, 1] F"


def test_missing_and_unreadable_files(tmp_path):
    with pytest.raises(ScenarioError, match="does not exist") as info:
        load_scenario(tmp_path / "nope.toml")
    assert "nope.toml" in str(info.value)
    bad = tmp_path / "latin1.toml"
    bad.write_bytes('title = "caf\u00e9"\n'.encode("latin-1"))  # not UTF-8, which TOML requires
    with pytest.raises(ScenarioError, match="cannot read"):
        load_scenario(bad)


# --- valid scenarios ---------------------------------------------------------------------------

VALID = """\
title = "units"
[timing]
Ts = "50 us"
duration = "20 ms"
substeps = 2
[plant]
V_dc = "0.8 kV"
L1 = "200 uH"
R1 = "20 mohm"
C1 = "500 uF"
[shaping]
pole = "7.5 krad/s"
slew_rate = "200 kV/s"
[[load.points]]
t = "0 s"
P = "60 kW"
[[load.points]]
t = "5 ms"
P = "-40 kW"
R = "200 ohm"
[[load.points]]
t = "10 ms"
P = "-40 kW"
I = "25 A"
R = "open"
[limits]
v_collapse = "0.1 kV"
[[interlocks]]
signal = "v_out"
below = "300 V"
debounce = 20
[[interlocks]]
signal = "i_L1"
above = "0.5 kA"
[initial]
v_out = "400 V"
"""


def test_unit_strings_become_exact_si_values():
    sc = parse_scenario(VALID, name=NAME)
    # each expected value is the literal the unit string denotes (SI Brochure, Table 7, from memory)
    assert sc.plant.values["L1"] == 2e-4
    assert sc.plant.values["R1"] == 2e-2
    assert sc.plant.values["C1"] == 5e-4
    assert sc.plant.values["V_dc"] == 800.0
    assert sc.Ts == 5e-5
    assert sc.duration == 0.02 and sc.n_ticks == 400
    assert sc.substeps == 2 and type(sc.substeps) is int
    assert sc.shaping["pole"] == 7500.0 and sc.shaping["slew_rate"] == 2e5
    assert sc.v_collapse == 100.0 and sc.v_out0 == 400.0
    assert sc.interlocks == [Interlock("v_out", 300.0, above=False, debounce=20, unit="V"),
                             Interlock("i_L1", 500.0, above=True, debounce=1, unit="A")]
    # step interpolation: each change is a pair of equal breakpoints (hold, then the new row);
    # R = 200 ohm is G = 1/200 = 0.005 S, R = "open" is G = 0
    assert sc.load_t.tolist() == [0.0, 5e-3, 5e-3, 1e-2, 1e-2]
    assert sc.load_v.tolist() == [[6e4, 6e4, -4e4, -4e4, -4e4],
                                  [0.0, 0.0, 0.005, 0.005, 0.0],
                                  [0.0, 0.0, 0.0, 0.0, 25.0]]


def test_a_load_profile_that_starts_later_has_no_load_before_it():
    """docs/scenarios.md: before the first point's t there is no load (P = 0, R open, I = 0);
    the first row is not held back to t = 0. With linear interpolation the load ramps from zero."""
    later = minimal(LOAD0, '[[load.points]]\nt = "5 ms"\nP = "50 kW"\n')
    sc = parse_scenario(later, name=NAME)
    assert sc.load_t.tolist() == [0.0, 5e-3, 5e-3]
    assert sc.load_v.tolist() == [[0.0, 0.0, 5e4], [0.0, 0.0, 0.0], [0.0, 0.0, 0.0]]
    lin = parse_scenario(minimal(LOAD0, '[load]\ninterpolation = "linear"\n[[load.points]]\n'
                                        't = "5 ms"\nP = "50 kW"\n'), name=NAME)
    assert lin.load_t.tolist() == [0.0, 5e-3]
    assert lin.load_v.tolist() == [[0.0, 5e4], [0.0, 0.0], [0.0, 0.0]]


def test_defaults_fill_in_and_text_is_kept():
    text = "# a comment and one key at its default\nseed = 0\n"
    sc = parse_scenario(text, name=NAME)
    assert sc.text == text
    assert (sc.mode, sc.seed, sc.title, sc.demo_data) == ("sil", 0, "", False)
    # the defaults declared by the format and by each plugin, converted to SI
    assert (sc.Ts, sc.substeps, sc.duration) == tuple(TIMING[k][1] for k in ("Ts", "substeps", "duration"))
    # pole and slew rate "auto": derived from the plant when prepared; these numbers stand in
    assert sc.shaping == {**{k: v[1] for k, v in SHAPING.items()},
                          "from_plant": ["pole", "slew_rate"]}
    assert (sc.v_collapse, sc.safe_u) == (LIMITS["v_collapse"][1], LIMITS["safe_u"][1])
    assert sc.recording == {"chunk": RECORDING["chunk"][1], "compression": "none"}
    for choice, name in ((sc.plant, "two_stage_lc"), (sc.controller, "cascaded_pi"),
                         (sc.reference, "profile")):
        assert choice.plugin.name == name
        assert choice.values == choice.plugin.declaration.defaults()
    assert sc.interlocks == [] and sc.v_out0 is None
    assert sc.load_t.tolist() == [0.0] and sc.load_v.tolist() == [[0.0], [0.0], [0.0]]


def test_paced_defaults_values_and_overrides():
    # the documented defaults (docs/scenarios.md): at most 1 % deadline misses, largest lateness
    # 1 ms, real-time requests on at SCHED_FIFO priority 49
    sc = parse_scenario(MINIMAL, name=NAME)
    assert sc.paced == {"miss_share_max": 0.01, "max_lateness": 1e-3, "realtime_priority": 49,
                        "realtime": True}
    assert sc.paced == {**{k: v[1] for k, v in PACED.items()}, **PACED_FLAGS}
    sc = parse_scenario(MINIMAL + '[paced]\nmax_lateness = "250 us"\nrealtime = false\n',
                        name=NAME)
    assert sc.paced["max_lateness"] == 250e-6 and sc.paced["realtime"] is False
    assert sc.paced["miss_share_max"] == 0.01  # the keys not given keep their defaults
    # --set paced.max_lateness='1 ns' (the CLI's overrides): 1 ns = 1e-9 s (SI prefix n)
    sc = parse_scenario(MINIMAL, name=NAME, overrides={"paced.max_lateness": "1 ns",
                                                       "paced.miss_share_max": 0,
                                                       "paced.realtime_priority": 20})
    assert sc.paced["max_lateness"] == 1e-9 and sc.paced["miss_share_max"] == 0.0
    assert sc.paced["realtime_priority"] == 20 and isinstance(sc.paced["realtime_priority"], int)
    assert "paced.max_lateness" in sc.text  # the run folder records what ran


def test_the_start_excitation_key():
    """[initial] v_out_offset: default 0.25 % of the start voltage below the equilibrium; a
    percentage or a voltage (a bare number is volts, as every bare number is SI); 0 = off."""
    sc = parse_scenario(MINIMAL, name=NAME)
    assert sc.v_out_offset == (-0.25, "%") and sc.offset_volts(400.0) == -1.0
    for given, spec, at_200 in (('"-0.5 V"', (-0.5, "V"), -0.5), ('"0 V"', (0.0, "V"), 0.0),
                                ("0", (0.0, "V"), 0.0), ('"+1 %"', (1.0, "%"), 2.0),
                                ('"-250 mV"', (-0.25, "V"), -0.25), ('" -2 % "', (-2.0, "%"), -4.0),
                                ("-1.5", (-1.5, "V"), -1.5), ('"0 %"', (0.0, "%"), 0.0)):
        sc = parse_scenario(MINIMAL + f"[initial]\nv_out_offset = {given}\n", name=NAME)
        assert sc.v_out_offset == spec, given
        assert sc.offset_volts(200.0) == at_200, given
        assert sc.v_out0 is None  # the start voltage stays "auto"
    sc = parse_scenario(MINIMAL + '[initial]\nv_out = "300 V"\nv_out_offset = "-3 V"\n', name=NAME)
    assert sc.v_out0 == 300.0 and sc.v_out_offset == (-3.0, "V")


def test_partly_given_section_keeps_the_other_defaults():
    sc = parse_scenario(demo('L1 = "150 uH"', 'L1 = "0.25 mH"').replace('C2 = "680 uF"\n', ""),
                        name=NAME)
    assert sc.plant.values["L1"] == 2.5e-4
    assert sc.plant.values["C2"] == sc.plant.plugin.declaration.param("C2").default


def test_demo_text_is_kept_byte_for_byte(demo_path):
    sc = load_scenario(demo_path)
    assert sc.text == Path(demo_path).read_text(encoding="utf-8")
    assert sc.path == str(demo_path) and sc.demo_data is True


def test_relative_plugin_path_is_resolved_from_the_scenario_folder(tmp_path, monkeypatch):
    source = (files("hilrig.plugins") / "controllers" / "cascaded_pi.py").read_text(encoding="utf-8")
    (tmp_path / "cases" / "mine").mkdir(parents=True)
    plugin_file = tmp_path / "cases" / "mine" / "my_pi.py"
    plugin_file.write_text(edit(source, 'name="cascaded_pi"', 'name="my_pi"'), encoding="utf-8")
    scenario_file = tmp_path / "cases" / "run.toml"
    scenario_file.write_text(minimal(CONTROLLER, '[controller]\nplugin = "mine/my_pi.py"\nKp_v = 4\n'),
                             encoding="utf-8")
    # run from elsewhere: resolving against the working folder would not find the file
    (tmp_path / "elsewhere").mkdir()
    monkeypatch.chdir(tmp_path / "elsewhere")
    sc = load_scenario(Path("..") / "cases" / "run.toml")
    assert sc.controller.plugin.name == "my_pi"
    assert sc.controller.plugin.origin == ("file", str(plugin_file.resolve()))
    assert sc.controller.values["Kp_v"] == 4.0


# --- property: random values in any key give a Scenario or a ScenarioError, nothing else --------

_KEYS = ["title", "mode", "seed", "demo_data", "timing", "timing.Ts", "timing.substeps",
         "timing.duration", "plant", "plant.plugin", "plant.L1", "plant.R2", "controller.Kp_v",
         "reference.plugin", "reference.points", "shaping.order", "shaping.pole", "load",
         "load.points", "load.interpolation", "limits.safe_u", "interlocks", "initial.v_out",
         "initial.v_out_offset",
         "recording", "recording.chunk", "recording.compression", "paced", "paced.realtime",
         "paced.max_lateness", "paced.miss_share_max", "paced.realtime_priority", "unknown"]
_scalars = (st.booleans() | st.integers(-2**63, 2**63 - 1) | st.floats()
            | st.sampled_from(["", "fast", "200 uH", "50 us", "-1 V", "1e999 V", "open", "auto",
                               "v_out", "sil", "gzip", "linear"])
            | st.text(max_size=8))
_values = st.recursive(_scalars, lambda inner: st.lists(inner, max_size=3)
                       | st.dictionaries(st.sampled_from(["t", "P", "R", "I", "signal", "above",
                                                          "below", "debounce", "x"]),
                                         inner, max_size=3),
                       max_leaves=6)


@settings(max_examples=150, deadline=None)
@given(key=st.sampled_from(_KEYS), value=_values)
def test_any_value_anywhere_is_a_scenario_or_a_scenario_error(key, value):
    try:
        sc = parse_scenario(MINIMAL, name=NAME, overrides={key: value})
    except ScenarioError as exc:
        assert str(exc).startswith(f"{NAME}: ")
        return
    assert math.isfinite(sc.Ts) and sc.n_ticks >= 1


def test_table_columns_are_bounded(demo_path):
    # RC pairs need R > 0 and C > 0: exp(-Ts/(R C)) must lie in (0, 1) for a decaying RC voltage
    # (physics of the RC pair, textbook)
    text = Path(demo_path).read_text()
    bad = re.sub(r"rc_pairs = .*", 'rc_pairs = [["-0.6 mohm", "50 kF"]]', text)
    with pytest.raises(ScenarioError, match=r"case\.toml: reference\.rc_pairs\[0\]\.R = -0\.0006 ohm is outside \(0, 10\] ohm"):
        parse_scenario(bad, name="case.toml")
    bad = re.sub(r"rc_pairs = .*", 'rc_pairs = [["0.6 mohm", "0 F"]]', text)
    with pytest.raises(ScenarioError, match=r"reference\.rc_pairs\[0\]\.C = 0 F is outside \(0, 1e\+09\] F"):
        parse_scenario(bad, name="case.toml")


@pytest.mark.parametrize("text", ["", "\n\n", "# only a comment\n"])
def test_an_empty_scenario_is_refused_naming_what_it_would_run(text):
    # an empty file would run every default: 800 V DC link, 1 s, no interlocks
    with pytest.raises(ScenarioError) as e:
        parse_scenario(text, name=NAME)
    msg = str(e.value)
    assert msg.startswith(f"{NAME}: the scenario is empty") and "800 V" in msg
    assert "no interlocks" in msg and 'title = "defaults"' in msg
    # the way out the message names works
    assert parse_scenario('title = "defaults"\n', name=NAME).title == "defaults"


@pytest.mark.parametrize("depth", [5000, 20])
def test_deeply_nested_arrays_are_one_clear_error(depth):
    # 5000 levels: beyond the TOML reader's recursion; 20: readable, but beyond MAX_NESTING
    text = 'title = "x"\n[reference]\nplugin = "profile"\npoints = ' + "[" * depth + "]" * depth + "\n"
    with pytest.raises(ScenarioError) as e:
        parse_scenario(text, name=NAME)
    msg = str(e.value)
    assert msg.startswith(f"{NAME}: ") and "nest" in msg and "8" in msg, msg


@pytest.mark.parametrize("where, text", [
    ("title", 'title = "\\u001b[2J\\u001b[31mred"\n'),
    ("description", 'title = "x"\ndescription = "bell \\u0007"\n'),
    ("interlocks[0].signal", 'title = "x"\n[[interlocks]]\nsignal = "v_out\\u009b"\nabove = "480 V"\n'),
])
def test_control_characters_in_a_scenario_are_refused(where, text):
    # terminal escape codes (ESC U+001B, BEL U+0007, CSI U+009B: C0/C1 controls, Unicode
    # category Cc) must not reach the terminal raw
    with pytest.raises(ScenarioError) as e:
        parse_scenario(text, name=NAME)
    msg = str(e.value)
    assert msg.startswith(f"{NAME}: {where} holds the control character U+00"), msg
    assert "\x1b" not in msg and "\x07" not in msg and "\x9b" not in msg
    # tab and newline stay allowed in text
    assert parse_scenario('title = "a\\tb"\ndescription = """two\nlines"""\n', name=NAME).title == "a\tb"
