"""A stuck v_out sensor against a saturated command (the frozen check, the cross-check), and the
plant's true values recorded beside faulted measurements, in SIL runs of the shipped example
scenarios (invented demo data: examples/step_100V.toml, examples/interlock_base.toml).

The physical check: the demo plant's second stage is a series R2-L2 branch between v_C1 and
v_out, so Kirchhoff's voltage law gives v_C1 - v_out = R2 i_L2 + L2 di_L2/dt (any circuits
handbook). The recorded true v_out satisfies it, by the trapezoidal rule over each tick, to
within the rule's error; a stuck, dropped-out or offset measurement does not.
"""
import json
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import parse_scenario

ROOT = Path(__file__).resolve().parents[2]
STEP = ROOT / "examples" / "step_100V.toml"
BASE = ROOT / "examples" / "interlock_base.toml"
STUCK_AT_10MS = '[[faults]]\nkind = "stuck"\nsignal = "v_out"\nstart = "10 ms"\n'
FAULT_TICK = 200          # 10 ms at Ts = 50 us
R2, L2, TS = 3e-3, 100e-6, 50e-6   # the demo plant's values in both example files
CROSS = ('[[interlocks]]\nsignal = "v_out"\ncross_check = "v_C1"\nband = "15 V"\n'
         'drop = {{ current = "i_L2", R = "3 mohm", L = "100 uH" }}\ndebounce = {deb}\n')


def _run(folder, path: Path, extra: str):
    sc = parse_scenario(path.read_text() + "\n" + extra, name=path.name, path=str(path))
    res = run_scenario(sc, folder)
    return res.summary, open_run(res.folder)


def _kvl_residual(v_c1, v_out, i_l2):
    """v_C1 - v_out - R2 i_L2 - L2 di_L2/dt over each tick, by the trapezoidal rule."""
    d = v_c1 - v_out
    return (0.5 * (d[1:] + d[:-1]) - R2 * 0.5 * (i_l2[1:] + i_l2[:-1])
            - L2 * (i_l2[1:] - i_l2[:-1]) / TS)


# --- item: the frozen check under a saturated command -------------------------------------

@pytest.mark.parametrize("n", [5, 41, 150, 400])
def test_stuck_v_out_trips_the_frozen_check_within_its_count_even_once_u_saturates(tmp_path, n):
    # exact equilibrium start: the fault's own tick counts only if v_out did not move before it
    s, run = _run(tmp_path / "r", STEP, STUCK_AT_10MS + f'[[interlocks]]\nsignal = "v_out"\nfrozen = {n}\n'
                  '[initial]\nv_out_offset = "0 V"\n')
    trip = s["trip"]
    assert trip is not None and trip["cause_id"] == "v_out frozen", s["events"]
    # from the fault's tick on, every tick counts (the command moves, or sits at V_dc): the
    # n-th frozen tick is FAULT_TICK + n - 1, within the count of the fault
    assert trip["tick"] == FAULT_TICK + n - 1
    u, v_dc = run.signals["u"], run.signals["v_dc"]
    if n >= 150:
        # the case the count used to miss: the command sat at the converter's rail before it
        assert np.any(u[FAULT_TICK:trip["tick"]] >= v_dc[FAULT_TICK:trip["tick"]])
    # the safe output from the trip on
    assert np.all(u[trip["tick"]:] == 0.0)


@pytest.mark.parametrize("deb", [1, 3, 20])
def test_stuck_v_out_trips_the_cross_check_against_v_c1_within_its_debounce(tmp_path, deb):
    s, run = _run(tmp_path / "r", STEP, STUCK_AT_10MS + CROSS.format(deb=deb))
    trip = s["trip"]
    assert trip is not None and trip["cause_id"] == "v_out cross_check", s["events"]
    k = trip["tick"]
    assert FAULT_TICK <= k
    # the true voltage, recorded beside the stuck reading, obeys KVL; the disagreement the
    # check saw on the trip tick is the measured v_out minus that law's v_out, beyond 15 V
    true_v = run.signals["true_v_out"]
    assert abs(trip["value"]) > 15.0
    d_true = 0.5 * (true_v[k] + true_v[k - 1])
    d_meas = 0.5 * (run.signals["v_out"][k] + run.signals["v_out"][k - 1])
    assert trip["value"] == pytest.approx(d_meas - d_true, abs=3.0)
    # beyond on each of the deb ticks up to the trip, and first beyond deb - 1 ticks before it
    res = _kvl_residual(run.signals["v_C1"], run.signals["v_out"], run.signals["i_L2"])
    beyond = np.abs(res) > 15.0                    # res[j] is the check on tick j + 1
    assert np.all(beyond[k - deb:k]) and not beyond[k - deb - 1]


