"""FMU plants (runtime/fmu): an FMU of the two-stage LC plant, built from C source at test time
(tests/fmu/two_stage_lc.c, the same equations, load model, clamp and diode model as
plugins/plants/two_stage_lc.py; FMI 2.0 and 3.0), as the plant of a SIL run, through model exchange (the
loop's RK4 over the FMU's derivatives) and co-simulation (one fmi2DoStep per period, the FMU
integrating with its own RK4 steps).

* The FMU's derivatives, called by address from compiled code, equal the circuit's equations
  written out here (Erickson and Maksimovic, Fundamentals of Power Electronics, 2nd ed., ch. 3
  and 7, from memory; the equations as in /work/shared/CHECKS.md), and its start state equals
  the closed-form equilibrium i1 = i2 = i_load, v1 = v2 + R2 i_load (derived there).
* The model-exchange recording equals the embedded plant's within round-off: the FMU computes
  the same derivatives with the same operations (compiled without contraction into fused
  multiply-adds), but the embedded plant steps with its own rk4_step, the same RK4 in another
  order (a few units in the last place per step, its docstring), and the start state comes
  from Newton's method rather than the closed form (again round-off). Bound: 1e-11 of each
  signal's largest magnitude (seen: below 1e-14; 600 ticks of 4 sub-steps).
* The co-simulation recording, with the FMU's internal RK4 steps equal to the scenario's
  substeps, equals the model-exchange recording bit for bit: the FMU's doStep is the loop's
  generic RK4 stages written in C. The FMI 3.0 build of the same model records the same.
* Every mismatch of the mapping with modelDescription.xml is one clear message, and exit 2
  from the command line.
"""
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario, parse_scenario
from tests.fmu import build as fmu_build

pytestmark = pytest.mark.skipif(fmu_build.compiler() is None, reason="needs a C compiler")

SIGNALS = ("v_out", "i_out", "i_L1", "v_C1", "i_L2", "u", "v_ref")
CLI = [sys.executable, "-m", "hilrig.runtime.cli"]


@pytest.fixture(scope="module")
def fmu(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("fmu")
    lib = fmu_build.compile_library(tmp / "build")
    return tmp, lib, fmu_build.pack(tmp, lib)


def _write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def runs(fmu):
    tmp, _, path = fmu
    out = {}
    for tag, text in (("embedded", fmu_build.scenario(None)),
                      ("me", fmu_build.scenario(path)),
                      ("cs", fmu_build.scenario(path, "co_simulation", "n_sub = 4"))):
        sc = load_scenario(_write(tmp, f"{tag}.toml", text))
        out[tag] = open_run(run_scenario(sc, tmp / f"run_{tag}").folder)
    return out


def test_fmu_derivatives_are_the_circuit_equations(fmu):
    tmp, _, path = fmu
    sc = load_scenario(_write(tmp, "deriv.toml", fmu_build.scenario(path)))
    from hilrig.runtime.run import build_context
    mod = sc.plant.plugin.module
    p = sc.plant.plugin.declaration.pack(sc.plant.values, build_context(sc))
    # the circuit's equations (Erickson and Maksimovic, ch. 3 and 7, from memory), with the
    # demo's component values (the FMU's start values; the plugin's defaults) and the summed
    # load i = P / v + G v + I above v_load_min (plugins/plants/loads.py's model)
    V_dc, L1, R1, C1, L2, R2, C2 = 800.0, 150e-6, 5e-3, 220e-6, 100e-6, 3e-3, 680e-6
    rng = np.random.default_rng(7)
    for _ in range(20):
        x = rng.uniform([-50, 300, -50, 300], [300, 600, 300, 600])
        u = rng.uniform(-100.0, 900.0)
        d = np.array([rng.uniform(-40e3, 80e3), rng.uniform(0, 0.1), rng.uniform(-20, 20)])
        i1, v1, i2, v2 = x
        uc = min(max(u, 0.0), V_dc)  # the command clamped to [0, V_dc]
        iload = d[0] / v2 + d[1] * v2 + d[2]
        want = [(uc - R1 * i1 - v1) / L1, (i1 - i2) / C1, (v1 - R2 * i2 - v2) / L2, (i2 - iload) / C2]
        got = mod.derivs(0.0, p, tuple(x), np.array([u]), d)
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-9)
        y = np.zeros(6)
        mod.outputs(0.0, p, x, np.array([u]), d, y)
        np.testing.assert_allclose(y, [v2, iload, i1, v1, i2, V_dc], rtol=1e-14)


