"""The README's figure of paralleled units: the shipped four-unit example (demo data) with
droop and with the decentralised sharing controller, side by side; and the sharing metrics of
both runs as a Markdown table.

    python tools/units_figure.py [--out docs/units.png] [--runs DIR]

Runs both scenarios (SIL), then draws the bus voltage and each unit's output current with its
share. The numbers printed are the runs' summary["sharing"] (runtime/trials/sharing.py).
"""
from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np

EXAMPLE = Path(__file__).resolve().parent.parent / "examples" / "units" / "four_units.toml"
CASES = (("droop", "droop"), ("exchange", "droop + sharing controller (exchange)"))


def main() -> None:
    from hilrig.runtime.recording import open_run
    from hilrig.runtime.run import run_scenario
    from hilrig.runtime.scenario import load_scenario

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="docs/units.png")
    ap.add_argument("--runs", default=None, help="folder for the two run folders (default: temp)")
    args = ap.parse_args()
    base = Path(args.runs) if args.runs else Path(tempfile.mkdtemp(prefix="units-figure-"))
    runs = {}
    for sharing, _ in CASES:
        sc = load_scenario(EXAMPLE, overrides={"units.sharing": sharing})
        res = run_scenario(sc, base / sharing, overwrite=True)
        runs[sharing] = open_run(res.folder)
        print(f"{sharing}: {res.summary['outcome']['text'] if 'text' in res.summary['outcome'] else res.summary['outcome']['status']}, run folder {res.folder}")

    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(2, 2, figsize=(11, 6.5), sharex=True, sharey="row")
    for col, (sharing, label) in enumerate(CASES):
        r = runs[sharing]
        t = r.time * 1e3
        ax = axes[0, col]
        ax.plot(t, r.signals["v_ref_raw"], ":", color="0.4", lw=1, label="v_ref")
        ax.plot(t, r.signals["v_out"], color="C0", lw=1.2, label="bus v_out")
        ax.set_title(label)
        ax.set_ylabel("bus voltage [V]")
        ax.grid(alpha=0.3)
        ax.legend(loc="lower right", fontsize=8)
        ax = axes[1, col]
        n = r.summary["units"]["count"] if "units" in r.summary else 4
        cur = [r.signals[f"unit{k}_i_out"] for k in range(1, n + 1)]
        total = np.sum(cur, axis=0)
        for k, i in enumerate(cur, 1):
            ax.plot(t, i, lw=1, label=f"unit {k}")
        ax.plot(t, total / n, "--", color="k", lw=0.8, label="equal share")
        ax.set_ylim(80, 200)
        ax.set_xlabel("time [ms]")
        ax.set_ylabel("unit output current [A]")
        ax.grid(alpha=0.3)
        ax.legend(loc="upper right", fontsize=8, ncol=2)
    fig.suptitle("Four paralleled units, 100 V step at 200 kW, load step to 280 kW at 60 ms "
                 "(examples/units/four_units.toml, demo data)", fontsize=10)
    fig.tight_layout()
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, dpi=90)
    print(f"wrote {out}")
    print()
    print("| sharing | bus RMS error [V] | bus steady error, mean [V] | largest steady deviation "
          "from a share | largest mean deviation from a share | circulating current, steady "
          "RMS [A] |")
    print("| --- | --- | --- | --- | --- | --- |")
    for sharing, label in CASES:
        s = runs[sharing].summary
        sh = s["sharing"]
        mean = max(sh["units"], key=lambda u: abs(u["mean_deviation_pct"] or 0.0))
        print(f"| {label} | {s['metrics']['rms_error_V']:.2f} | "
              f"{sh['bus']['steady_mean_error_V']:.2f} | "
              f"{sh['largest_deviation_pct']:+.2f} % (unit {sh['largest_deviation_unit']}) | "
              f"{mean['mean_deviation_pct']:+.2f} % (unit {mean['unit']}) | "
              f"{sh['circulating']['rms_A']:.2f} |")


if __name__ == "__main__":
    main()
