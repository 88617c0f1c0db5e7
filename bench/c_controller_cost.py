"""Per-tick cost of a controller written in C next to the same controller written as a numba
plugin, in the same run.

The two are examples/c_controller/pi.c and pi_numba.py (the same cascaded PI, operation for
operation) on their demo scenarios (pi_c.toml, pi_numba.toml: demo plant, 20 kHz, 4 RK4
substeps, a reference step and a load ramp), run for 1 s simulated here. Measured two ways,
interleaved, median of the repetitions:

- the whole compiled loop alone (plant, sensors, controller, interlocks, record stage into the
  chunk buffer; no HDF5), ns per tick: what the C controller costs a run;
- the controller kernel alone in a small njit loop that calls ``step`` inlined, as the
  generated loop does (``loop.inline``; measurements moved a little every tick so nothing is
  constant-folded): the C call through ``call_native`` (an indirect call the optimiser cannot
  see into) against the numba kernel (its body in the loop).

Run: python bench/c_controller_cost.py [--reps 7] [--duration 1]
The last printed line is JSON: {"loop_ns_per_tick": {"c", "numba"}, "loop_ratio",
"kernel_ns_per_tick": {"c", "numba"}, "kernel_ratio"} (ratio = C / numba).
"""
from __future__ import annotations

import argparse
import json
import statistics as st
import time
from pathlib import Path

import numpy as np
from numba import njit

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "c_controller"


def make_kernel_loop(step):
    @njit
    def loop(n, p, xc, y, r, u):
        acc = 0.0
        y0 = y[0]
        for k in range(n):
            y[0] = y0 + 1e-3 * (k % 7)
            step(k * 5e-5, p, xc, y, r, u)
            acc += u[0]
        y[0] = y0
        return acc
    return loop


def main():
    from hilrig.runtime import run as R
    from hilrig.runtime.loop import inline
    from hilrig.runtime.scenario import load_scenario
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=7)
    ap.add_argument("--duration", type=float, default=1.0, help="simulated seconds per loop run")
    ap.add_argument("--kernel-ticks", type=int, default=1_000_000)
    args = ap.parse_args()
    cases = {}
    for key, name in (("c", "pi_c"), ("numba", "pi_numba")):
        sc = load_scenario(EXAMPLE / f"{name}.toml",
                           overrides={"timing.duration": f"{args.duration} s"})
        fn, _, _ = R.compile_loop(sc)
        prep = R.prepare(sc)
        chunk = int(round(sc.recording["chunk"] / sc.Ts))
        rec = np.zeros((chunk, len(prep.signals)))
        R._call(fn, 0, 0, rec, prep.args)
        # the controller kernel alone, on the arrays prepare made (p, y, r as the loop has them)
        a = prep.args
        mod = sc.controller.plugin.module
        p, xc, r = a["pc"].copy(), a["xc"].copy(), np.array([400.0, 0.0, 0.0, 0.0, 0.0])
        y = np.array([400.0, 50.0, 50.0, 400.25, 50.0])[: len(sc.controller.plugin.declaration.reads)]
        mod.init(p, xc, y, r)
        # inlined into the caller as the generated loop does (loop.inline)
        kl = make_kernel_loop(inline(mod.step))
        kl(10, p, xc.copy(), y, r, np.zeros(1))
        cases[key] = dict(sc=sc, fn=fn, chunk=chunk, rec=rec, kernel=(kl, p, xc, y, r))

    def loop_ns(case):
        sc = case["sc"]
        a = R.prepare(sc).args
        n = sc.n_ticks
        t = time.perf_counter()
        done = 0
        while done < n:
            done += R._call(case["fn"], done, min(case["chunk"], n - done), case["rec"], a)
        return (time.perf_counter() - t) / n * 1e9

    def kernel_ns(case):
        kl, p, xc, y, r = case["kernel"]
        n = args.kernel_ticks
        x = xc.copy()
        t = time.perf_counter()
        kl(n, p, x, y, r, np.zeros(1))
        return (time.perf_counter() - t) / n * 1e9

    # same recording from both (the comparison is of equal work): checked once
    recs = {}
    for key, case in cases.items():
        a = R.prepare(case["sc"]).args
        rec = np.zeros_like(case["rec"])
        R._call(case["fn"], 0, case["chunk"], rec, a)
        recs[key] = rec
    same = bool(np.array_equal(recs["c"], recs["numba"]))

    loop = {k: [] for k in cases}
    kern = {k: [] for k in cases}
    for _ in range(args.reps):
        for k, case in cases.items():  # interleaved: drift of a shared machine hits both
            loop[k].append(loop_ns(case))
            kern[k].append(kernel_ns(case))
    med_loop = {k: st.median(v) for k, v in loop.items()}
    med_kern = {k: st.median(v) for k, v in kern.items()}
    n = cases["c"]["sc"].n_ticks
    print(f"cascaded PI in C (pi.c) vs the same PI as a numba plugin (pi_numba.py); "
          f"{n} ticks per loop run, {args.reps} reps, medians; first chunk's recordings "
          f"{'identical' if same else 'DIFFERENT'}")
    print(f"  whole loop per tick   C {med_loop['c']:8.1f} ns   numba {med_loop['numba']:8.1f} ns"
          f"   ratio C/numba {med_loop['c'] / med_loop['numba']:.3f}")
    print(f"  controller step alone C {med_kern['c']:8.1f} ns   numba {med_kern['numba']:8.1f} ns"
          f"   ratio C/numba {med_kern['c'] / med_kern['numba']:.3f}")
    print(json.dumps(dict(loop_ns_per_tick=med_loop, loop_ratio=med_loop["c"] / med_loop["numba"],
                          kernel_ns_per_tick=med_kern,
                          kernel_ratio=med_kern["c"] / med_kern["numba"],
                          recordings_identical=same)))


if __name__ == "__main__":
    main()
