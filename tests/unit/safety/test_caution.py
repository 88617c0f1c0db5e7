"""The high-voltage caution: shown for every voltage above 60 V DC that can be present on the
equipment a scenario describes, not for a controller's default clamp.

60 V DC is the upper limit of voltage class A (ISO 6469-3, as safety/caution.py cites; from
memory). The 48 V scenario below is invented test data: a 48 V DC link feeding a 24 V output.
"""
from pathlib import Path

import pytest

from hilrig.runtime.scenario import load_scenario, parse_scenario
from hilrig.safety.caution import (CLASS_B_DC_V, caution_text, hazardous_voltages,
                                   scenario_voltages)
from hilrig.safety.suite import load_suite

ROOT = Path(__file__).resolve().parents[3]
NAME = "case.toml"

#: a 48 V-class scenario (test data): nothing in it exceeds 60 V, but the cascaded PI's default
#: command clamp u_max is 10 kV (plugins/controllers/cascaded_pi.py)
LOW_48V = """\
title = "48 V DC link, 24 V output (test data)"

[timing]
Ts = "50 us"
duration = "40 ms"

[plant]
plugin = "two_stage_lc"
V_dc = "48 V"

[controller]
plugin = "cascaded_pi"

[reference]
plugin = "profile"
points = [[0, "24 V"], ["10 ms", "24 V"], ["10 ms", "28 V"]]

[[load.points]]
t = 0
P = "500 W"

[limits]
v_collapse = "5 V"

[[interlocks]]
signal = "v_out"
above = "36 V"
"""


def edit(text: str, old: str, new: str) -> str:
    assert text.count(old) == 1, f"base scenario no longer contains {old!r} exactly once"
    return text.replace(old, new)


def caution(text: str, overrides=None):
    sc = parse_scenario(text, name=NAME, overrides=overrides)
    return caution_text(scenario_voltages(sc)), hazardous_voltages(scenario_voltages(sc))


def test_a_48_v_scenario_shows_no_caution():
    sc = parse_scenario(LOW_48V, name=NAME)
    # the default clamp is there, and above 60 V: it must not count
    assert sc.controller.values["u_max"] > CLASS_B_DC_V
    text, hv = caution(LOW_48V)
    assert text is None and hv == []
    names = dict(scenario_voltages(sc))
    assert names["plant.V_dc"] == 48.0 and names["reference.points"] == 28.0
    assert "controller.u_max" not in names


def test_the_demo_still_shows_the_caution(demo_path):
    sc = load_scenario(demo_path)
    text = caution_text(scenario_voltages(sc))
    assert text is not None and "plant.V_dc = 800 V" in text
    hv = dict(hazardous_voltages(scenario_voltages(sc)))
    # the battery model's pack voltage: 108 cells x 4.18 V (the demo OCV table at full charge)
    pack = [v for n, v in hv.items() if n.startswith("reference pack voltage")]
    assert pack == [pytest.approx(108 * 4.18, rel=1e-12)]


def _shipped():
    return sorted(p for p in (ROOT / "examples").glob("*.toml") if "suite" not in p.name)


@pytest.mark.parametrize("path", _shipped(), ids=lambda p: p.name)
def test_every_shipped_example_still_shows_the_caution(path):
    assert caution_text(scenario_voltages(load_scenario(path))) is not None


def test_every_case_of_the_shipped_interlock_suite_still_shows_the_caution():
    suite = load_suite(ROOT / "examples" / "interlock_suite.toml")
    assert suite.cases
    for case in suite.cases:
        sc = parse_scenario(case.text, name=case.name, path=case.scenario_path)
        assert caution_text(scenario_voltages(sc)) is not None, case.name


