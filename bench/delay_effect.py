"""The actuation delay's effect on the shipped controllers (a study, not a timing bench).

Runs ``hilrig compare`` on a scenario (default: examples/step_100V.toml, the 100 V step at
50 kW, demo data) with every shipped controller, once per actuation delay, and ``hilrig envelope``
on a small grid (3 target voltages x 3 load powers of examples/envelope.toml) likewise; prints
one markdown table per study (outcome, overshoot, settling, IAE per controller and delay; and
the envelope's counts of cells per verdict), as docs/design-notes.md quotes them.

Run: python bench/delay_effect.py [--delays 0,0.5,1,1.5] [--scenario examples/step_100V.toml]
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
CONTROLLERS = "cascaded_pi,state_feedback,flatness"


def _fmt(v, scale=1.0, nd=3):
    return "-" if not isinstance(v, (int, float)) else f"{v * scale:.{nd}g}"


def compare(scenario: Path, delays, tmp: Path) -> list[str]:
    lines = ["| controller | delay [periods] | outcome | overshoot [%] | settling [ms] | IAE [V s] |",
             "| --- | --- | --- | --- | --- | --- |"]
    rows = {}
    for dl in delays:
        out = tmp / f"cmp_{dl}"
        p = subprocess.run(CLI + ["compare", str(scenario), "--controllers", CONTROLLERS,
                                  "--set", f"timing.actuation_delay={dl}", "--out", str(out),
                                  "--json", "--overwrite"], capture_output=True, text=True,
                           timeout=1800)
        if p.returncode not in (0, 1):
            raise SystemExit(p.stdout + p.stderr)
        data = json.loads((out / "comparison.json").read_text())
        for name, r in data.items():
            rows.setdefault(name, []).append((dl, r))
    for name in sorted(rows):
        for dl, r in rows[name]:
            oc = r.get("outcome") or {}
            lines.append(f"| {name} | {dl:g} | {oc.get('text', oc.get('status', '?'))} | "
                         f"{_fmt(r.get('overshoot_pct'))} | "
                         f"{_fmt(r.get('settling_time_s', r.get('settling_s')), 1e3)} | "
                         f"{_fmt(r.get('iae_Vs'))} |")
    return lines


def envelope(delays, tmp: Path) -> list[str]:
    lines = ["| controller | delay [periods] | cells by verdict |", "| --- | --- | --- |"]
    for dl in delays:
        out = tmp / f"env_{dl}"
        p = subprocess.run(CLI + ["envelope", str(ROOT / "examples" / "envelope.toml"),
                                  "--controllers", CONTROLLERS, "--grid", "3x3", "--headless",
                                  "--set", f"timing.actuation_delay={dl}", "--out", str(out),
                                  "--json"], capture_output=True, text=True, timeout=3600)
        if p.returncode not in (0, 1):
            raise SystemExit(p.stdout + p.stderr)
        data = json.loads(p.stdout[p.stdout.index("{"):])
        for name, res in sorted(data.items()):
            counts = res.get("outcomes", {}) if isinstance(res, dict) else {}
            text = ", ".join(f"{k} {v}" for k, v in counts.items() if v) or json.dumps(res)[:80]
            lines.append(f"| {name} | {dl:g} | {text} |")
    return lines


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--delays", default="0,0.5,1,1.5")
    ap.add_argument("--scenario", default=str(ROOT / "examples" / "step_100V.toml"))
    ap.add_argument("--no-envelope", action="store_true")
    args = ap.parse_args()
    delays = [float(d) for d in args.delays.split(",")]
    tmp = Path(tempfile.mkdtemp(prefix="hilrig-delay-"))
    print(f"compare on {Path(args.scenario).name}:")
    print("\n".join(compare(Path(args.scenario), delays, tmp)))
    if not args.no_envelope:
        print("\nenvelope (examples/envelope.toml, 3 x 3 grid):")
        print("\n".join(envelope(delays, tmp)))


if __name__ == "__main__":
    main()
