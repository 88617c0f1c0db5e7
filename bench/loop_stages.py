"""Where a tick of the compiled SIL loop goes: the loop next to variants of itself.

Builds the generated ``run_chunk`` for the scenario of ``bench/sil_throughput.py`` (two-stage LC
plant + cascaded PI, 20 kHz, RK4 x 4, three interlocks, recording into the chunk buffer) and
variants of its text, compiles each in this process, and times them interleaved: 1 s simulated
per repetition, processor time of this process (less sensitive than wall time to other work on
a shared machine), median of the repetitions. Printed per variant: ns per tick and the ratio to
the loop as generated, measured in the same run.

Variants:
- ``generic RK4``: the runtime's generic RK4 stages over the plant's ``derivs`` in place of the
  two-stage plant's own ``rk4_step`` (the same method, arithmetic in another order);
- ``bounds-checked``: the chunk of the ``--checked`` build (numba's bounds checks on every
  index, and the stage marks that name a kernel on an IndexError); its recording must equal the
  generated loop's bit for bit, which is checked;
- ``zero-divisor checks``: the chunk compiled with numba's default error model, which tests
  every float divisor for zero so that it can raise ZeroDivisionError (the runtime compiles
  with ``error_model="numpy"``: a division by zero gives inf or NaN, which the protect stage
  trips on); ``before`` has both, as the loop was compiled before this change;
- ``fixed sub-steps``: the chunk as it was before the stiffness-aware integration (every
  substep one RK4 step, no rate check, no energy check after the tick); nothing is stiff on
  this scenario, so its recording must equal the generated loop's bit for bit, which is checked;
- ``owned arrays``: the chunk without the borrowed views (every array argument counted by
  numba's reference counting, as before :mod:`hilrig.runtime.borrow`); its recording must equal
  the generated loop's bit for bit, which is checked;
- ``sensor chain``: the loop as generated, run on the scenario with a sensor chain on v_out
  and i_L1 (``CHAIN``: anti-alias filter, sample offset, offset, 12-bit ADC); the other
  variants run without one (the chain's loop over no rows);
- ``without <stage>``: one stage removed (the load table sampled once, the reference and the
  shaping filter run once, no fault application, no sensor chain stage, no
  watchdog/interlock/supervision stage, no record, no RK4). Removing a stage changes what the others compute (without the RK4 the plant
  stands still), so the differences are each stage's approximate cost and need not add up.

Run: python bench/loop_stages.py [--reps 11] [--only generated,owned,bounds-checked,fixed]
The last printed line is JSON: {variant: median ns per tick}.
"""
from __future__ import annotations

import argparse
import importlib.util
import json
import os
import re
import statistics as st
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from sil_throughput import SCENARIO  # noqa: E402


def _sub(old, new):
    def f(text):
        if old not in text:
            raise RuntimeError(f"generated text changed: {old!r} not found")
        return text.replace(old, new)
    return f


def _resub(pattern, repl):
    def f(text):
        out, n = re.subn(pattern, repl, text)
        if n == 0:
            raise RuntimeError(f"generated text changed: {pattern!r} not found")
        return out
    return f


_ONCE = "        if i == 0:\n            {}\n"
VARIANTS = {
    "generated": [],
    "owned": [_resub(r"    \w+ = borrowed\(\w+\)\n", "")],
    "without load table": [_sub("        interp_rows(load_t, load_v, t, lcur, d)\n",
                                _ONCE.format("interp_rows(load_t, load_v, t, lcur, d)"))],
    "without faults": [_resub(r"        apply_faults\(.*\n", "")],
    "without reference+shaping": [
        _sub("        ref_step(t, ts, pr, xr, yr, w)\n", _ONCE.format("ref_step(t, ts, pr, xr, yr, w)")),
        _sub("        shape_step(ad, g1, g2, cr, dr, slew, ts, z, s, zt, w[0], r)\n",
             _ONCE.format("shape_step(ad, g1, g2, cr, dr, slew, ts, z, s, zt, w[0], r)"))],
    "without protect": [
        _sub("        wword = watch(kk, t, wd, latch)\n", "        wword = 0\n"),
        _resub(r"        word = wword \| protect\(.*\n.*\n        word = supervise.*\n",
               "        word = wword\n")],
    "without record": [_resub(r"        # 7 record\n(.*\n)*?        rec\[i, c \+ 1\] = code\n",
                              "        rec[i, 0] = word + code\n")],
    "without sensor chain": [_resub(r"        # the sensor chain.*\n        sensor_chain\(.*\n", "")],
    "without RK4": [_sub("        nref = actuate(t, ts, nsub, zf, pp, x, u, uq, latch, wd, d)\n", "        nref = 0\n")],
    "generic RK4": [lambda text: _sub("    s = plant_rk4_step(dt, pp, s, u, d)\n",
                                      _generic_rk4() + "\n")(text)],
    "fixed sub-steps (before the stiffness-aware rule)": [lambda text: fixed_substeps(text)],
    "bounds-checked (--checked)": [lambda text: _checked(text)],
    "zero-divisor checks": [_sub('@njit(cache=True, error_model="numpy")\ndef run_chunk',
                                 "@njit(cache=True)\ndef run_chunk")],
    "before (generic RK4 with zero-divisor checks)": [
        lambda text: _sub("    s = plant_rk4_step(dt, pp, s, u, d)\n", _generic_rk4() + "\n")(text),
        _sub('@njit(cache=True, error_model="numpy")\ndef run_chunk',
             "@njit(cache=True)\ndef run_chunk")],
    "sensor chain (v_out and i_L1)": [],
}
#: the scenario text a variant adds (the sensor chain: runtime/sensors.py)
CHAIN = """
[[sensors]]
signal = "v_out"
cutoff = "20 kHz"
sample_offset = "10 us"
bits = 12
range = ["0 V", "1000 V"]
[[sensors]]
signal = "i_L1"
cutoff = "20 kHz"
offset = "0.5 A"
bits = 12
range = ["-1000 A", "1000 A"]
"""
EXTRA = {"sensor chain (v_out and i_L1)": CHAIN}