def test_fmu_start_state_is_the_closed_form_equilibrium(fmu):
    tmp, _, path = fmu
    sc = load_scenario(_write(tmp, "eq.toml", fmu_build.scenario(path, plant_keys='R2 = "10 mohm"')))
    d = np.array([100e3, 0.0, 0.0])
    x = sc.plant.plugin.declaration.equilibrium(sc.plant.values, 400.0, d)
    # i1 = i2 = P / v2, v1 = v2 + R2 P / v2 (CHECKS.md, derived): 250 A, 402.5 V
    np.testing.assert_allclose(x, [250.0, 402.5, 250.0, 400.0], rtol=1e-12)


def test_me_recording_equals_embedded_plant_within_round_off(runs):
    a, b = runs["embedded"], runs["me"]
    assert a.summary["outcome"]["status"] == b.summary["outcome"]["status"] == "completed"
    assert b.summary["plant"] == "fmu:two_stage_lc.fmu"
    assert a.time.shape == b.time.shape == (600,)
    for name in SIGNALS:
        ref = a.signals[name]
        assert np.max(np.abs(b.signals[name] - ref)) <= 1e-11 * np.max(np.abs(ref)), name
    # the load step is in the recording: the plant saw the load
    assert b.signals["i_out"][-1] > 1.5 * b.signals["i_out"][100]


def test_cs_recording_equals_me_bit_for_bit(runs):
    a, b = runs["me"], runs["cs"]
    assert b.summary["outcome"]["status"] == "completed"
    assert b.summary["integration"]["rule"] == "plant"  # one fmi2DoStep per period
    for name in SIGNALS:
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name


def test_fmi3_recordings_equal_fmi2_bit_for_bit(fmu, runs):
    """The same model behind the FMI 3.0 functions (fmi3SetFloat64, fmi3GetContinuousState-
    Derivatives, fmi3DoStep, ...): model exchange and co-simulation record what the FMI 2.0
    model exchange run records, bit for bit."""
    tmp, _, _ = fmu
    path = fmu_build.pack(tmp, fmu_build.compile_library(tmp / "build", 3), "fmi3.fmu", version=3)
    for tag, text in (("me3", fmu_build.scenario(path)),
                      ("cs3", fmu_build.scenario(path, "co_simulation", "n_sub = 4"))):
        res = run_scenario(load_scenario(_write(tmp, f"{tag}.toml", text)), tmp / f"run_{tag}")
        assert res.summary["outcome"]["status"] == "completed"
        assert "FMI 3.0" in load_scenario(tmp / f"{tag}.toml").plant.plugin.declaration.source
        run = open_run(res.folder)
        for name in SIGNALS:
            assert run.signals[name].tobytes() == runs["me"].signals[name].tobytes(), (tag, name)


def test_cs_rerun_in_the_same_process_repeats_the_run(fmu, runs):
    """The FMU instance lives on between runs; the kernel resets it to the run's start state."""
    tmp, _, path = fmu
    sc = load_scenario(tmp / "cs.toml")
    again = open_run(run_scenario(sc, tmp / "run_cs_again").folder)
    for name in SIGNALS:
        assert again.signals[name].tobytes() == runs["cs"].signals[name].tobytes(), name


