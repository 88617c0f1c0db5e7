"""Cost per tick of each installed controller kernel, compiled, next to the same kernel run by
the Python interpreter (its ``py_func``) in the same run.

Each controller is built for the demo plant (two-stage LC, plugin defaults) at 400 V / 50 kW,
initialised at the plant's equilibrium and stepped N times on measurements that move a little
every tick (so nothing is constant-folded); the compiled loop is a small njit loop that calls
the kernel exactly as the generated SIL loop does.

Run: python bench/controller_cost.py [--ticks 200000]
The last printed line is JSON: {controller: {"ns_per_tick", "python_ns_per_tick", "ratio"}}.
"""
from __future__ import annotations

import argparse
import json
import statistics as st
import time

import numpy as np
from numba import njit


def build(plugin, plant):
    from hilrig.plugins.base import BuildContext
    pdecl = plant.declaration
    pvals = pdecl.defaults()
    ctx = BuildContext(Ts=50e-6, plant=pvals, plant_name=pdecl.name,
                       plant_outputs=tuple(s.name for s in pdecl.outputs),
                       plant_states=tuple(s.name for s in pdecl.states), plant_module=plant.module)
    decl = plugin.declaration
    p = decl.pack(decl.defaults(), ctx)
    d = np.array([50e3, 0.0, 0.0])
    x = pdecl.equilibrium(pvals, 400.0, d)
    y_all = np.zeros(len(pdecl.outputs))
    plant.module.outputs(0.0, pdecl.pack(pvals, ctx), np.asarray(x, float), np.zeros(1), d, y_all)
    outs = [s.name for s in pdecl.outputs]
    fb = getattr(plugin.module, "READ_FALLBACKS", {})
    y = np.array([y_all[outs.index(n if n in outs else fb[n])] for n in decl.reads])
    xc = np.zeros(max(decl.state_count(decl.defaults()), 1))
    r = np.array([400.0, 0.0, 0.0, 0.0, 0.0])
    plugin.module.init(p, xc, y, r)
    return p, xc, y, r


def make_loop(step):
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


def python_loop(step, n, p, xc, y, r, u):
    y0 = y[0]
    for k in range(n):
        y[0] = y0 + 1e-3 * (k % 7)
        step(k * 5e-5, p, xc, y, r, u)
    y[0] = y0


def main():
    from hilrig.runtime import registry
    ap = argparse.ArgumentParser()
    ap.add_argument("--ticks", type=int, default=200_000)
    ap.add_argument("--reps", type=int, default=7)
    args = ap.parse_args()
    plant = registry.load("plant", "two_stage_lc")
    out = {}
    for name in sorted(registry.available("controller")):
        plugin = registry.load("controller", name)
        p, xc0, y, r = build(plugin, plant)
        u = np.zeros(1)
        loop = make_loop(plugin.module.step)
        loop(10, p, xc0.copy(), y, r, u)
        times = []
        for _ in range(args.reps):
            xc = xc0.copy()
            t = time.perf_counter()
            loop(args.ticks, p, xc, y, r, u)
            times.append(time.perf_counter() - t)
        n_py = max(args.ticks // 100, 1000)
        py = []
        for _ in range(3):
            xc = xc0.copy()
            t = time.perf_counter()
            python_loop(plugin.module.step.py_func, n_py, p, xc, y, r, u)
            py.append(time.perf_counter() - t)
        ns = st.median(times) / args.ticks * 1e9
        ns_py = st.median(py) / n_py * 1e9
        out[name] = {"ns_per_tick": ns, "python_ns_per_tick": ns_py, "ratio": ns_py / ns}
        print(f"{name:16s} compiled {ns:8.1f} ns/tick   interpreted {ns_py:10.0f} ns/tick   "
              f"x{ns_py / ns:,.0f}")
    print(json.dumps(out))


if __name__ == "__main__":
    main()