@pytest.mark.parametrize("old, new, where", [
    # a controller voltage the scenario sets: in its text, even at the default's value
    ('plugin = "cascaded_pi"\n', 'plugin = "cascaded_pi"\nu_max = "100 V"\n', "controller.u_max = 100 V"),
    ('plugin = "cascaded_pi"\n', 'plugin = "cascaded_pi"\nu_max = "10 kV"\n', "controller.u_max = 10000 V"),
    ('plugin = "cascaded_pi"\n', 'plugin = "cascaded_pi"\nu_min = "-80 V"\n', "controller.u_min = 80 V"),
    # the plant's DC link left at its default (800 V) is present
    ('V_dc = "48 V"\n', "", "plant.V_dc = 800 V"),
    ('V_dc = "48 V"\n', 'V_dc = "61 V"\n', "plant.V_dc = 61 V"),
    # the reference's range
    ('["10 ms", "28 V"]', '["10 ms", "70 V"]', "reference.points = 70 V"),
    ('points = [[0, "24 V"], ["10 ms", "24 V"], ["10 ms", "28 V"]]\n', "", "reference.points = 500 V"),
    # the start voltage, the safe output and interlock thresholds
    ('[limits]\n', '[initial]\nv_out = "65 V"\n\n[limits]\n', "initial.v_out = 65 V"),
    ('v_collapse = "5 V"\n', 'v_collapse = "5 V"\nsafe_u = "100 V"\n', "limits.safe_u = 100 V"),
    ('above = "36 V"', 'above = "480 V"', "interlock on v_out = 480 V"),
])
def test_a_48_v_scenario_with_one_voltage_above_60_v_shows_it(old, new, where):
    text, _ = caution(edit(LOW_48V, old, new))
    assert text is not None and where in text, text


def test_a_controller_voltage_set_by_an_override_counts():
    # --set controller.u_max=... and suite cases' set reach the values, not the scenario text
    text, hv = caution(LOW_48V, overrides={"controller.u_max": "90 V"})
    assert text is not None and hv == [("controller.u_max", 90.0)]


def test_a_battery_reference_counts_with_its_pack_voltage():
    battery = ('[reference]\nplugin = "battery_ecm"\nn_series = {n}\n'
               'ocv = [[0.0, "3.0 V"], [1.0, "4.2 V"]]\n')
    ref = '[reference]\nplugin = "profile"\npoints = [[0, "24 V"], ["10 ms", "24 V"], ["10 ms", "28 V"]]\n'
    # the OCV table is test data: 13 x 4.2 V = 54.6 V, a 48 V-class pack: no caution;
    # 15 x 4.2 V = 63 V: caution
    text, hv = caution(edit(LOW_48V, ref, battery.format(n=13)))
    assert text is None and hv == []
    text, hv = caution(edit(LOW_48V, ref, battery.format(n=15)))
    assert text is not None and "reference pack voltage" in text
    assert [v for _, v in hv] == [pytest.approx(63.0, rel=1e-12)]


def test_60_v_itself_is_class_a_and_nan_counts_as_hazardous():
    assert hazardous_voltages([("a", 60.0), ("b", -60.0)]) == []
    assert hazardous_voltages([("a", 60.000001)]) == [("a", 60.000001)]
    assert [n for n, _ in hazardous_voltages([("x", float("nan"))])] == ["x"]


def test_a_reference_the_output_stage_cannot_reach_is_noticed():
    """An averaged buck output stage holds its converter voltage in [0, V_dc] (common practice,
    no source), so a reference above V_dc or below 0 V cannot be followed: a notice, not an
    error (driving a controller into that limit is a legitimate trial)."""
    from hilrig.safety.caution import unreachable_voltages
    assert unreachable_voltages(parse_scenario(LOW_48V, name=NAME)) == []
    high = parse_scenario(edit(LOW_48V, '"28 V"]]', '"28 V"], ["20 ms", "50 V"]]'), name=NAME)
    assert unreachable_voltages(high) == [
        "reference.points = 50 V is above plant.V_dc = 48 V: the output stage cannot reach it, "
        "and the command will sit at its limit"]
    low = parse_scenario(edit(LOW_48V, '"28 V"]]', '"28 V"], ["20 ms", "-5 V"]]'), name=NAME)
    assert unreachable_voltages(low) == [
        "reference.points = -5 V is below 0 V: the output stage cannot reach it"]
    start = parse_scenario(LOW_48V + '\n[initial]\nv_out = "49 V"\n', name=NAME)
    assert [n.split(" =")[0] for n in unreachable_voltages(start)] == ["initial.v_out"]
    # the shipped demo asks nothing its plant cannot give
    demo = load_scenario(ROOT / "runtime" / "data" / "demo.toml")
    assert unreachable_voltages(demo) == []
