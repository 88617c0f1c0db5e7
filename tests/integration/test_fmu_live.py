"""FMU plants in real-time and bridge modes (smoke tests; the physics is checked in
test_fmu.py): a paced run of the model-exchange FMU plant records what its SIL run records,
bit for bit, and the stand-in simulator (hilrig serve-sim) with the co-simulation FMU plant
serves a lockstep run whose recording equals the SIL run's bit for bit (the same compiled
kernels on both sides; the samples travel as float64). Generous timing limits: the paced
run's timing is not what is tested (a shared machine misses deadlines)."""
import subprocess

import pytest

from hilrig.runtime.live.paced import run_paced
from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario
from tests.fmu import build as fmu_build
from tests.integration.standin import CLI, reaped, serve, wait_listening

pytestmark = pytest.mark.skipif(fmu_build.compiler() is None, reason="needs a C compiler")

SIGNALS = ("v_out", "i_out", "i_L1", "v_C1", "i_L2", "u", "v_ref")
GENEROUS = '\n[paced]\nmiss_share_max = 1.0\nmax_lateness = "10 s"\n'


@pytest.fixture(scope="module")
def fmu(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("fmu_live")
    return tmp, fmu_build.build_fmu(tmp)


def test_fmu_plant_paced_run_equals_sil(fmu):
    tmp, path = fmu
    scen = tmp / "me.toml"
    scen.write_text(fmu_build.scenario(path) + GENEROUS)
    sil = open_run(run_scenario(load_scenario(scen), tmp / "sil").folder)
    res = run_paced(load_scenario(scen), tmp / "paced")
    assert res.summary["outcome"]["status"] == "completed"
    paced = open_run(res.folder)
    for name in SIGNALS:
        assert paced.signals[name].tobytes() == sil.signals[name].tobytes(), name


def test_fmu_plant_in_serve_sim_lockstep_equals_sil(fmu):
    tmp, path = fmu
    scen = tmp / "cs.toml"
    scen.write_text(fmu_build.scenario(path, "co_simulation", "n_sub = 4"))
    sil = open_run(run_scenario(load_scenario(scen), tmp / "sil_cs").folder)
    address = f"ipc://{tmp}/fmu_sim.sock"
    sim = serve(scen, address)
    with reaped(sim):
        assert "fmu:two_stage_lc.fmu" in wait_listening(sim)
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp / "hil"),
                                  "--headless", "--timeout", "60"], capture_output=True, text=True,
                           timeout=600)
        assert p.returncode == 0, p.stdout + p.stderr
        sim_out, _ = sim.communicate(timeout=120)
    assert "session 1 ended after 600 ticks" in sim_out
    hil = open_run(tmp / "hil")
    for name in ("v_out", "i_out", "i_L1", "v_C1", "i_L2", "u", "v_ref"):
        assert hil.signals[name].tobytes() == sil.signals[name].tobytes(), name
