"""Tuning time: hilrig tune's search on the fast analysis, next to a plain scipy.optimize loop
that simulates every evaluation, measured in the same run on the same cores.

The problem (demo data, an invented 800 V-class plant on which the demo plant's cascaded PI
gains are unstable everywhere): tune three parameters of cascaded_pi (Kp_v, Ki_v, Kp_i; the
others fixed at their declared numbers) for the worst case over a 10 x 10 grid of 500-900 V,
-75..150 kW.

- hilrig: ``runtime.analysis.tune.tune`` (Nelder-Mead on the worst largest closed-loop |z|,
  ``--starts`` starts on ``--workers`` processes), then its result confirmed by one SIL envelope
  over the 10 x 10 grid (included in its time).
- plain: ``scipy.optimize.minimize(method="Nelder-Mead")`` whose objective runs the SIL envelope
  over the same 10 x 10 grid for every evaluation (on the same worker count) and returns the
  share of cells that do not track (the envelope's verdict per cell). It is stopped after
  ``--plain-evals`` evaluations (a full search needs hundreds); the printed total for the plain
  loop at hilrig's evaluation count is a projection from its measured median per evaluation,
  and is labelled so.

Run: python bench/tuning.py [--workers 2] [--plain-evals 8] [--starts 2]
The last printed line is JSON.
"""
from __future__ import annotations

import argparse
import json
import statistics as st
import time

import numpy as np

PLANT = """
# DEMO DATA: an invented 800 V-class test plant (not real equipment).
title = "bench: 800 V-class test plant"
demo_data = true
[timing]
Ts = "50 us"
substeps = 4
duration = "60 ms"
[plant]
plugin = "two_stage_lc"
V_dc = "1000 V"
L1 = "400 uH"
R1 = "10 mohm"
C1 = "100 uF"
L2 = "250 uH"
R2 = "8 mohm"
C2 = "220 uF"
[controller]
plugin = "cascaded_pi"
K_vd = 3.7
K_ic = 1.0
Ki_i = 3500.0
[design]
v_range = ["500 V", "900 V"]
p_range = ["-75 kW", "150 kW"]
[reference]
plugin = "profile"
points = [[0, "700 V"]]
[load]
[[load.points]]
t = 0
P = "37.5 kW"
"""
PARAMS = ("Kp_v", "Ki_v", "Kp_i")
START = dict(Kp_v=5.0, Ki_v=12000.0, Kp_i=2.0)


def envelope_rows(text: str, grid, workers: int):
    from hilrig.runtime.trials import envelope as env
    tasks = env.tasks_for(text, "bench.toml", ["cascaded_pi"], grid, tol_pct=2.0)
    env.warm_up(tasks)
    return env.table(tasks, env.run_envelope(tasks, workers=workers))


def with_values(values: dict) -> str:
    from hilrig.runtime.scenario import parse_scenario
    return parse_scenario(PLANT, name="bench.toml",
                          overrides={f"controller.{k}": float(v) for k, v in values.items()}).text


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--starts", type=int, default=2)
    ap.add_argument("--plain-evals", type=int, default=8)
    ap.add_argument("--grid", type=int, default=10)
    a = ap.parse_args()
    import scipy.optimize

    from hilrig.plugins.base import Tunable
    from hilrig.runtime.analysis import tune as tmod
    from hilrig.runtime.run import prepare
    from hilrig.runtime.scenario import parse_scenario
    from hilrig.runtime.trials import envelope as env

    gv = tuple(np.linspace(500.0, 900.0, a.grid))
    gp = tuple(np.linspace(-75e3, 150e3, a.grid))
    grid = env.Grid(v=gv, p=gp)
    base = with_values(START)
    # warm-up outside the timings: the loop compile (or cache load) and the design cache
    envelope_rows(base, env.Grid(v=gv[:1], p=gp[:1]), 1)
    sc = parse_scenario(base, name="bench.toml")
    prep = prepare(sc)
    tun = [Tunable("Kp_v", 1e-3, 1e3), Tunable("Ki_v", 1e-1, 1e8), Tunable("Kp_i", 1e-4, 1e3)]

    # hilrig: the analysis search, then one confirming envelope
    t0 = time.perf_counter()
    res = tmod.tune(prep, tun, gv, gp, starts=a.starts, workers=a.workers)
    t_search = time.perf_counter() - t0
    rows = envelope_rows(with_values({k: res.after[k] for k in PARAMS}), grid, a.workers)
    t_hilrig = time.perf_counter() - t0
    tracks = sum(r["outcome"] == "tracks" for r in rows)

    # plain: scipy's Nelder-Mead, every evaluation a SIL envelope of the grid
    per_eval: list[float] = []
    best = [np.inf, None, 0]

    def objective(z):
        t = time.perf_counter()
        vals = dict(zip(PARAMS, np.exp(z)))
        rr = envelope_rows(with_values(vals), grid, a.workers)
        f = sum(r["outcome"] != "tracks" for r in rr) / len(rr)
        per_eval.append(time.perf_counter() - t)
        if f < best[0]:
            best[:] = [f, vals, sum(r["outcome"] == "tracks" for r in rr)]
        return f

    t1 = time.perf_counter()
    scipy.optimize.minimize(objective, np.log([START[k] for k in PARAMS]), method="Nelder-Mead",
                            options=dict(maxfev=a.plain_evals))
    t_plain = time.perf_counter() - t1
    med_plain = st.median(per_eval)
    # the search's evaluations run in parallel starts: its time per evaluation is the mean
    med_hilrig = t_search / max(res.evaluations, 1)
    projected = med_plain * res.evaluations
    n = len(gv) * len(gp)
    print(f"tuning 3 parameters of cascaded_pi over a {a.grid} x {a.grid} grid "
          f"({n} operating points), {a.workers} worker(s)")
    print(f"hilrig tune (analysis search + 1 SIL envelope): {t_hilrig:.1f} s; "
          f"{res.evaluations} evaluations, {med_hilrig * 1e3:.1f} ms each on average; worst |z| "
          f"{res.before_worst:.3f} -> {res.after_worst:.3f}; the tuned set tracks "
          f"{tracks}/{n} cells")
    print(f"plain scipy.optimize, SIL envelope per evaluation: {len(per_eval)} evaluations in "
          f"{t_plain:.1f} s, median {med_plain:.2f} s each; best so far tracks {best[2]}/{n} "
          f"cells")
    print(f"per evaluation: plain / hilrig = {med_plain / med_hilrig:.0f}x; PROJECTED plain "
          f"loop at hilrig's {res.evaluations} evaluations: {projected:.0f} s "
          f"= {projected / t_hilrig:.0f}x hilrig's measured total")
    print(json.dumps(dict(grid=a.grid, workers=a.workers, hilrig_s=t_hilrig,
                          hilrig_search_s=t_search, hilrig_evaluations=res.evaluations,
                          hilrig_tracks=tracks, plain_evaluations=len(per_eval),
                          plain_s=t_plain, plain_median_eval_s=med_plain,
                          plain_best_tracks=best[2], ratio_per_eval=med_plain / med_hilrig,
                          projected_plain_s=projected)))


if __name__ == "__main__":
    main()
