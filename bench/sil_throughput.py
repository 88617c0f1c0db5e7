"""SIL throughput of hilrig's compiled loop next to python-control in the same run.

Closed loop: two-stage LC plant (demo parameters) + cascaded PI, 20 kHz, 4 RK4 substeps per
period, a 400 -> 420 V reference step at 0.1 s, a 50 kW constant-power load, three interlocks,
recording on. hilrig runs 1 s simulated, median of >= 5 runs after a warm-up, measured two ways:
the compiled loop alone (its record stage fills the chunk buffer) and end to end (the loop plus
writing and flushing every chunk to recording.h5 plus the running metrics).

The peer is what a practitioner would script today: the same plant and the same control law
(continuous-time PI, since python-control does not mix sampled and continuous parts) simulated
with python-control's ``input_output_response`` over 0.02 s (its speed does not depend on the
length). Steps per second = simulated control periods / wall time.

Also measured, interleaved with the loop: the same loop as it was before the stiffness-aware
integration (fixed RK4 sub-steps, no rate or energy check; ``bench/loop_stages.py``
``fixed_substeps``), and the cost ratio of the new rule, time per step new / fixed (nothing is
stiff on this scenario, so both compute the same recording).

Also measured: start-up of a fresh process to the first tick, with the loop cache warm and cold
(a new HILRIG_CACHE_DIR; numba's own cache of the plugin kernels stays warm in both).

Run: python bench/sil_throughput.py [--reps 7]
The last printed line is JSON: {"hilrig_steps_per_s" (the compiled loop with its record stage
into the chunk buffer), "hilrig_end_to_end_steps_per_s" (a whole 1 s run: set-up, loop, HDF5
writes and flushes, metrics), "peer_steps_per_s", "ratio", "ratio_end_to_end", "startup_*"}.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics as st
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

SCENARIO = """
title = "bench: two-stage LC + cascaded PI, 20 kHz, RK4 x 4"
[timing]
Ts = "50 us"
substeps = 4
duration = "1 s"
[plant]
plugin = "two_stage_lc"
[controller]
plugin = "cascaded_pi"
[reference]
plugin = "profile"
points = [[0, "400 V"], ["0.1 s", "400 V"], ["0.1 s", "420 V"]]
[load]
[[load.points]]
t = 0
P = "50 kW"
[[interlocks]]
signal = "v_out"
above = "480 V"
[[interlocks]]
signal = "i_L1"
above = "500 A"
[[interlocks]]
signal = "v_out"
below = "300 V"
debounce = 20
"""


def fixed_loop(sc, tmp: Path):
    """The SIL chunk as it was before the stiffness-aware integration (fixed RK4 sub-steps, no
    rate check, no energy check: bench/loop_stages.py fixed_substeps), compiled here."""
    from loop_stages import build, fixed_substeps
    from hilrig.runtime import loop as L
    path, _ = L.generate(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin)
    text = path.read_text()
    jit = '@njit(cache=True, error_model="numpy")\n'
    head, rest = text.split(jit + "def run_chunk", 1)
    base = head + jit + "def run_chunk" + rest.split("\n\n\n@njit", 1)[0] + "\n"
    return build(fixed_substeps(base), "hilrig_bench_fixed_substeps", tmp)


def hilrig_runs(reps: int, tmp: Path):
    from hilrig.runtime import run as R
    from hilrig.runtime.scenario import parse_scenario
    sc = parse_scenario(SCENARIO, name="bench.toml")
    fn, _, _ = R.compile_loop(sc)
    fixed = fixed_loop(sc, tmp)
    prep = R.prepare(sc)
    n = sc.n_ticks
    chunk = int(round(sc.recording["chunk"] / sc.Ts))
    rec = np.zeros((chunk, len(prep.signals)))
    R._call(fn, 0, 0, rec, prep.args)
    R._call(fixed, 0, 0, rec, R.prepare(sc).args)
    R.run_scenario(sc, tmp / "warm")  # warm-up
    loop_rates, e2e_rates, fixed_rates = [], [], []

    def loop_alone(f):
        a = R.prepare(sc).args
        t = time.perf_counter()
        done = 0
        while done < n:
            done += R._call(f, done, min(chunk, n - done), rec, a)
        return n / (time.perf_counter() - t)

    for i in range(reps):
        # loop alone, same chunking as a run; and the loop as before the stiffness-aware rule
        loop_rates.append(loop_alone(fn))
        fixed_rates.append(loop_alone(fixed))
        # end to end: loop + HDF5 writes and flushes + metrics
        t = time.perf_counter()
        R.run_scenario(sc, tmp / f"run{i}")
        e2e_rates.append(n / (time.perf_counter() - t))
    return loop_rates, e2e_rates, fixed_rates, sc


def peer_rate(sc, t_end=0.02, reps=3):
    import control as ct
    from hilrig.plugins.controllers.cascaded_pi import DECLARATION as PI
    p = sc.plant.values
    c = PI.defaults()
    L1, R1, C1, L2, R2, C2, vdc = (p[k] for k in ("L1", "R1", "C1", "L2", "R2", "C2", "V_dc"))
    P = 50e3

    def plant_upd(t, x, u, params):
        i1, v1, i2, v2 = x
        uc = min(max(u[0], 0.0), vdc)
        return np.array([(uc - R1 * i1 - v1) / L1, (i1 - i2) / C1, (v1 - R2 * i2 - v2) / L2,
                         (i2 - P / v2) / C2])

    def law(x, u):
        i1, v1, i2, v2, vref = u
        iout = P / v2
        ev = vref - v2
        iref = min(max(c["Kp_v"] * ev + x[0] + iout - c["K_ic"] * (i2 - iout), -c["I_max"]), c["I_max"])
        ei = iref - i1
        return v1 + c["Kp_i"] * ei + x[1] - c["K_vd"] * (v1 - v2), ev, ei

    def ctrl_upd(t, x, u, params):
        v, ev, ei = law(x, u)
        return np.array([c["Ki_v"] * ev, c["Ki_i"] * ei]) if 0.0 < v < vdc else np.zeros(2)

    def ctrl_out(t, x, u, params):
        return np.array([min(max(law(x, u)[0], 0.0), vdc)])

    plant = ct.nlsys(plant_upd, None, inputs=["u"], outputs=["i1", "v1", "i2", "v2"],
                     states=["i1", "v1", "i2", "v2"], name="plant")
    ctrl = ct.nlsys(ctrl_upd, ctrl_out, inputs=["i1", "v1", "i2", "v2", "vref"], outputs=["u"],
                    states=["xv", "xi"], name="ctrl")
    sys_ = ct.interconnect([plant, ctrl], inplist=["ctrl.vref"], inputs=["vref"],
                           outlist=["plant.v2"], outputs=["v2"])
    n = int(round(t_end / sc.Ts))
    T = np.arange(n + 1) * sc.Ts
    U = np.where(T < 0.01, 400.0, 420.0)
    i0 = P / 400.0
    X0 = np.array([i0, 400.0 + R2 * i0, i0, 400.0, 0.0, R1 * i0])
    rates = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(reps):
            t = time.perf_counter()
            ct.input_output_response(sys_, T, U, X0)
            rates.append(n / (time.perf_counter() - t))
    return rates


def startup(tmp: Path, cache: Path):
    """Fresh process: interpreter start to the first tick (from the run's summary)."""
    scen = tmp / "startup.toml"
    scen.write_text(SCENARIO.replace('duration = "1 s"', 'duration = "1 ms"'))
    out = tmp / f"st{time.monotonic_ns()}"
    env = dict(os.environ, HILRIG_CACHE_DIR=str(cache))
    code = ("import sys; from hilrig.runtime.scenario import load_scenario; "
            "from hilrig.runtime.run import run_scenario; "
            "run_scenario(load_scenario(sys.argv[1]), sys.argv[2])")
    p = subprocess.run([sys.executable, "-c", code, str(scen), str(out)], env=env,
                       capture_output=True, text=True, timeout=600)
    if p.returncode:
        raise RuntimeError(p.stderr)
    s = json.loads((out / "summary.json").read_text())
    return s["timing"]["process_start_to_first_tick_s"], s["timing"]["compiled_now"]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=7)
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="hilrig-bench-"))
    os.environ.setdefault("HILRIG_CACHE_DIR", str(tmp / "cache"))
    loop_rates, e2e_rates, fixed_rates, sc = hilrig_runs(args.reps, tmp)
    peer = peer_rate(sc)
    # interleave once more so that both sides see the same machine load
    (tmp / "again").mkdir()
    loop2, e2e2, fixed2, _ = hilrig_runs(2, tmp / "again")
    loop_rates += loop2
    e2e_rates += e2e2
    fixed_rates += fixed2
    peer += peer_rate(sc, reps=2)
    warm = [startup(tmp, Path(os.environ["HILRIG_CACHE_DIR"]))[0] for _ in range(3)]
    cold = [startup(tmp, tmp / f"cold{i}")[0] for i in range(2)]
    med = st.median
    print(f"hilrig loop alone : {med(loop_rates):>14,.0f} steps/s (median of {len(loop_rates)}; "
          f"{1e9 / med(loop_rates):.0f} ns per step)")
    print(f"hilrig loop, fixed: {med(fixed_rates):>14,.0f} steps/s (the loop before the stiffness-aware "
          f"integration; new / fixed time per step: {med(fixed_rates) / med(loop_rates):.3f})")
    print(f"hilrig end to end : {med(e2e_rates):>14,.0f} steps/s (loop + HDF5 write/flush + metrics)")
    print(f"python-control    : {med(peer):>14,.0f} steps/s (input_output_response, median of {len(peer)})")
    print(f"ratio (loop with its record stage / peer): {med(loop_rates) / med(peer):,.0f}x; "
          f"(end to end / peer): {med(e2e_rates) / med(peer):,.0f}x")
    print(f"start-up to first tick: warm cache median {med(warm):.2f} s {['%.2f' % w for w in warm]}, "
          f"cold loop cache {['%.2f' % c for c in cold]} s")
    print(json.dumps({
        "hilrig_steps_per_s": med(loop_rates), "hilrig_end_to_end_steps_per_s": med(e2e_rates),
        "hilrig_fixed_substeps_steps_per_s": med(fixed_rates),
        "stiffness_aware_cost_ratio": med(fixed_rates) / med(loop_rates),
        "peer_steps_per_s": med(peer), "ratio": med(loop_rates) / med(peer),
        "ratio_end_to_end": med(e2e_rates) / med(peer),
        "startup_warm_s": med(warm), "startup_cold_s": med(cold),
    }))


if __name__ == "__main__":
    main()
