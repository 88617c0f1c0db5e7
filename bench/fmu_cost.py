"""Per-tick cost of an FMU plant next to the embedded plant, measured in the same run.

The FMU is the tests' FMU of the two-stage LC plant (tests/fmu/two_stage_lc.c, built here with
the system C compiler): the same equations as the embedded plant two_stage_lc. Scenario: the
tests' FMU scenario (tests/fmu/build.py, invented demo data: a 100 V step, a load step from
20 kW to 50 kW and 100 ohm), cascaded_pi, Ts = 50 us, 4 RK4 substeps (fixed), recording on.

* embedded: hilrig's SIL chunk loop (``run_chunk``) with two_stage_lc (its own rk4_step);
* fmu me: the same loop with the FMU through model exchange: 4 substeps x 4 RK4 stages of
  fmi2SetTime, fmi2SetContinuousStates, fmi2SetReal and fmi2GetDerivatives called by address,
  plus one output evaluation (with fmi2GetReal) per tick;
* fmu cs: the FMU through co-simulation: one fmi2DoStep per tick (the FMU's own 4 RK4 steps),
  fmi2SetReal of the inputs, fmi2GetReal of the states and outputs;
* fmi3 me, fmi3 cs: the same model built as an FMI 3.0 FMU (the fmi3 functions).

Each is run --reps times, interleaved, timed with process_time; the medians are printed as ns
per tick and the ratios to the embedded plant. The runs' recordings are compared too (largest
difference of v_out from the embedded run's), so a fast but wrong variant shows.

Run: python bench/fmu_cost.py [--reps 7] [--duration 1.0]
The last printed line is JSON.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics as st
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=7)
    ap.add_argument("--duration", type=float, default=1.0, help="simulated seconds per run")
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="hilrig-fmu-cost-"))
    os.environ.setdefault("HILRIG_CACHE_DIR", str(tmp / "cache"))
    from hilrig.runtime import run as R
    from hilrig.runtime.scenario import parse_scenario
    from tests.fmu import build as fmu_build

    fmu = fmu_build.build_fmu(tmp)
    fmu3 = fmu_build.build_fmu(tmp, name="fmi3.fmu", version=3)
    dur = f'duration = "{args.duration} s"'
    texts = {"embedded": fmu_build.scenario(None),
             "fmu me": fmu_build.scenario(fmu),
             "fmu cs": fmu_build.scenario(fmu, "co_simulation", "n_sub = 4"),
             "fmi3 me": fmu_build.scenario(fmu3),
             "fmi3 cs": fmu_build.scenario(fmu3, "co_simulation", "n_sub = 4")}
    scs = {k: parse_scenario(t.replace('duration = "0.03 s"', dur), name=f"{k}.toml",
                             path=str(tmp / "x.toml"))
           for k, t in texts.items()}
    fns, recs, preps = {}, {}, {}
    for key, sc in scs.items():
        fns[key] = R.compile_loop(sc)[0]
        preps[key] = R.prepare(sc)
        recs[key] = np.zeros((sc.n_ticks, len(preps[key].signals)))

    def run(key):
        sc = scs[key]
        a = R.prepare(sc).args
        n = sc.n_ticks
        chunk = int(round(sc.recording["chunk"] / sc.Ts))
        done = 0
        while done < n:
            done += R._call(fns[key], done, min(chunk, n - done), recs[key][done:], a)

    for key in scs:  # compile or load, and keep one recording of each
        run(key)
    iv = [s.name for s in preps["embedded"].signals].index("v_out")
    diff = {k: float(np.max(np.abs(recs[k][:, iv] - recs["embedded"][:, iv]))) for k in scs}
    ns = {k: [] for k in scs}
    n_ticks = scs["embedded"].n_ticks
    for _ in range(args.reps):
        for key in scs:
            t = time.process_time()
            run(key)
            ns[key].append((time.process_time() - t) / n_ticks * 1e9)
    med = {k: st.median(v) for k, v in ns.items()}
    print(f"scenario: two-stage LC plant, cascaded_pi, Ts 50 us, 4 RK4 substeps, "
          f"{args.duration:g} s simulated, recording on; medians of {args.reps}, interleaved "
          f"(process_time)")
    for k in scs:
        print(f"  {k:10s} {med[k]:9.0f} ns/tick   x{med[k] / med['embedded']:6.2f} of embedded   "
              f"max |v_out - embedded| {diff[k]:.3g} V")
    print(json.dumps({"ns_per_tick": med, "ratio_to_embedded": {k: med[k] / med["embedded"] for k in med},
                      "max_v_out_diff_V": diff, "reps": args.reps, "duration_s": args.duration}))
    from hilrig.runtime.fmu import instance
    instance.release_all()


if __name__ == "__main__":
    main()
