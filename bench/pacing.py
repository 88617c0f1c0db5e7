"""Paced mode: how close to its deadlines the paced loop starts each tick, next to a bare
Python busy-wait loop of the same rate, measured in the same run.

Paced: ``hilrig.runtime.paced.run_paced`` on the demo scenario (demo data: two-stage LC plant,
cascaded PI, battery-model reference, inverter load steps) with Ts = 1/rate, recording every
tick, for ``--seconds`` of wall clock. Lateness = start of a tick minus its deadline
(``tick_lateness`` in the recording); a *late* tick starts more than one period after its
deadline.

Bare loop: Python computes each deadline t0 + k/rate on ``time.perf_counter`` and spins until
it has passed (sleeping first when more than 300 us away, as the paced runner's fallback does),
does nothing else, and records the same lateness. It is what Python on this machine allows
with no work at all: its lateness is the machine's own scheduling noise.

Rates 10 kHz and 20 kHz; the two loops alternate ``--reps`` times per rate and the medians are
reported. Target (printed, not asserted): the paced loop's p99 lateness <= 1.2x the bare loop's.
The machine is shared and noisy: only the side-by-side ratio means anything. Not run in CI.

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
    from hilrig.runtime.paced import lower_timer_slack, wait_until
    lower_timer_slack()
    n = int(rate * seconds)
    period = 1.0 / rate
    lat = np.empty(n)
    t0 = time.perf_counter() + 0.002
    for k in range(n):
        deadline = t0 + k * period
        lat[k] = wait_until(deadline) - deadline
    return lat


def paced_run(rate: float, seconds: float, folder: Path) -> np.ndarray:
    from hilrig.runtime.paced import run_paced
    from hilrig.runtime.recording import open_run
    from hilrig.runtime.scenario import load_scenario
    demo = Path(__file__).resolve().parents[1] / "runtime" / "data" / "demo.toml"
    sc = load_scenario(demo, overrides={"timing.Ts": 1.0 / rate, "timing.duration": seconds})
    sc = dataclasses.replace(sc, mode="paced")
    res = run_paced(sc, folder, overwrite=True)
    if not res.summary["completed"]:
        raise SystemExit(f"the paced run did not complete: {res.summary['end_event']}")
    return open_run(folder).signals["tick_lateness"]


def stats(lat: np.ndarray, period: float) -> dict:
    us = lat * 1e6
    return {"p50_us": float(np.percentile(us, 50)), "p99_us": float(np.percentile(us, 99)),
            "max_us": float(us.max()), "late": int((lat > period).sum()), "ticks": int(lat.size)}


def med(rows: list[dict]) -> dict:
    return {k: statistics.median(r[k] for r in rows) for k in rows[0]}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--reps", type=int, default=3)
    args = ap.parse_args()
    os.environ.setdefault("HILRIG_CACHE_DIR", tempfile.mkdtemp(prefix="hilrig-bench-"))
    out = {"seconds": args.seconds, "reps": args.reps, "cores": os.cpu_count(), "rates": {}}
    with tempfile.TemporaryDirectory() as tmp:
        paced_run(20_000.0, 0.05, Path(tmp) / "warm")  # compile (or load) once, not timed
        for rate in (10_000.0, 20_000.0):
            period = 1.0 / rate
            paced, bare = [], []
            for rep in range(args.reps):
                paced.append(stats(paced_run(rate, args.seconds, Path(tmp) / f"p{rate:g}-{rep}"), period))
                bare.append(stats(bare_loop(rate, args.seconds), period))
            p, b = med(paced), med(bare)
            ratio = p["p99_us"] / b["p99_us"] if b["p99_us"] > 0 else None
            out["rates"][f"{rate / 1e3:g} kHz"] = {"paced": p, "bare": b, "p99_ratio": ratio,
                                                  "target_met": ratio is not None and ratio <= 1.2}
            print(f"{rate / 1e3:g} kHz, {args.seconds:g} s, medians of {args.reps}:")
            for name, s in (("paced loop", p), ("bare Python loop", b)):
                print(f"  {name:17s} lateness p50 {s['p50_us']:7.1f} us  p99 {s['p99_us']:7.1f} us"
                      f"  max {s['max_us']:8.1f} us  late ticks {s['late']:.0f} of {s['ticks']:.0f}")
            print(f"  p99 ratio paced / bare = {ratio:.2f} (target <= 1.2: "
                  f"{'met' if ratio is not None and ratio <= 1.2 else 'not met'})")
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