def test_fmu_error_status_trips_the_run(fmu):
    """An FMI error (here fmi2DoStep refusing zero internal steps) gives NaN states: the run
    ends at once with a plant integration error, as any plant whose state is not finite."""
    tmp, _, path = fmu
    sc = load_scenario(_write(tmp, "bad.toml", fmu_build.scenario(path, "co_simulation", "n_sub = 0")))
    res = run_scenario(sc, tmp / "run_bad")
    out = res.summary["outcome"]
    assert out["status"] == "integration error" and "not finite" in out["first_cause"]
    assert out["end_time_s"] == pytest.approx(50e-6)


def test_release_all_frees_the_instances_and_a_new_run_instantiates_again(fmu, runs):
    from hilrig.runtime.fmu import instance
    tmp, _, _ = fmu
    assert instance._LIVE
    live = list(instance._LIVE.values())
    instance.release_all()
    assert not instance._LIVE and all(i.me is None and i.cs is None for i in live)
    again = open_run(run_scenario(load_scenario(tmp / "me.toml"), tmp / "run_me_again").folder)
    assert again.signals["v_out"].tobytes() == runs["me"].signals["v_out"].tobytes()


# -- every mismatch: one clear message naming the file, the key, the variable and the fix ----------

def _edit_case(edit, **kw):
    return dict(edit=edit, **kw)


_U_LINE = 'description="converter voltage command"><Real unit="V" start="0.0"/>'
_U3 = ('<Float64 name="u_conv" valueReference="10" causality="input" variability="continuous" '
       'description="converter voltage command" unit="V"')
_VC2 = 'name="filter.vC2" valueReference="23" causality="local" variability="continuous" initial="exact"'
CASES = {
    # the model description
    "fmi version": (dict(edit={'fmiVersion="2.0"': 'fmiVersion="1.0"'}), {},
                    ["plant.fmu", "FMI 1.0", "export it as FMI 2.0 or 3.0"]),
    "unit of an input, FMI 3.0": (dict(version=3, edit={_U3: _U3.replace('unit="V"', 'unit="W"')}), {},
                                  ["plant.inputs.u", "'u_conv'", "is in W", "signal is in V"]),
    "type of an input, FMI 3.0": (dict(version=3, edit={_U3: _U3.replace("Float64", "Float32")}), {},
                                  ["plant.inputs.u", "type Float32", "Float64 variables only"]),
    "unit of an input": (dict(edit={_U_LINE: _U_LINE.replace('unit="V"', 'unit="A"')}), {},
                         ["plant.inputs.u", "'u_conv'", "is in A", "signal is in V", "map a variable in V"]),
    "type of an input": (dict(edit={_U_LINE: 'description="converter voltage command"><Integer start="0"/>'}), {},
                         ["plant.inputs.u", "type Integer", "Real variables only"]),
    "interface not offered": (dict(interfaces=("me",)), dict(interface="co_simulation"),
                              ["plant.interface", "does not offer co simulation", "offers: model_exchange"]),
    "event indicators": (dict(edit={'numberOfEventIndicators="0"': 'numberOfEventIndicators="2"'}), {},
                         ["plant.fmu", "2 event indicators", "export it without event indicators"]),
    "completed integrator step": (dict(edit={'completedIntegratorStepNotNeeded="true"': ""}), {},
                                  ["fmi2CompletedIntegratorStep", "completedIntegratorStepNotNeeded"]),
    "cs state without a start value": (dict(edit={_VC2: _VC2.replace(' initial="exact"', "")}),
                                       dict(interface="co_simulation"),
                                       ["plant.states.v_out", "'filter.vC2'", "initial = \"exact\""]),
    # the scenario's mapping
    "unknown variable": ({}, dict(mapping=fmu_build.MAPPING.replace('"y_vout"', '"y_vot"')),
                         ["plant.outputs.v_out", "no variable 'y_vot'", "did you mean 'y_vout'"]),
    "wrong causality": ({}, dict(mapping=fmu_build.MAPPING.replace('u = "u_conv"', 'u = "y_vout"')),
                        ["plant.inputs.u", "causality 'output'", "input is needed"]),
    "command not mapped": ({}, dict(mapping=fmu_build.MAPPING.replace('u = "u_conv"\n', "")),
                           ["plant.inputs", "command u is not mapped", 'add u = '])
    ,
    "v_out not mapped": ({}, dict(mapping=fmu_build.MAPPING.replace('v_out = "y_vout"\n', "")),
                         ["plant.outputs", "v_out is not mapped"]),
    "unknown input signal": ({}, dict(mapping=fmu_build.MAPPING.replace('P_load = "load_P"', 'P_lod = "load_P"')),
                             ["plant.inputs.P_lod", "did you mean 'P_load'"]),
    "not a state": ({}, dict(mapping=fmu_build.MAPPING.replace('v_out = "filter.vC2"', 'v_out = "y_vout"')),
                    ["plant.states.v_out", "not a continuous state", "filter.vC2"]),
    "state not mapped": ({}, dict(mapping=fmu_build.MAPPING.replace('i_L2 = "filter.iL2"\n', "")),
                         ["plant.states", "'filter.iL2'", "not mapped"]),
    "unit of a state": ({}, dict(mapping=fmu_build.MAPPING.replace('v_C1 = "filter.vC1"', 'v_C1 = "filter.iL1"')
                                 .replace('i_L1 = "filter.iL1"\n', "").replace("[plant.states]\n", '[plant.states]\ni_L1 = "filter.vC1"\n')),
                        ["plant.states.", "is in", "map a variable in"]),
    "unknown parameter": ({}, dict(plant_keys='L_1 = "150 uH"'),
                          ["plant.L_1", "no real parameter 'L_1'", "did you mean 'L1'"]),
    "parameter unit": ({}, dict(plant_keys='L1 = "150 uF"'), ["plant.L1", "150 uF"]),
    "plugin and fmu": ({}, dict(plant_keys='plugin = "two_stage_lc"'), ["plant.plugin", "remove one"]),
    "bad interface": ({}, dict(interface="modelexchange"), ["plant.interface", "did you mean 'model_exchange'"]),
}


