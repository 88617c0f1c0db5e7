"""Paralleled units: bus ticks per second for N = 1, 2, 4, 8 next to N single-unit runs.

The N-unit scenario: N units of the demo output stage (two_stage_lc) under cascaded_pi, droop
sharing, per-unit over-current trips, one bus; two topologies: "cabled" (every cable 5 mohm,
2 uH, bus 2 mF) and "merged" (zero cable impedance: one node). 20 kHz control (Ts = 50 us),
4 RK4 substeps asked (the bus plant's ``linear_rate`` may raise them: printed as "sub"), a
400 -> 420 V step at 0.1 s, a constant-power load of N x 25 kW, one bus interlock.

The peer, measured in the same process and run, interleaved with the N-unit loops: the single
unit (the same unit plant and controller, no [units], a 25 kW load), whose time per tick
times N is what N separate single-unit loops cost. The ratio printed is

    ratio = (time per bus tick of the N-unit loop) / (N x time per tick of the single unit)

(target: at most 1.2) and, for N = 8 at 20 kHz, the factor faster than real time
(target: at least 20). Medians of ``--reps`` repeats after a warm-up. A cabled bus is a stiffer
plant than one unit (each cable's inductance against the unit's and the bus's capacitors): the
runtime's step rule may give it more RK4 sub-steps per tick ("sub"); "per sub" is the ratio per
sub-step, (time per tick / sub) / (N x single time per tick / single sub), the cost of the
units' machinery apart from the extra sub-steps their cables ask for.

Two ways of timing, as bench/sil_throughput.py: the compiled loop alone (the chunk function on
preallocated arrays, the same chunking as a run) and end to end (``run_scenario``: set-up,
loop, HDF5 writes, metrics; a whole ``--duration`` run). The loops are timed in a pass of their
own, before the end-to-end runs (interleaved with runs, the units' loops measured about twice
as slow as in a row of loops alone; the single unit's did not).

Run: python bench/parallel.py [--reps 5] [--duration 0.5] [--counts 1,2,4,8] [--no-e2e]
A first run compiles one loop per (N, topology): about 20-40 s each. The last line is JSON.
"""
from __future__ import annotations

import argparse
import json
import statistics as st
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

P_UNIT = 25e3  # W per unit

SINGLE = """
title = "bench: one unit, two-stage LC + cascaded PI, 20 kHz"
[timing]
Ts = "50 us"
substeps = 4
duration = "{duration} s"
[plant]
plugin = "two_stage_lc"
[controller]
plugin = "cascaded_pi"
[design]
defaults = "declared"
[reference]
plugin = "profile"
points = [[0, "400 V"], ["0.1 s", "400 V"], ["0.1 s", "420 V"]]
[load]
[[load.points]]
t = 0
P = {p}
[[interlocks]]
signal = "v_out"
above = "580 V"
"""

UNITS = SINGLE + """
[units]
count = {n}
sharing = "droop"
droop_R = "50 mohm"
I_trip = "550 A"
{cables}
"""

CABLES = {"cabled": 'cable_R = "5 mohm"\ncable_L = "2 uH"\nC_bus = "2 mF"', "merged": ""}


def scenario(text: str):
    from hilrig.runtime.scenario import parse_scenario
    return parse_scenario(text, name="bench_parallel.toml")


