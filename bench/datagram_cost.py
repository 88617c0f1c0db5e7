"""Fixed-layout datagrams: lockstep ticks/s over UDP loopback next to msgpack frames over the same
transport, measured in the same run.

Three lockstep sessions per repetition, each the stand-in simulator (``hilrig serve-sim``) and
the runtime (``hilrig run --bridge udp://...``) as two processes on the demo scenario (two-stage
LC plant, cascaded PI, Ts = 50 us; demo data) for ``--duration`` simulated:

- fixed: fixed-layout datagrams, float64, counter + time + 6 measurements / counter + u +
  output_enable (bridge/datagram.py; its exchange runs in Python per tick on both sides);
- msgpack-python: msgpack frames with HILRIG_BRIDGE_PYTHON=1 on both sides (the same Python
  per-tick path, the codec being the difference);
- msgpack-compiled: msgpack frames on the compiled lockstep path (bridge/wire.py), the default.

ticks/s = summary.json "timing" -> "ticks_per_s" (the tick phase's wall time, HDF5 writes and
metrics included); round trip p50 = "bridge" -> "rtt_us" -> "p50". Medians over ``--reps``
after one warm-up session each (which also loads the compiled kernels). Shared, noisy 2-core
machine: read the ratios, not the absolute rates.

    .venv/bin/python bench/datagram_cost.py [--reps 3] [--duration "0.2 s"]
"""
from __future__ import annotations

import argparse
import json
import os
import socket
import statistics
import subprocess
import sys
import tempfile
from importlib.resources import files
from pathlib import Path

CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
LAYOUT = '''
[sample]
time = true
signals = ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc"]
[actuation]
signals = ["u", "output_enable"]
'''


def _port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as so:
        so.bind(("127.0.0.1", 0))
        return so.getsockname()[1]


def session(scen: Path, out: Path, layout: Path | None, python_path: bool) -> dict:
    address = f"udp://127.0.0.1:{_port()}"
    env = dict(os.environ, **({"HILRIG_BRIDGE_PYTHON": "1"} if python_path else {}))
    extra = ["--layout", str(layout)] if layout else []
    sim = subprocess.Popen(CLI + ["serve-sim", "--scenario", str(scen), "--bind", address,
                                  "--sessions", "1", "--idle-timeout", "60", *extra],
                           stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, env=env)
    try:
        for line in sim.stdout:
            if "listening on" in line:
                break
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(out),
                                  "--overwrite", "--headless", "--timeout", "30", *extra],
                           capture_output=True, text=True, env=env, timeout=600)
        if p.returncode != 0:
            raise SystemExit(f"session failed:\n{p.stdout}\n{p.stderr}")
        sim.wait(timeout=60)
    finally:
        if sim.poll() is None:
            sim.kill()
            sim.wait(timeout=60)
    s = json.loads((out / "summary.json").read_text())
    return {"ticks_per_s": s["timing"]["ticks_per_s"], "rtt_p50_us": s["bridge"]["rtt_us"]["p50"]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=3)
    ap.add_argument("--duration", default="0.2 s")
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="hilrig-dgram-bench-"))
    demo = (files("hilrig.runtime") / "data" / "demo.toml").read_text()
    scen = tmp / "bench.toml"
    scen.write_text(demo.replace('duration = "1.5 s"', f'duration = "{args.duration}"'))
    layout = tmp / "layout.toml"
    layout.write_text(LAYOUT)
    kinds = {"fixed": (layout, False), "msgpack-python": (None, True),
             "msgpack-compiled": (None, False)}
    results: dict[str, list[dict]] = {k: [] for k in kinds}
    for k, (lay, py) in kinds.items():
        session(scen, tmp / f"warm-{k}", lay, py)
    for rep in range(args.reps):
        for k, (lay, py) in kinds.items():  # interleaved: drift of the machine hits each alike
            results[k].append(session(scen, tmp / f"{k}-{rep}", lay, py))
    med = {k: {m: statistics.median(r[m] for r in v) for m in ("ticks_per_s", "rtt_p50_us")}
           for k, v in results.items()}
    print(f"lockstep over UDP loopback, demo scenario, {args.duration}, median of {args.reps}")
    print(f"{'frames':<18} {'ticks/s':>10} {'rtt p50 [us]':>13}")
    for k, m in med.items():
        print(f"{k:<18} {m['ticks_per_s']:>10.0f} {m['rtt_p50_us']:>13.1f}")
    r_py = med["fixed"]["ticks_per_s"] / med["msgpack-python"]["ticks_per_s"]
    r_c = med["fixed"]["ticks_per_s"] / med["msgpack-compiled"]["ticks_per_s"]
    print(f"fixed / msgpack-python ticks/s: {r_py:.2f}; fixed / msgpack-compiled: {r_c:.2f}")
    print(json.dumps({"median": med, "ratio_fixed_vs_msgpack_python": r_py,
                      "ratio_fixed_vs_msgpack_compiled": r_c}))


if __name__ == "__main__":
    main()