def test_event_indicators_refuse_model_exchange_only(fmu):
    """An FMU with event indicators that offers both interfaces: as model exchange it is refused
    (the importer would have to locate the state events, which hilrig's loop does not), as
    co-simulation it is taken (a co-simulation FMU locates its own events inside its step; FMI
    2.0 standard, section 4, from memory). The first reading refused both."""
    tmp, lib, _ = fmu
    edit = {'numberOfEventIndicators="0"': 'numberOfEventIndicators="2"'}
    path = fmu_build.pack(tmp, lib, "events_both.fmu", edit=edit)
    with pytest.raises(ScenarioError, match="2 event indicators"):
        parse_scenario(fmu_build.scenario(path), name="case.toml", path=str(tmp / "case.toml"))
    sc = parse_scenario(fmu_build.scenario(path, interface="co_simulation"), name="case.toml",
                        path=str(tmp / "case.toml"))
    assert sc.plant.plugin.module.SPEC["interface"] == "cs"


@pytest.mark.parametrize("case", sorted(CASES))
def test_mismatch_is_one_clear_message(fmu, case):
    tmp, lib, _ = fmu
    build_kw, scen_kw, words = CASES[case]
    name = case.replace(" ", "_").replace(",", "").replace(".", "") + ".fmu"
    if build_kw.get("version") == 3:
        lib = fmu_build.compile_library(tmp / "build", 3)
    path = fmu_build.pack(tmp, lib, name, **build_kw) if build_kw else tmp / "two_stage_lc.fmu"
    text = fmu_build.scenario(path, **scen_kw)
    with pytest.raises(ScenarioError) as err:
        parse_scenario(text, name="case.toml", path=str(tmp / "case.toml"))
    msg = str(err.value)
    assert msg.startswith("case.toml: ") and "\n" not in msg
    for w in words:
        assert w in msg, (w, msg)


