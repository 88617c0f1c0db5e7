"""Cost of the operating-point analysis, next to python-control doing the same per point in the
same run.

hilrig per point: the whole analysis (steady state by Newton's method on the compiled kernels,
the finite-difference Jacobians, the sampled loop, closed-loop poles, margins, output impedance
and Middlebrook's ratio: ``linearize`` + ``point.summary``), and the map's per-point work
(``linearize`` + the largest pole, what ``hilrig analyze --map`` does without --with-margins).
python-control per point, from the same continuous plant and discrete controller matrices (it
cannot linearise a compiled kernel, so it gets them for free): ``ss``, ``c2d`` (ZOH), the
series and feedback connections, ``poles``, ``stability_margins`` and ``frequency_response``
of the output impedance's loop on 1000 frequencies, i.e. the figures hilrig computes.

Then a 25 x 25 stability map of the three shipped controllers (1875 points) on all local cores
(``grid.stability_map``), against python-control's per-point time for the closed-loop poles
(c2d, series, feedback, poles) times 1875 (one core).

Demo plant (two-stage LC), demo scenario's timing; operating points over 300-500 V, 0-80 kW.

Run: python bench/analysis.py [--points 40] [--repeat 5]
The last printed line is JSON.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics as st
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
CONTROLLERS = ("cascaded_pi", "state_feedback", "flatness")


def control_per_point(m, full=True):
    """python-control: the sampled loop, its poles, margins and output impedance from m's
    matrices (the same figures as point.summary); ``full=False``: the closed-loop poles only
    (what a map point computes)."""
    import control
    Ts = m.Ts
    S = np.zeros((len(m.reads), m.C.shape[0]))
    for row, name in enumerate(m.reads):
        S[row, m.outputs.index(name) if name in m.outputs else 0] = 1.0
    plant = control.c2d(control.ss(m.A, m.B, S @ m.C, S @ m.D), Ts, "zoh")
    ctrl = control.ss(m.Ac, m.Bc, m.Cc, m.Dc, Ts)
    L = control.series(plant, -ctrl)              # u_in -> -(u_out): the loop gain
    cl = control.feedback(L, 1)
    poles = cl.poles()
    if not full:
        return poles
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mg = control.stability_margins(L)
    zsys = control.ss(m.Az, m.Bz, -m.Cz, -m.Dz, Ts)
    fn = 0.5 / Ts
    f = np.geomspace(1e-6 * fn, fn, 1000)[:-1]
    zr = control.frequency_response(zsys, 2 * np.pi * f)
    return poles, mg, zr


def per_point(args):
    from hilrig.runtime.analysis import linear, point
    from hilrig.runtime.run import prepare
    from hilrig.runtime.scenario import load_scenario
    rng = np.random.default_rng(1)
    pts = [(float(v), float(p)) for v, p in zip(rng.uniform(300, 500, args.points),
                                                 rng.uniform(0, 80e3, args.points))]
    out = {}
    for c in CONTROLLERS:
        sc = load_scenario(ROOT / "runtime" / "data" / "demo.toml", {"controller.plugin": c})
        prep = prepare(sc)
        k = linear.kernels(prep)
        point.summary(linear.linearize(prep, 400.0, 50e3, k))  # compile / warm
        models = [linear.linearize(prep, v, p, k) for v, p in pts]
        control_per_point(models[0])
        full, mapw, pc, pcm, opw = [], [], [], [], []
        for _ in range(args.repeat):  # interleaved: the three measured side by side
            t0 = time.perf_counter()
            for v, p in pts:
                point.summary(linear.linearize(prep, v, p, k))
            t1 = time.perf_counter()
            for v, p in pts:
                point.largest_pole(linear.linearize(prep, v, p, k))
            t2 = time.perf_counter()
            for m in models:
                control_per_point(m)
            t3 = time.perf_counter()
            for m in models:
                control_per_point(m, full=False)
            t4 = time.perf_counter()
            for v, p in pts:
                linear.operating_point(prep, v, p, k)
            t5 = time.perf_counter()
            opw.append((t5 - t4) / len(pts))
            n = len(pts)
            full.append((t1 - t0) / n)
            mapw.append((t2 - t1) / n)
            pc.append((t3 - t2) / n)
            pcm.append((t4 - t3) / n)
        out[c] = dict(hilrig_full_ms=st.median(full) * 1e3, hilrig_map_point_ms=st.median(mapw) * 1e3,
                      python_control_ms=st.median(pc) * 1e3,
                      python_control_poles_ms=st.median(pcm) * 1e3,
                      hilrig_steady_state_ms=st.median(opw) * 1e3,
                      ratio_full=st.median(pc) / st.median(full),
                      ratio_map_point=st.median(pcm) / st.median(mapw))
        r = out[c]
        print(f"{c:15s} whole analysis: hilrig {r['hilrig_full_ms']:6.2f} ms/point, python-control "
              f"(given the matrices) {r['python_control_ms']:6.2f} ms, ratio "
              f"{r['ratio_full']:.2f}; map point (poles): hilrig {r['hilrig_map_point_ms']:5.2f} ms, "
              f"python-control {r['python_control_poles_ms']:5.2f} ms, ratio {r['ratio_map_point']:.2f} "
              f"(hilrig's includes the steady state, {r['hilrig_steady_state_ms']:.2f} ms, and "
              f"the linearisation, which python-control is given)")
    return out


def map_run(per):
    from hilrig.runtime.analysis import grid
    from hilrig.runtime.trials.envelope import Grid
    path = ROOT / "examples" / "envelope.toml"
    text = path.read_text()
    g = Grid.parse("50:600", "0:150e3", "25x25")
    tasks = grid.tasks_for(text, path.name, str(path), list(CONTROLLERS), g)
    workers = os.cpu_count() or 1
    t0 = time.perf_counter()
    rows = grid.stability_map(tasks, workers=workers)
    wall = time.perf_counter() - t0
    pc_serial = (sum(per[c]["python_control_poles_ms"] for c in CONTROLLERS) / len(CONTROLLERS)
                 * len(rows) / 1e3)
    print(f"stability map 25 x 25 x {len(CONTROLLERS)} controllers ({len(rows)} points) on "
          f"{workers} worker(s): {wall:.2f} s wall (preparing the controllers included); "
          f"python-control's per-point time for the poles x {len(rows)} on one core (given the "
          f"matrices): {pc_serial:.2f} s; "
          f"ratio {pc_serial / wall:.2f}")
    return dict(points=len(rows), workers=workers, wall_s=wall,
                python_control_serial_s=pc_serial, ratio=pc_serial / wall)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--points", type=int, default=40)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    per = per_point(args)
    mp = map_run(per)
    print(json.dumps(dict(per_point=per, map=mp)))


if __name__ == "__main__":
    main()
