"""The standalone simulator example of docs/protocol.md, run as its own process, against the
hilrig runtime: a simulator engineer's implementation from the document alone interoperates."""
import math
import re
import select
import subprocess
import sys
from pathlib import Path

import numpy as np

from hilrig.runtime.recording import open_run

ROOT = Path(__file__).resolve().parents[2]
DOC = ROOT / "docs" / "protocol.md"

PLANT = '''
"""First-order stand-in plant matching the protocol example: dv/dt = (u - v)/tau (test only)."""
import numpy as np
from numba import njit
from hilrig.plugins.base import Declaration, Param, Signal

def _equilibrium(values, v_out, d):
    return np.array([v_out])

DECLARATION = Declaration(
    kind="plant", name="first_order", summary="first-order test plant",
    params=(Param("tau", "s", 1e-3, (0.0, 1.0), "time constant", lower_open=True),),
    states=(Signal("v_out", "V"),), inputs=(Signal("u", "V"),),
    outputs=(Signal("v_out", "V"),), source="test only", equilibrium=_equilibrium)

@njit(cache=True)
def derivs(t, p, x, u, d):
    return ((u[0] - x[0]) / p[0],)

@njit(cache=True)
def outputs(t, p, x, u, d, y):
    y[0] = x[0]
'''

CONTROLLER = '''
"""PI on v_out for the first-order test plant (test only)."""
import numpy as np
from numba import njit
from hilrig.plugins.base import Declaration, Param, Signal

def _build(values, ctx):
    return np.array([ctx.Ts, values["Kp"], values["Ki"]])

DECLARATION = Declaration(
    kind="controller", name="pi_v", summary="PI on v_out (test only)",
    params=(Param("Kp", "-", 2.0, (0.0, 100.0), "gain"), Param("Ki", "1/s", 2000.0, (0.0, 1e6), "integral gain")),
    states=(Signal("i", "V"),), reads=("v_out",), outputs=(Signal("u", "V"),),
    source="test only", build=_build)

@njit(cache=True)
def init(p, xc, y, r):
    xc[0] = y[0]

@njit(cache=True)
def step(t, p, xc, y, r, u):
    e = r[0] - y[0]
    u[0] = p[1] * e + xc[0]
    xc[0] += p[2] * p[0] * e
    return 0
'''

SCENARIO = '''
title = "protocol example interoperability (test data)"
[timing]
Ts = "100 us"
substeps = 4
duration = "30 ms"
[plant]
plugin = "first_order.py"
[controller]
plugin = "pi_v.py"
[reference]
plugin = "profile"
points = [[0, 0], ["1 ms", 0], ["1 ms", 2]]
[initial]
v_out = 0
[limits]
v_collapse = 0
'''


def shared_plugins() -> Path:
    """The first-order test plant and its PI controller, written once per test session into one
    folder that every test using them shares (the loop cache is keyed by the plugin files'
    paths: one folder, one compile per combination; both test processes share the folder, so it
    is written atomically and only when missing)."""
    import os
    import tempfile
    d = Path(os.environ["HILRIG_CACHE_DIR"]) / "test-plugins"
    d.mkdir(parents=True, exist_ok=True)
    for name, text in (("first_order.py", PLANT), ("pi_v.py", CONTROLLER)):
        f = d / name
        if not f.exists() or f.read_text() != text:
            fd, tmp = tempfile.mkstemp(dir=d, suffix=".tmp")
            with os.fdopen(fd, "w") as fh:
                fh.write(text)
            os.replace(tmp, f)
    return d


def with_shared_plugins(scenario: str) -> str:
    """The scenario text with the test plugins named by their shared paths."""
    d = shared_plugins()
    return (scenario.replace('"first_order.py"', f'"{d / "first_order.py"}"')
            .replace('"pi_v.py"', f'"{d / "pi_v.py"}"'))


def test_doc_simulator_example_against_the_runtime(tmp_path):
    text = DOC.read_text()
    block = text.split("<!-- example: simulator.py -->", 1)[1]
    code = re.search(r"```python\n(.*?)```", block, re.S).group(1)
    (tmp_path / "simulator.py").write_text(code)
    (tmp_path / "scen.toml").write_text(with_shared_plugins(SCENARIO))
    ts = float(re.search(r"^TS = ([0-9.e-]+)", code, re.M).group(1))
    tau = float(re.search(r"^TAU = ([0-9.e-]+)", code, re.M).group(1))
    with subprocess.Popen([sys.executable, str(tmp_path / "simulator.py"), "0"],
                          stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) as sim:
        try:
            ready, _, _ = select.select([sim.stdout], [], [], 30)
            assert ready, "the example printed no address"
            address = re.search(r"tcp://127\.0\.0\.1:\d+", sim.stdout.readline()).group(0)
            p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "run",
                                str(tmp_path / "scen.toml"), "--bridge", address,
                                "--out", str(tmp_path / "run"), "--headless", "--timeout", "30"],
                               capture_output=True, text=True, timeout=600)
        finally:
            sim.terminate()
            try:
                sim.communicate(timeout=10)
            except subprocess.TimeoutExpired:
                sim.kill()
                sim.communicate(timeout=10)
    assert p.returncode == 0, p.stdout + p.stderr
    run = open_run(tmp_path / "run")
    v, u = run.signals["v_out"], run.signals["u"]
    assert v.shape == (300,)
    # every sample is the exact zero-order-hold step of dv/dt = (u - v)/tau from the previous
    # one with the recorded actuation (exact solution of a linear first-order ODE, derived)
    a = math.exp(-ts / tau)
    np.testing.assert_allclose(v[1:], u[:-1] + (v[:-1] - u[:-1]) * a, rtol=1e-12, atol=1e-12)
    # and the runtime's PI brings the example's plant to the 2 V reference
    assert abs(v[-1] - 2.0) < 0.01