def fixed_substeps(text):
    """The loop as it was before the stiffness-aware integration: every substep one RK4 step
    (no rate check), and no energy check after the tick."""
    from hilrig.runtime.loop import _energy_text, _rk4_text
    t = _sub(_rk4_text(4, True, True)["fast_step"], _rk4_text(4, True, False)["fast_step"])(text)
    e = _energy_text(True)
    return _sub(e["energy_check"], "")(_sub(e["energy_start"], "")(t))


def _checked(text):
    """The bounds-checked build of the same text (``hilrig ... --checked``)."""
    from hilrig.runtime.loop import checked_text
    return checked_text(text)


def _generic_rk4():
    """The runtime's generic RK4 substep over the plant's derivs (as for a plant without its
    own rk4_step)."""
    from hilrig.runtime.loop import _rk4_text
    return _rk4_text(4, False)["rk4_body"]


def build(text: str, name: str, folder: Path):
    path = folder / f"{name}.py"
    path.write_text(text.replace("@njit(cache=True, ", "@njit("))
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module.run_chunk


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=11)
    ap.add_argument("--only", default="", help="comma-separated variant keys (default: all)")
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="hilrig-stages-"))
    os.environ.setdefault("HILRIG_CACHE_DIR", str(tmp / "cache"))
    from hilrig.runtime import loop as L
    from hilrig.runtime import run as R
    from hilrig.runtime.scenario import parse_scenario

    sc = parse_scenario(SCENARIO, name="bench.toml")
    path, _ = L.generate(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin)
    text = path.read_text()
    # the SIL chunk alone (the paced chunk and the bridge functions are not timed here)
    jit = '@njit(cache=True, error_model="numpy")\n'
    head, rest = text.split(jit + "def run_chunk", 1)
    base = head + jit + "def run_chunk" + rest.split("\n\n\n@njit", 1)[0] + "\n"
    names = [k for k in VARIANTS if not args.only or k.split()[0] in args.only.split(",")
             or k in args.only.split(",")]
    if "generated" not in names:
        names.insert(0, "generated")
    fns = {}
    for j, name in enumerate(names):
        t = base
        for f in VARIANTS[name]:
            t = f(t)
        fns[name] = build(t, f"hilrig_stage_variant_{j}", tmp)
    n = sc.n_ticks
    chunk = int(round(sc.recording["chunk"] / sc.Ts))
    scs = {k: parse_scenario(SCENARIO + EXTRA[k], name="bench.toml") if k in EXTRA else sc
           for k in fns}
    width = max(len(R.prepare(s).signals) for s in scs.values())

    def run(fn, rec, s=sc):
        a = R.prepare(s).args
        done = 0
        while done < n:
            done += R._call(fn, done, min(chunk, n - done), rec[done:], a)
        return done

    recs = {}
    for name, fn in fns.items():  # compile, and keep one whole recording for the check
        recs[name] = np.zeros((n, width))
        run(fn, recs[name], scs[name])
    for key in ("owned", "bounds-checked (--checked)",
                "fixed sub-steps (before the stiffness-aware rule)"):
        if key in fns and recs[key].tobytes() != recs["generated"].tobytes():
            raise SystemExit(f"{key}: the recording differs from the generated loop's")
    if "owned" in fns:
        same = recs["owned"].tobytes() == recs["generated"].tobytes()
        print(f"owned arrays: recording equal to the generated loop's bit for bit: {same}")
        if not same:
            raise SystemExit("borrowed views changed the results")
    rec = np.zeros((n, width))
    ns = {k: [] for k in fns}
    for _ in range(args.reps):
        for name, fn in fns.items():
            t = time.process_time()
            done = run(fn, rec, scs[name])
            ns[name].append((time.process_time() - t) / done * 1e9)
    med = {k: st.median(v) for k, v in ns.items()}
    ref = med["generated"]
    for k, v in med.items():
        extra = "" if k == "generated" else f"  generated minus this: {ref - v:+7.1f} ns"
        print(f"{k:28s} {v:7.1f} ns per tick  ratio to generated {v / ref:5.2f}{extra}")
    print(json.dumps({k: round(v, 1) for k, v in med.items()}))


if __name__ == "__main__":
    main()