def test_missing_and_broken_fmu_files_are_refused(fmu, tmp_path):
    _, _, path = fmu
    text = fmu_build.scenario(tmp_path / "nothing.fmu")
    with pytest.raises(ScenarioError, match="the FMU file does not exist"):
        parse_scenario(text, path=str(tmp_path / "a.toml"))
    (tmp_path / "junk.fmu").write_text("not a zip")
    with pytest.raises(ScenarioError, match="not an FMU"):
        parse_scenario(fmu_build.scenario(tmp_path / "junk.fmu"), path=str(tmp_path / "a.toml"))
    # a relative path is taken from the scenario's folder
    sc = parse_scenario(fmu_build.scenario(Path(path.name)), path=str(path.parent / "a.toml"))
    assert sc.plant.plugin.name == "fmu:two_stage_lc.fmu"


def test_command_line_exits_2_with_one_line(fmu, tmp_path):
    tmp, lib, _ = fmu
    # a mapping mistake, and an FMU without a binary for this platform (found when it is
    # instantiated, before the run)
    bad_map = _write(tmp_path, "bad_map.toml", fmu_build.scenario(
        tmp / "two_stage_lc.fmu", mapping=fmu_build.MAPPING.replace('"y_vout"', '"y_vot"')))
    import zipfile
    nobin = tmp_path / "nobin.fmu"
    with zipfile.ZipFile(tmp / "two_stage_lc.fmu") as src, zipfile.ZipFile(nobin, "w") as dst:
        dst.writestr("modelDescription.xml", src.read("modelDescription.xml"))
    no_binary = _write(tmp_path, "no_binary.toml", fmu_build.scenario(nobin))
    for scen, words in ((bad_map, "y_vot"), (no_binary, "could not be instantiated")):
        p = subprocess.run(CLI + ["run", str(scen), "--headless", "--out", str(tmp_path / "r")],
                           capture_output=True, text=True, timeout=600)
        assert p.returncode == 2, p.stdout + p.stderr
        assert "Traceback" not in p.stdout + p.stderr
        err = [ln for ln in (p.stdout + p.stderr).splitlines() if ln.startswith("error:")]
        assert len(err) == 1 and words in err[0], p.stdout + p.stderr


def test_fmu_with_units_and_cs_only_design_are_refused(fmu, tmp_path):
    tmp, lib, path = fmu
    with pytest.raises(ScenarioError, match=r"plant\.fmu = .* with \[units\]: an FMU plant does not "
                                            r"run as paralleled units yet"):
        parse_scenario(fmu_build.scenario(path) + "\n[units]\ncount = 2\n", path=str(tmp / "u.toml"))
    cs_only = fmu_build.pack(tmp_path, lib, "cs_only.fmu", interfaces=("cs",))
    text = fmu_build.scenario(cs_only, "co_simulation", "n_sub = 4")
    with pytest.raises(ScenarioError, match=r"offers co-simulation only, which gives no derivatives "
                                            r"to design the controller from; set \[design\] defaults"):
        parse_scenario(text.replace('defaults = "declared"', 'defaults = "plant"'), path=str(tmp / "c.toml"))


def test_cs_only_fmu_starts_from_its_start_values(fmu, tmp_path):
    """Without model exchange there are no derivatives to find the steady state with: the
    states start at the FMU's start values (0 here), the v_out state at the start voltage;
    the run then follows the co-simulation FMU (its first step from that state)."""
    tmp, lib, _ = fmu
    cs_only = fmu_build.pack(tmp_path, lib, "cs_only.fmu", interfaces=("cs",))
    sc = parse_scenario(fmu_build.scenario(cs_only, "co_simulation", "n_sub = 4"),
                        path=str(tmp_path / "c.toml"))
    decl = sc.plant.plugin.declaration
    np.testing.assert_array_equal(decl.equilibrium(sc.plant.values, 400.0, np.array([20e3, 0, 0])),
                                  [0.0, 0.0, 0.0, 400.0])
    run = open_run(run_scenario(sc, tmp_path / "r").folder)
    assert run.summary["outcome"]["status"] == "completed"
    # the first tick: 400 V less the offset of the excitation, no current yet
    assert run.signals["i_L1"][0] == 0.0 and abs(run.signals["v_out"][0] - 399.0) < 1e-9