class Timed:
    """One scenario's compiled loop, timed alone and end to end."""

    def __init__(self, label: str, sc, n_units: int):
        from hilrig.runtime import run as R
        self.label, self.sc, self.n_units = label, sc, n_units
        self.fn, _, _ = R.compile_loop(sc)
        prep = R.prepare(sc)
        self.chunk = int(round(sc.recording["chunk"] / sc.Ts))
        self.rec = np.zeros((self.chunk, len(prep.signals)))
        R._call(self.fn, 0, 0, self.rec, prep.args)
        self.substeps = R.integration_plan(sc)["substeps"]
        self.loop_s: list[float] = []  # seconds per tick
        self.e2e_s: list[float] = []

    def loop_once(self) -> None:
        from hilrig.runtime import run as R
        a = R.prepare(self.sc).args
        n = self.sc.n_ticks
        t = time.perf_counter()
        done = 0
        while done < n:
            got = R._call(self.fn, done, min(self.chunk, n - done), self.rec, a)
            if got <= 0:
                raise RuntimeError(f"{self.label}: the loop stopped at tick {done}")
            done += got
        self.loop_s.append((time.perf_counter() - t) / n)

    def e2e_once(self, folder: Path) -> None:
        from hilrig.runtime import run as R
        t = time.perf_counter()
        res = R.run_scenario(self.sc, folder, overwrite=True)
        self.e2e_s.append((time.perf_counter() - t) / self.sc.n_ticks)
        if not res.summary["completed"]:
            raise RuntimeError(f"{self.label}: the run did not complete "
                               f"({res.summary.get('end_event') or res.summary.get('trip')})")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--reps", type=int, default=5)
    ap.add_argument("--duration", type=float, default=0.5, help="simulated seconds per run")
    ap.add_argument("--counts", default="1,2,4,8")
    ap.add_argument("--topologies", default="cabled,merged")
    ap.add_argument("--no-e2e", action="store_true",
                    help="time the loops alone (no whole runs; their columns print as nan)")
    args = ap.parse_args(argv)
    counts = [int(x) for x in args.counts.split(",")]
    topos = [t for t in args.topologies.split(",") if t]
    import warnings
    warnings.simplefilter("ignore")
    d = f"{args.duration:g}"
    t0 = time.perf_counter()
    single = Timed("single unit", scenario(SINGLE.format(duration=d, p=P_UNIT)), 1)
    multi, failed = {}, {}
    for topo in topos:
        for n in counts:
            text = UNITS.format(duration=d, p=n * P_UNIT, n=n, cables=CABLES[topo])
            try:
                multi[(topo, n)] = Timed(f"{n} units {topo}", scenario(text), n)
            except Exception as exc:  # a loop that does not compile: said, and the rest runs
                failed[(topo, n)] = f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"
                print(f"{n} units {topo}: the loop did not compile ({failed[(topo, n)]})",
                      flush=True)
    print(f"compiled or loaded {1 + len(multi)} loops in {time.perf_counter() - t0:.1f} s",
          flush=True)
    everyone = [single, *multi.values()]
    with tempfile.TemporaryDirectory() as tmp:
        for t in everyone:  # warm-up: one loop and one run each
            t.loop_once()
            if not args.no_e2e:
                t.e2e_once(Path(tmp) / "warm")
        for t in everyone:
            t.loop_s.clear()
            t.e2e_s.clear()
        # each pass interleaved, so that the machine's load hits all alike; the loops in a
        # pass of their own: a units loop timed right after a run_scenario in the same
        # process took about twice as long as in a row of loops alone
        for i in range(args.reps):
            for t in everyone:
                t.loop_once()
        for i in range(0 if args.no_e2e else args.reps):
            for t in everyone:
                t.e2e_once(Path(tmp) / f"run{i}")
    def med(xs):
        return st.median(xs) if xs else float("nan")

    s1, e1 = med(single.loop_s), med(single.e2e_s)
    ts = single.sc.Ts
    print(f"Ts = {ts * 1e6:g} us, {args.duration:g} s simulated per run, median of {args.reps} "
          f"(interleaved, loops and runs in passes of their own); single unit: loop {1 / s1:,.0f} ticks/s ({s1 * 1e9:.0f} ns/tick, "
          f"sub {single.substeps}), end to end {1 / e1:,.0f} ticks/s ({e1 * 1e9:.0f} ns/tick)")
    head = (f"{'topology':8s} {'N':>2s} {'sub':>3s} {'loop ticks/s':>13s} {'ns/tick':>8s} "
            f"{'N x single ns':>13s} {'ratio':>6s} {'per sub':>7s} {'x real time':>11s} | "
            f"{'e2e ticks/s':>12s} "
            f"{'ratio':>6s} {'x real time':>11s}")
    print(head)
    print("-" * len(head))
    out = {"Ts_s": ts, "single_loop_ns": s1 * 1e9, "single_e2e_ns": e1 * 1e9, "rows": []}
    for (topo, n), t in multi.items():
        m, e = med(t.loop_s), med(t.e2e_s)
        ratio, ratio_e = m / (n * s1), e / (n * e1)
        per_sub = ratio * single.substeps / t.substeps
        rt, rt_e = 1.0 / (m / ts), 1.0 / (e / ts)
        print(f"{topo:8s} {n:2d} {t.substeps:3d} {1 / m:13,.0f} {m * 1e9:8.0f} {n * s1 * 1e9:13.0f} "
              f"{ratio:6.2f} {per_sub:7.2f} {rt:11.1f} | {1 / e:12,.0f} {ratio_e:6.2f} {rt_e:11.1f}")
        out["rows"].append({"topology": topo, "n": n, "substeps": t.substeps,
                            "loop_ticks_per_s": 1 / m, "loop_ns_per_tick": m * 1e9,
                            "ratio": ratio, "ratio_per_substep": per_sub, "x_real_time": rt, "e2e_ticks_per_s": 1 / e,
                            "ratio_e2e": ratio_e, "x_real_time_e2e": rt_e})
    for (topo, n), why in failed.items():
        print(f"{topo:8s} {n:2d}   did not compile: {why}")
        out["rows"].append({"topology": topo, "n": n, "failed": why})
    ok = [r for r in out["rows"] if "failed" not in r]
    worst = max(r["ratio"] for r in ok) if ok else float("nan")
    worst_sub = max(r["ratio_per_substep"] for r in ok) if ok else float("nan")
    eight = [r for r in ok if r["n"] == 8]
    print(f"target: N-unit loop <= 1.2 x N single-unit loops: worst ratio {worst:.2f} "
          f"({'met' if worst <= 1.2 else 'NOT met'}); per sub-step {worst_sub:.2f} "
          f"({'met' if worst_sub <= 1.2 else 'NOT met'})")
    if eight:
        slow = min(r["x_real_time"] for r in eight)
        print(f"target: 8 units at {1 / ts / 1e3:g} kHz >= 20x real time (loop alone): "
              f"{slow:.1f}x ({'met' if slow >= 20 else 'NOT met'})")
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
