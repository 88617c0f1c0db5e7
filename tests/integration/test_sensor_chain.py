"""The sensor chain in whole runs of the demo (invented demo data; its plugin combination, so no
extra compile): the recording keeps the plant's true v_out beside the reading, the reading is
the chain applied offline to that true value, the chain leaves the plant alone, sensor faults
act on the reading, and paced and lockstep runs apply the same chain as SIL, bit for bit.

Outside references: scipy.signal.lsim for the first-order low-pass (tau = 1 / (2 pi f_c)) on an
input linear between the samples; the ideal mid-tread ADC, LSB = range / 2^bits, written out in
numpy (IEEE Std 1241, from memory).
"""
import math
import subprocess
from pathlib import Path

import numpy as np
import pytest
from scipy import signal as sps

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import parse_scenario
from tests.integration.standin import CLI, reaped, serve

TS = 50e-6
FC, BITS, LO, HI, DELTA, OFFSET = 4e3, 12, 0.0, 1000.0, 10e-6, 0.75
CHAIN = (f'[[sensors]]\nsignal = "v_out"\ncutoff = "{FC / 1e3:g} kHz"\nbits = {BITS}\n'
         f'range = ["{LO:g} V", "{HI:g} V"]\nsample_offset = "{DELTA * 1e6:g} us"\n'
         f'offset = "{OFFSET:g} V"\n')
#: open loop: a trip on tick 0 (i_L2 is always below 1e6 A) holds the converter at 440 V, so
#: the plant's trajectory does not depend on what is measured
OPEN_LOOP = ('[limits]\nv_collapse = "25 V"\nsafe_u = "440 V"\n'
             '[[interlocks]]\nsignal = "i_L2"\nbelow = "1000000 A"\n')


def _text(demo_path, extra: str, duration: str = "20 ms") -> str:
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', f'duration = "{duration}"')
    if "[limits]" in extra:
        text = text.replace('[limits]\nv_collapse = "25 V"\n', "")
    return text + "\n" + extra


def _run(tmp_path, demo_path, extra: str, name: str):
    path = tmp_path / f"{name}.toml"
    path.write_text(_text(demo_path, extra))
    sc = parse_scenario(path.read_text(), name=path.name, path=str(path))
    res = run_scenario(sc, tmp_path / name)
    return res.summary, open_run(res.folder)


def offline_chain(true: np.ndarray) -> np.ndarray:
    """The chain on a recorded true signal, outside the loop: scipy's lsim of the first-order
    lag on the samples linearly interpolated (a grid of Ts/5, so that t_k - DELTA = t_k - Ts/5
    is on it), read at t_k - DELTA, plus the offset, then the ideal ADC."""
    tau = 1.0 / (2.0 * math.pi * FC)
    n = true.shape[0]
    t = TS * np.arange(n)
    tg = TS / 5 * np.arange(5 * (n - 1) + 1)
    lag = sps.StateSpace([[-1.0 / tau]], [[1.0 / tau]], [[1.0]], [[0.0]])
    _, out, _ = sps.lsim(lag, np.interp(tg, t, true), tg, X0=[true[0]])
    m = np.empty(n)
    m[0] = true[0]                        # tick 0: the filter starts settled on the sample
    back = int(round(DELTA / (TS / 5)))
    assert back * TS / 5 == pytest.approx(DELTA)
    m[1:] = out[5 * np.arange(1, n) - back]
    m += OFFSET
    lsb = (HI - LO) / 2 ** BITS
    code = np.clip(np.floor((m - LO) / lsb + 0.5), 0, 2 ** BITS - 1)
    return LO + code * lsb, (m - LO) / lsb


def _assert_is_chain_of(measured, true):
    want, x = offline_chain(true)
    lsb = (HI - LO) / 2 ** BITS
    differ = measured != want
    # lsim and the loop round differently in the last bits: a reading may differ only where
    # the filter's output lies on a code edge, and then by one code
    edge = np.abs(x - np.floor(x) - 0.5) < 1e-6
    assert not np.any(differ & ~edge), np.flatnonzero(differ & ~edge)[:5]
    assert np.all(np.abs(measured - want)[differ] <= lsb * (1 + 1e-9))
    assert differ.mean() < 0.01


@pytest.fixture(scope="module")
def closed(tmp_path_factory, demo_path):
    tmp = tmp_path_factory.mktemp("chain")
    return tmp, _run(tmp, demo_path, CHAIN, "chain"), _run(tmp, demo_path, "", "plain")


def test_the_reading_is_the_chain_applied_offline_to_the_recorded_true_value(closed):
    _, (s, run), (s0, run0) = closed
    assert s["completed"] and s0["completed"]
    measured, true = run.signals["v_out"], run.signals["true_v_out"]
    _assert_is_chain_of(measured, true)
    # the reading is on the ADC's codes and not the plant's value; the loop saw it (the
    # controller's command differs from the run without a chain); only v_out has a true column
    lsb = (HI - LO) / 2 ** BITS
    np.testing.assert_allclose((measured - LO) / lsb, np.round((measured - LO) / lsb), atol=1e-9)
    assert np.max(np.abs(measured - true)) > lsb
    assert not np.array_equal(run.signals["u"], run0.signals["u"])
    assert [k for k in run.signals if k.startswith("true_")] == ["true_v_out"]
    assert not any(k.startswith("true_") for k in run0.signals)