def test_fmu_plant_without_jit_is_refused_plainly(fmu, tmp_path):
    """Debugging with NUMBA_DISABLE_JIT=1: the kernels' calls by address need compiled code."""
    tmp, _, path = fmu
    scen = _write(tmp_path, "nojit.toml", fmu_build.scenario(path))
    import os
    p = subprocess.run(CLI + ["run", str(scen), "--headless", "--out", str(tmp_path / "r")],
                       capture_output=True, text=True, timeout=600,
                       env={**os.environ, "NUMBA_DISABLE_JIT": "1"})
    assert p.returncode == 2 and "Traceback" not in p.stdout + p.stderr, p.stdout + p.stderr
    assert "NUMBA_DISABLE_JIT=1 switches off; run without it" in p.stdout + p.stderr


TRIP = '\n[[interlocks]]\nsignal = "v_out"\nabove = "480 V"\n'


def test_gate_block_trip_equals_embedded_plant(fmu, tmp_path):
    """The 100 V step trips an over-voltage interlock at 480 V; the safe action gate_block
    blocks the gates. With gate_block_currents = ["i_L1"] the FMU gets the command as NaN (its
    switch node follows the diodes, as the plugin's) and the loop stops i_L1 at zero, as for the
    embedded plant: the recordings agree within round-off (as above), through the trip and the
    collapse that follows, and i_L1 stops at exactly 0 (the freewheeling diode's current stops;
    common practice, no source). Without the key the FMU plant does not
    model blocked gates and gets zero volts instead (said in the summary)."""
    tmp, _, path = fmu
    runs = {}
    for tag, text in (("embedded", fmu_build.scenario(None)),
                      ("gate", fmu_build.scenario(path, plant_keys='gate_block_currents = ["i_L1"]')),
                      ("plain", fmu_build.scenario(path))):
        res = run_scenario(load_scenario(_write(tmp_path, f"{tag}.toml", text + TRIP)), tmp_path / tag)
        runs[tag] = (res.summary, open_run(res.folder))
    (se, a), (sg, b), (sp, c) = runs["embedded"], runs["gate"], runs["plain"]
    assert "interlock" in se["outcome"]["first_cause"] and se["outcome"]["first_cause"] == sg["outcome"]["first_cause"]
    assert sg["safe_state"]["applied"] == "gate_block"
    assert sp["safe_state"]["applied"].startswith("zero_voltage")
    for name in SIGNALS:
        ref = a.signals[name]
        assert np.max(np.abs(b.signals[name] - ref)) <= 1e-11 * np.nanmax(np.abs(ref)), name
    # after the trip the first-stage current freewheels to zero within two ticks and stays
    # there (until the collapse takes v_C1 below zero and the low-side diode conducts)
    k = int(np.argmax(b.signals["interlock_word"] != 0))
    assert k > 0 and b.signals["i_L1"][k - 1] > 100.0
    assert np.all(b.signals["i_L1"][k + 2:k + 40] == 0.0) and np.all(a.signals["i_L1"][k + 2:k + 40] == 0.0)
    n = min(c.time.shape[0], a.time.shape[0])
    assert not np.allclose(c.signals["v_out"][:n], a.signals["v_out"][:n])


def test_gate_block_currents_must_be_current_states(fmu):
    tmp, _, path = fmu
    for keys, words in (('gate_block_currents = ["i_L9"]', "'i_L9' is not a state of this FMU plant; did you mean"),
                        ('gate_block_currents = ["v_C1"]', "state 'v_C1' is in V; name a current"),
                        ('gate_block_currents = "i_L1"', "is not a list of state names")):
        with pytest.raises(ScenarioError, match=re.escape(words)):
            parse_scenario(fmu_build.scenario(path, plant_keys=keys), path=str(tmp / "g.toml"))
