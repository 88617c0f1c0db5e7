"""What one attached live viewer costs the loop, measured side by side in the same run.

SIL: the demo scenario (demo data) for ``--sil-seconds`` simulated, once publishing telemetry
with one ``hilrig watch`` viewer attached and once with neither, alternating ``--reps`` times.
Reported: the loop's rate (ticks / time inside the compiled chunks, summary "ticks_per_s") and
the end-to-end rate (ticks / wall time of the run, which includes publishing between chunks);
cost = 1 - rate with viewer / rate without. Target (printed, not asserted): <= 5 %.

Paced: the demo at 20 kHz for ``--paced-seconds`` with and without a viewer: p99 lateness and
late ticks (a paced loop's rate is the clock's; what a viewer could cost it is lateness).

The viewer draws its full screen in a tmux pane of 80 x 24 when tmux is installed (the real
cost of drawing), else it prints plain lines. Shared, noisy 2-core machine: only the side by
side comparison means anything. Not run in CI.

Run: python bench/viewer_cost.py [--sil-seconds 20] [--paced-seconds 5] [--reps 3]
Last line: JSON with every figure.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

DEMO = Path(__file__).resolve().parents[1] / "runtime" / "data" / "demo.toml"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_viewer(address: str, tmux: bool):
    cmd = [sys.executable, "-m", "hilrig.runtime.cli", "watch", address, "--exit-when-done"]
    if tmux:
        name = f"hilrig-bench-{os.getpid()}-{time.monotonic_ns()}"
        subprocess.run(["tmux", "new-session", "-d", "-s", name, "-x", "80", "-y", "24",
                        " ".join(cmd)], check=True)
        return ("tmux", name)
    return ("proc", subprocess.Popen(cmd + ["--plain"], stdout=subprocess.DEVNULL))


def stop_viewer(v) -> None:
    kind, h = v
    if kind == "tmux":
        subprocess.run(["tmux", "kill-session", "-t", h], capture_output=True)
    else:
        h.terminate()
        h.wait(timeout=30)


def one_run(folder: Path, seconds: float, paced: bool, viewer: bool, tmux: bool) -> dict:
    from hilrig.runtime.live.paced import run_paced
    from hilrig.runtime.run import run_scenario
    from hilrig.runtime.scenario import load_scenario
    sc = load_scenario(DEMO, overrides={"timing.duration": seconds})
    address = f"tcp://127.0.0.1:{free_port()}" if viewer else None
    v = None
    if viewer:
        v = start_viewer(address, tmux)
        time.sleep(1.0)  # the viewer connects; PUB drops frames until then anyway
    t0 = time.perf_counter()
    try:
        if paced:
            res = run_paced(sc, folder, overwrite=True, telemetry=address)
        else:
            res = run_scenario(sc, folder, overwrite=True, telemetry=address)
    finally:
        wall = time.perf_counter() - t0
        if v:
            stop_viewer(v)
    s = res.summary
    out = {"loop_ticks_per_s": s["timing"]["ticks_per_s"],
           "end_to_end_ticks_per_s": s["ticks_run"] / wall}
    if paced:
        out["lateness_p99_us"] = s["paced"]["lateness_us"]["p99"]
        out["late_ticks"] = s["paced"]["late_ticks"]
    return out


def med(rows, key):
    return statistics.median(r[key] for r in rows)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sil-seconds", type=float, default=20.0)
    ap.add_argument("--paced-seconds", type=float, default=5.0)
    ap.add_argument("--reps", type=int, default=3)
    args = ap.parse_args()
    os.environ.setdefault("HILRIG_CACHE_DIR", tempfile.mkdtemp(prefix="hilrig-bench-"))
    tmux = shutil.which("tmux") is not None
    res: dict = {"reps": args.reps, "viewer": "tmux 80x24" if tmux else "plain", "cores": os.cpu_count()}
    with tempfile.TemporaryDirectory() as tmp:
        one_run(Path(tmp) / "warm", 0.05, False, False, tmux)  # compile or load once
        one_run(Path(tmp) / "warm2", 0.05, True, False, tmux)
        for mode, secs in (("sil", args.sil_seconds), ("paced", args.paced_seconds)):
            with_v, without = [], []
            for rep in range(args.reps):
                without.append(one_run(Path(tmp) / f"{mode}-n{rep}", secs, mode == "paced", False, tmux))
                with_v.append(one_run(Path(tmp) / f"{mode}-v{rep}", secs, mode == "paced", True, tmux))
            r = {}
            for key in with_v[0]:
                r[key] = {"without": med(without, key), "with_viewer": med(with_v, key)}
            if mode == "sil":
                for key in ("loop_ticks_per_s", "end_to_end_ticks_per_s"):
                    r[key]["cost"] = 1.0 - r[key]["with_viewer"] / r[key]["without"]
            res[mode] = r
            print(f"{mode}, {secs:g} s simulated, medians of {args.reps} (viewer: {res['viewer']}):")
            for key, d in r.items():
                extra = f"  cost {100 * d['cost']:.1f} % (target <= 5 %)" if "cost" in d else ""
                print(f"  {key:24s} without {d['without']:14,.1f}   with viewer {d['with_viewer']:14,.1f}{extra}")
    print(json.dumps(res))
    return 0


if __name__ == "__main__":
    sys.exit(main())