def test_the_chain_leaves_the_plant_alone(tmp_path, demo_path):
    # open loop: the true values with the chain are the plant outputs without it, bit for bit
    s, run = _run(tmp_path, demo_path, OPEN_LOOP + CHAIN, "open_chain")
    s0, run0 = _run(tmp_path, demo_path, OPEN_LOOP, "open_plain")
    assert s["trip"]["tick"] == s0["trip"]["tick"] == 0
    assert run.signals["true_v_out"].tobytes() == run0.signals["v_out"].tobytes()
    for name in ("i_L1", "v_C1", "i_L2", "i_out", "u"):
        assert run.signals[name].tobytes() == run0.signals[name].tobytes(), name
    _assert_is_chain_of(run.signals["v_out"], run.signals["true_v_out"])
    # the plant rings after the 440 V step: the filter's lag is visible in the reading
    assert np.ptp(run0.signals["v_out"]) > 10.0


def test_a_sensor_fault_acts_on_the_reading_after_the_chain(tmp_path, demo_path):
    fault = ('[[faults]]\nkind = "offset"\nsignal = "v_out"\nstart = "5 ms"\nend = "6 ms"\n'
             'value = "5 V"\n')
    s, run = _run(tmp_path, demo_path, OPEN_LOOP + CHAIN + fault, "fault")
    true = run.signals["true_v_out"]
    want, _ = offline_chain(true)
    k = np.arange(true.shape[0])
    on = (k >= 100) & (k < 120)
    np.testing.assert_allclose(run.signals["v_out"][on], want[on] + 5.0, rtol=0, atol=1e-9)
    _assert_is_chain_of(run.signals["v_out"][~on][:100], true[:100])
    # one true column for the signal that both hit
    assert [n for n in run.signals if n.startswith("true_")] == ["true_v_out"]


def test_a_paced_run_applies_the_same_chain_as_sil(closed, tmp_path, demo_path):
    from hilrig.runtime.live.paced import run_paced
    tmp, (_, sil), _ = closed
    sc = parse_scenario(_text(demo_path, CHAIN) + '\n[paced]\nmiss_share_max = 1.0\n'
                        'max_lateness = "10 s"\nrealtime = false\n', name="paced.toml")
    res = run_paced(sc, tmp_path / "paced")
    run = open_run(res.folder)
    for name in ("v_out", "true_v_out", "u", "i_L1"):
        assert run.signals[name].tobytes() == sil.signals[name].tobytes(), name


@pytest.mark.parametrize("python_path", [False, True], ids=["compiled", "python"])
def test_a_lockstep_run_applies_the_same_chain_on_the_runtime_side(closed, tmp_path, demo_path,
                                                                   python_path):
    """bridge_chunk (compiled exchange) and bridge_tick (the per-tick Python path, which
    free-running runs too) both apply the chain to the simulator's samples."""
    import os
    _, (_, sil), _ = closed
    scen = tmp_path / "bridge.toml"
    scen.write_text(_text(demo_path, CHAIN))
    address = f"ipc://{tmp_path}/sim.sock"
    env = dict(os.environ, HILRIG_BRIDGE_PYTHON="1") if python_path else None
    sim = serve(scen, address, env=env)
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out",
                                  str(tmp_path / "hil"), "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600, env=env)
        sim.communicate(timeout=120)
    assert p.returncode == 0, p.stdout + p.stderr
    run = open_run(tmp_path / "hil")
    for name in ("v_out", "true_v_out", "u", "i_L1"):
        assert run.signals[name].tobytes() == sil.signals[name].tobytes(), name


def test_bind_refuses_sensor_tables_that_do_not_fit(demo_path):
    """The loop indexes y with each chain's signal and writes its true-value column: run.bind
    checks both, and the table's shape, before the first tick."""
    from hilrig.runtime.errors import PluginError
    from hilrig.runtime.run import _call, compile_loop, prepare
    from hilrig.runtime.sensors import S_SIG, S_TRUE
    sc = parse_scenario(_text(demo_path, CHAIN), name="demo.toml")
    fn, _, _ = compile_loop(sc)
    rec = np.zeros((1, len(prepare(sc).signals)))
    _call(fn, 0, 0, rec, prepare(sc).args)   # as prepared: accepted
    for key, change, match in (
            ("s_tab", lambda t: t.__setitem__((0, S_SIG), 6.0), "sensors.*outside"),
            ("s_tab", lambda t: t.__setitem__((0, S_TRUE), 1.0), "true-value columns"),
            ("s_x", None, "s_x has")):
        a = prepare(sc).args
        if change is None:
            a[key] = np.zeros((2, 2))
        else:
            change(a[key])
        with pytest.raises(PluginError, match=match):
            _call(fn, 0, 0, rec, a)


def test_the_watchdog_tick_of_a_lockstep_run_holds_the_sample_as_received(tmp_path, demo_path):
    """The simulator goes silent at 10 ms (link_freeze): the staleness watchdog's tick, the
    run's last, holds the last sample. The tick before changed y in place (the chain's 1 V
    offset); the held tick starts again from the sample, so its true value is that sample and
    its reading 1 V above it, not 2 V."""
    scen = tmp_path / "freeze.toml"
    scen.write_text(_text(demo_path, '[[sensors]]\nsignal = "v_out"\noffset = "1 V"\n'
                          '[[faults]]\nkind = "link_freeze"\nstart = "10 ms"\n'
                          '[watchdogs]\nstale_limit = "150 ms"\n'))
    address = f"ipc://{tmp_path}/lf.sock"
    sim = serve(scen, address)
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out",
                                  str(tmp_path / "r"), "--headless"],
                           capture_output=True, text=True, timeout=600)
    assert p.returncode == 1, p.stdout + p.stderr
    run = open_run(tmp_path / "r")
    true, v = run.signals["true_v_out"], run.signals["v_out"]
    assert true.shape == (202,)   # ticks 0 .. 201, the last one the watchdog's
    assert true[201] == true[200]
    np.testing.assert_allclose(v - true, 1.0, rtol=0, atol=1e-9)
