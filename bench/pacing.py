"""Paced mode: how close to its deadlines the paced loop starts each tick, with and without
its real-time requests to the operating system, next to a bare Python busy-wait loop of the
same rate, all measured in the same run.

Paced: ``hilrig.runtime.live.paced.run_paced`` on the demo scenario (demo data: two-stage LC plant,
cascaded PI, battery-model reference, inverter load steps) with Ts = 1/rate, recording every
tick, for ``--seconds`` of wall clock, twice: with the real-time requests (SCHED_FIFO, locked
memory; what the system granted is printed) and without them (``realtime=False``, as
``--no-realtime``); both pinned to the last core as always. Lateness = start of a tick minus
its deadline (``tick_lateness`` in the recording); a *late* tick starts more than one period
after its deadline; the late share is late ticks over ticks. The paced runs' timing verdicts
(default ``[paced]`` limits) are printed too.

Bare loop: Python computes each deadline t0 + k/rate on ``time.perf_counter`` and spins until
it has passed (sleeping first when more than 300 us away, as the paced runner's fallback does),
does nothing else, and records the same lateness. It is what Python on this machine allows
with no work at all: its lateness is the machine's own scheduling noise.

Rates 10 kHz and 20 kHz; the three loops alternate ``--reps`` times per rate and the medians
are reported, with the ratios of p99 and max lateness and of the late share: with requests /
without, with requests / bare, without / bare. Target (printed, not asserted): the paced
loop's p99 lateness (with requests) <= 1.2x the bare loop's. The machine is shared and noisy:
only the side-by-side ratios mean anything. Not run in CI.

Run: python bench/pacing.py [--seconds 10] [--reps 3]
Last line: JSON with every figure and ratio.
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def bare_loop(rate: float, seconds: float) -> np.ndarray:
    from hilrig.runtime.live.paced import lower_timer_slack, wait_until
    lower_timer_slack()
    n = int(rate * seconds)
    period = 1.0 / rate
    lat = np.empty(n)
    t0 = time.perf_counter() + 0.002
    for k in range(n):
        deadline = t0 + k * period
        lat[k] = wait_until(deadline) - deadline
    return lat


def paced_run(rate: float, seconds: float, folder: Path, realtime: bool = True):
    from hilrig.runtime.live.paced import run_paced
    from hilrig.runtime.recording import open_run
    from hilrig.runtime.scenario import load_scenario
    demo = Path(__file__).resolve().parents[1] / "runtime" / "data" / "demo.toml"
    sc = load_scenario(demo, overrides={"timing.Ts": 1.0 / rate, "timing.duration": seconds})
    sc = dataclasses.replace(sc, mode="paced")
    res = run_paced(sc, folder, overwrite=True, realtime=realtime)
    if not res.summary["completed"]:
        raise SystemExit(f"the paced run did not complete: {res.summary['end_event']}")
    return open_run(folder).signals["tick_lateness"], res.summary["paced"]


def stats(lat: np.ndarray, period: float) -> dict:
    us = lat * 1e6
    late = int((lat > period).sum())
    return {"p50_us": float(np.percentile(us, 50)), "p99_us": float(np.percentile(us, 99)),
            "max_us": float(us.max()), "late": late, "ticks": int(lat.size),
            "late_share": late / lat.size}


def ratio(a: float, b: float) -> float | None:
    return a / b if b > 0 else None


def rtext(r: float | None) -> str:
    return "n/a (0 below)" if r is None else f"{r:.2f}"


def med(rows: list[dict]) -> dict:
    return {k: statistics.median(r[k] for r in rows) for k in rows[0]}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--reps", type=int, default=3)
    args = ap.parse_args()
    os.environ.setdefault("HILRIG_CACHE_DIR", tempfile.mkdtemp(prefix="hilrig-bench-"))
    out = {"seconds": args.seconds, "reps": args.reps, "cores": os.cpu_count(), "rates": {}}
    from hilrig.runtime.live.paced import realtime_text
    with tempfile.TemporaryDirectory() as tmp:
        _, pc = paced_run(20_000.0, 0.05, Path(tmp) / "warm")  # compile (or load) once, not timed
        granted = realtime_text(pc["realtime"], pc.get("pinned_core"))
        out["realtime"] = pc["realtime"]
        print(f"real-time requests: {granted}")
        for rate in (10_000.0, 20_000.0):
            period = 1.0 / rate
            runs: dict[str, list[dict]] = {"rt": [], "plain": [], "bare": []}
            verdicts: dict[str, list[bool]] = {"rt": [], "plain": []}
            for rep in range(args.reps):
                for key, rt in (("rt", True), ("plain", False)):
                    lat, pc = paced_run(rate, args.seconds, Path(tmp) / f"p{rate:g}-{key}-{rep}", rt)
                    runs[key].append(stats(lat, period))
                    verdicts[key].append(pc["verdict"]["timing_met"])
                runs["bare"].append(stats(bare_loop(rate, args.seconds), period))
            m = {k: med(v) for k, v in runs.items()}
            ratios = {f"{q}_{a}_over_{b}": ratio(m[a][q], m[b][q])
                      for q in ("p99_us", "max_us", "late_share")
                      for a, b in (("rt", "plain"), ("rt", "bare"), ("plain", "bare"))}
            target = ratios["p99_us_rt_over_bare"]
            out["rates"][f"{rate / 1e3:g} kHz"] = {
                "paced_realtime": m["rt"], "paced_no_realtime": m["plain"], "bare": m["bare"],
                "timing_met": verdicts, "ratios": ratios,
                "target_met": target is not None and target <= 1.2}
            print(f"{rate / 1e3:g} kHz, {args.seconds:g} s, medians of {args.reps}:")
            for name, key in (("paced, requests", "rt"), ("paced, none", "plain"),
                              ("bare Python loop", "bare")):
                s = m[key]
                met = (f"  timing met {sum(verdicts[key])}/{len(verdicts[key])}"
                       if key in verdicts else "")
                print(f"  {name:17s} lateness p50 {s['p50_us']:7.1f} us  p99 {s['p99_us']:7.1f} us"
                      f"  max {s['max_us']:8.1f} us  late {100 * s['late_share']:6.3f} % "
                      f"({s['late']:.0f} of {s['ticks']:.0f}){met}")
            for q, label in (("p99_us", "p99"), ("max_us", "max"), ("late_share", "late share")):
                print(f"  {label:10s} ratio  requests/none {rtext(ratios[f'{q}_rt_over_plain'])}"
                      f"  requests/bare {rtext(ratios[f'{q}_rt_over_bare'])}"
                      f"  none/bare {rtext(ratios[f'{q}_plain_over_bare'])}")
            print(f"  target p99 requests/bare <= 1.2: "
                  f"{'met' if target is not None and target <= 1.2 else 'not met'}")
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