def test_the_cross_check_stays_quiet_through_the_100_v_step_and_a_60_kw_load_step(tmp_path):
    s, _ = _run(tmp_path / "a", STEP, CROSS.format(deb=1))
    assert s["trip"] is None and s["outcome"]["status"] == "completed", s["events"]
    s, _ = _run(tmp_path / "b", BASE, CROSS.format(deb=1) + '[[faults]]\nkind = "power_step"\n'
                                        'value = "60 kW"\nstart = "0.1 s"\n')
    assert s["trip"] is None and s["outcome"]["status"] == "completed", s["events"]


# --- item: the true plant state beside the faulted measurement ----------------------------

SHORT = '[[faults]]\nkind = "short_circuit"\nvalue = "1.1 ohm"\nstart = "0.1 s"\n'


@pytest.mark.parametrize("fault", [
    'kind = "stuck"\nsignal = "v_out"',
    'kind = "dropout"\nsignal = "v_out"',
    'kind = "offset"\nsignal = "v_out"\nvalue = "150 V"',
], ids=["stuck", "dropout", "offset"])
def test_a_collapse_behind_a_faulted_v_out_is_recorded_and_reported_with_the_true_voltage(tmp_path, fault):
    s, run = _run(tmp_path / "r", BASE, SHORT + f'[[faults]]\n{fault}\nstart = "0.1 s"\n')
    ev = [e for e in s["events"] if e["event"] == "voltage collapse"]
    assert len(ev) == 1, s["events"]
    ev = ev[0]
    true_v, meas = run.signals["true_v_out"], run.signals["v_out"]
    k = ev["tick"]
    assert k == len(true_v) - 1                     # the collapse tick's row is the last one
    # the event reports the plant's voltage, below limits.v_collapse = 25 V, and the
    # measurement beside it (not finite for a dropout)
    assert ev["v_out_V"] == true_v[k] < 25.0
    assert np.array_equal(ev["v_out_measured_V"], meas[k], equal_nan=True)
    assert not (meas[k] < 25.0)                     # the faulted reading hid the collapse
    assert "(v_out " + f"{ev['v_out_V']:.4g}" + " V)" in s["outcome"]["text"]
    # before the fault the two columns are the same; after it the true one obeys KVL
    k0 = int(np.searchsorted(run.time, 0.1 - 1e-12))
    assert np.array_equal(true_v[:k0], meas[:k0])
    # (the last ticks, where the load pulls the voltage through zero within a tick or two,
    # leave the trapezoidal rule up to about 20 V; a stuck, dropped or offset reading misses
    # the law by far more, or is not a number)
    res_true = _kvl_residual(run.signals["v_C1"], true_v, run.signals["i_L2"])
    assert np.max(np.abs(res_true)) < 25.0
    res_meas = _kvl_residual(run.signals["v_C1"], meas, run.signals["i_L2"])
    assert not np.all(np.abs(res_meas[k0:]) < 100.0)


def test_only_faulted_sensors_get_a_true_column(tmp_path):
    s, run = _run(tmp_path / "a", BASE, SHORT)
    assert not [n for n in run.signals if n.startswith("true_")]
    ev = [e for e in s["events"] if e["event"] == "voltage collapse"][0]
    assert "v_out_measured_V" not in ev and ev["v_out_V"] < 25.0
    s, run = _run(tmp_path / "b", BASE,
                  '[[faults]]\nkind = "offset"\nsignal = "i_L1"\nvalue = "10 A"\nstart = "0.1 s"\n'
                  '[[faults]]\nkind = "noise"\nsignal = "i_L1"\nvalue = "1 A"\nstart = "0.15 s"\n'
                  '[[faults]]\nkind = "gain"\nsignal = "v_C1"\nvalue = 1.01\nstart = "0.1 s"\n'
                  '[[faults]]\nkind = "power_step"\nvalue = "1 kW"\nstart = "0.1 s"\n')
    assert sorted(n for n in run.signals if n.startswith("true_")) == ["true_i_L1", "true_v_C1"]
    k0 = int(np.searchsorted(run.time, 0.1 - 1e-12))
    # an offset of 10 A until the noise starts: measured = true + 10 A, to rounding
    k1 = int(np.searchsorted(run.time, 0.15 - 1e-12))
    assert np.allclose(run.signals["i_L1"][k0:k1], run.signals["true_i_L1"][k0:k1] + 10.0,
                       rtol=0, atol=1e-9)
    assert np.allclose(run.signals["v_C1"][k0:], 1.01 * run.signals["true_v_C1"][k0:],
                       rtol=1e-12, atol=0)


