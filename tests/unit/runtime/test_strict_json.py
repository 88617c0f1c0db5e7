"""The JSON hilrig writes for runs and suites is strict JSON: RFC 8259, section 6, has no NaN
or Infinity (Python's json module writes them unless told not to, and strict readers refuse
them), so a number without a finite value is written as null. Finite numbers keep every bit
(Python's float repr round-trips float64)."""
import json
import math

import numpy as np
import pytest

from hilrig.runtime.recording import dumps_json, finite_or_none


def strict_loads(text: str):
    """json.loads that refuses the NaN / Infinity / -Infinity tokens RFC 8259 does not have."""
    def refuse(token):
        raise ValueError(f"not JSON (RFC 8259, sec. 6): {token}")
    return json.loads(text, parse_constant=refuse)


def test_strict_loads_refuses_what_plain_json_dumps_writes():
    with pytest.raises(ValueError, match="RFC 8259"):
        strict_loads(json.dumps({"x": math.nan}))


def test_non_finite_numbers_become_null_at_any_depth():
    obj = {"a": math.nan, "b": [1.0, math.inf, (-math.inf, 2)], "c": {"d": np.float64("nan"),
           "e": np.float64(0.1), "f": None, "g": "nan", "h": True, "i": 3}}
    back = strict_loads(dumps_json(obj, indent=2))
    assert back == {"a": None, "b": [1.0, None, [None, 2]],
                    "c": {"d": None, "e": 0.1, "f": None, "g": "nan", "h": True, "i": 3}}


def test_finite_values_round_trip_bit_for_bit():
    rng = np.random.default_rng(1)
    vals = [float(v) for v in rng.normal(0, 1e3, 200)] + [5e-324, 1.7976931348623157e308, -0.0]
    back = strict_loads(dumps_json({"v": vals}))["v"]
    assert np.array_equal(np.array(back).view(np.int64), np.array(vals).view(np.int64))


def test_the_input_is_not_changed():
    obj = {"m": [math.nan]}
    finite_or_none(obj)
    assert math.isnan(obj["m"][0])


def test_compare_json_view_and_comparison_json_are_strict(tmp_path, monkeypatch, demo_path):
    """comparison.json and compare --json of a candidate whose run had no reference step and a
    non-finite metric: null, not NaN (the runs themselves are stubbed: no loop is compiled)."""
    from hilrig.runtime.trials import compare as cmp
    from hilrig.runtime.run import RunResult

    def fake_run(sc, folder, **kw):
        folder.mkdir(parents=True)
        return RunResult(folder=folder, summary={
            "segments": [], "completed": False, "end_event": "voltage collapse",
            "metrics": {"iae_Vs": math.nan, "rms_error_V": math.nan, "max_abs_error_V": math.inf,
                        "saturation_time_s": 0.0, "trips": 1},
            "timing": {"loop_ns_per_tick": 150.0}})
    monkeypatch.setattr(cmp, "run_scenario", fake_run)
    monkeypatch.setattr(cmp, "plot_comparison", lambda out, results: [])
    results = cmp.compare(demo_path, ["cascaded_pi"], tmp_path / "c")
    on_disk = strict_loads((tmp_path / "c" / "comparison.json").read_text())
    assert on_disk["cascaded_pi"]["rise_time_s"] is None
    assert on_disk["cascaded_pi"]["iae_Vs"] is None and on_disk["cascaded_pi"]["trips"] == 1
    view = strict_loads(dumps_json(cmp.json_view(results)))
    assert set(view["cascaded_pi"]) == set(cmp.JSON_FIELDS)
    assert view["cascaded_pi"]["outcome"]["status"] == "collapsed"
    assert view["cascaded_pi"]["max_abs_error_V"] is None
    assert view["cascaded_pi"]["compute_ns_per_tick"] == 150.0
