"""The shipped controllers' designs from the plant on six test plants (demo data), against their
declared numbers and against hilrig tune: the table of docs/design-notes.md "Designs from the
plant", reproducible.

Per plant and controller, on an N x N grid of the plant's stated design range: the worst
largest closed-loop |z| and how many points are stable, for the declared numbers
(``[design] defaults = "declared"``) and for the design; the design's margin check (the loop
also stable with its gain off by 3 dB and its phase by 20 degrees); and hilrig tune's result
(analysis only: the search's guarded measure before and after, and the nominal worst |z|).
The plants are tests/integration/test_design.py's (one definition).

Run: python bench/designs.py [--grid 7] [--no-tune]
Prints a Markdown table; the last line is JSON.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--grid", type=int, default=7)
    ap.add_argument("--no-tune", action="store_true")
    ap.add_argument("--workers", type=int, default=2)
    a = ap.parse_args()
    from hilrig.runtime.analysis import design as dmod
    from hilrig.runtime.analysis import tune as tmod
    from hilrig.runtime.errors import ScenarioError
    from tests.integration.test_design import CONTROLLERS, PLANTS, prepared

    rows = []
    print("| plant | controller | declared: worst abs(z) (stable) | designed | margins 3 dB / 20 deg "
          "(points short) | tuned: guarded before -> after (nominal) |")
    print("| --- | --- | --- | --- | --- | --- |")
    for plant, (_, _, _, (v_lo, v_hi), (p_lo, p_hi)) in PLANTS.items():
        gv = np.linspace(v_lo, v_hi, a.grid)
        gp = np.linspace(p_lo, p_hi, a.grid)
        pts = [(float(v), float(p)) for v in gv for p in gp]
        for c in CONTROLLERS:
            row = dict(plant=plant, controller=c)
            for d in ("declared", "plant"):
                try:
                    prep = prepared(plant, c, d)
                except ScenarioError as exc:
                    row[d] = dict(error=str(exc))
                    continue
                sc = dmod._Scorer(prep, prep.ctx, [])
                w, zs = sc.score(prep.sc.controller.values, pts, movable=False)
                row[d] = dict(worst=w, stable=sum(z is not None and z < 1.0 for z in zs),
                              points=len(pts))
                if d == "plant":
                    row["margins"] = (prep.design or {}).get("margins")
            if not a.no_tune:
                prep = prepared(plant, c, "plant")
                t0 = time.perf_counter()
                res = tmod.tune(prep, list(prep.sc.controller.plugin.declaration.tunable),
                                tuple(gv), tuple(gp), starts=2, workers=a.workers)
                ob = res.checks["objective"]
                row["tuned"] = dict(guarded_before=ob["before"], guarded_after=ob["tuned"],
                                    nominal=res.after_worst, fallback=ob.get("fallback"),
                                    seconds=time.perf_counter() - t0)
            rows.append(row)

            def cell(x):
                if "error" in x:
                    return "does not build"
                return f"{x['worst']:.3f} ({x['stable']}/{x['points']})"
            mg = row.get("margins") or {}
            t = row.get("tuned")
            print(f"| {plant} | {c} | {cell(row['declared'])} | {cell(row['plant'])} | "
                  f"{mg.get('points_short_of_margin', '-')} | "
                  + (f"{t['guarded_before']:.3f} -> {t['guarded_after']:.3f} ({t['nominal']:.3f})"
                     + (" plain" if t["fallback"] else "") if t else "-") + " |", flush=True)
    print(json.dumps(rows, default=float))


if __name__ == "__main__":
    main()