def test_bind_refuses_true_columns_and_cross_check_indices_that_do_not_fit(tmp_path):
    """The loop writes a true-value column per fault row and indexes the protect vector with a
    cross-check's partner and drop current: run.bind checks both before the first tick."""
    from hilrig.runtime.errors import PluginError
    from hilrig.runtime.run import _call, compile_loop, prepare
    from hilrig.safety.faults import C_TRUE
    from hilrig.safety.interlocks import XC_SIZE
    sc = parse_scenario(STEP.read_text() + "\n" + STUCK_AT_10MS + CROSS.format(deb=1),
                        name=STEP.name, path=str(STEP))
    fn, _, _ = compile_loop(sc)
    prep = prepare(sc)
    _call(fn, 0, 0, np.zeros((1, len(prep.signals))), prep.args)   # as prepared: accepted
    prep = prepare(sc)
    prep.args["f_cond"][0, C_TRUE] = 1.0     # a second true column the recording does not have
    with pytest.raises(PluginError, match="true-value columns"):
        _call(fn, 0, 0, np.zeros((1, len(prep.signals))), prep.args)
    prep = prepare(sc)
    nr = len(prep.table.rows)
    prep.args["lim_thr"][nr + XC_SIZE * (nr - 1)] = 99.0   # partner beyond the protect vector
    with pytest.raises(PluginError, match="cross-check row"):
        _call(fn, 0, 0, np.zeros((1, len(prep.signals))), prep.args)


@pytest.mark.parametrize("python_path", [False, True], ids=["compiled", "python"])
def test_lockstep_records_the_same_true_columns_as_sil(tmp_path, python_path):
    """In a bridge run the sensor faults are injected on the runtime's side, after the sample
    arrives: the true columns hold the simulator's sample, bit for bit what SIL records, on the
    compiled lockstep path and on the per-tick Python path (ipc socket, bounded waits)."""
    import os
    import subprocess
    from tests.integration.standin import CLI, reaped, serve
    scen = tmp_path / "stuck.toml"
    scen.write_text(STEP.read_text().replace("[[interlocks]]", STUCK_AT_10MS + '[[faults]]\n'
                    'kind = "offset"\nsignal = "i_L2"\nvalue = "5 A"\nstart = "5 ms"\n\n'
                    '[[interlocks]]', 1))
    address = f"ipc://{tmp_path}/sim.sock"
    env = dict(os.environ, HILRIG_BRIDGE_PYTHON="1") if python_path else None
    sim = serve(scen, address, env=env)
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out",
                                  str(tmp_path / "hil"), "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600, env=env)
        sim.communicate(timeout=120)
    # the v_out sensor sticks at 400 V on the step's tick: the reading never follows the step
    # to 500 V (and the true output runs past 560 V behind it), so the run ran to its end but
    # "out of band" (exit 1), not "completed"
    assert p.returncode == 1, p.stdout + p.stderr
    assert json.loads((tmp_path / "hil" / "summary.json").read_text())["outcome"]["status"] \
        == "out of band"
    sil = run_scenario(parse_scenario(scen.read_text(), name=scen.name, path=str(scen)),
                       tmp_path / "sil")
    a, b = open_run(tmp_path / "hil"), open_run(sil.folder)
    for name in ("true_v_out", "true_i_L2", "v_out", "i_L2", "u"):
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    assert np.all(a.signals["v_out"][FAULT_TICK:] == a.signals["v_out"][FAULT_TICK])
    assert np.max(a.signals["true_v_out"][FAULT_TICK:]) > 560.0   # behind the stuck reading
