"""Where the time of the paralleled units' loop goes: the generated SIL chunk of N units (as
bench/parallel.py's scenario) rebuilt with the bus plant's kernels and/or the units' controller
inlined into it (the generated modules declare NOT_INLINED: the loop calls them), timed next to
the chunk as generated and the single unit's, in the same run (median of 5, interleaved).

Run: python bench/parallel_variants.py [N] [cabled|merged]   (default 4 cabled)
Each inlined variant compiles apart, uncached: inlining the bus plant's kernels multiplies the
compile time (minutes for 4 units on a loaded machine; the build times are printed)."""
import shutil, sys, time, tempfile, statistics as st, warnings
warnings.simplefilter("ignore")
from pathlib import Path
sys.path.insert(0, str(Path(__file__).resolve().parent))
import numpy as np
from parallel import SINGLE, UNITS, CABLES, scenario
from loop_stages import build
from hilrig.runtime import loop as L, run as R

n_units = int(sys.argv[1]) if len(sys.argv) > 1 else 4
topo = sys.argv[2] if len(sys.argv) > 2 else "cabled"
sc = scenario(UNITS.format(duration=0.5, p=n_units * 25e3, n=n_units, cables=CABLES[topo]))
sc1 = scenario(SINGLE.format(duration=0.5, p=25e3))
path, _ = L.generate(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin)
text = path.read_text()
jit = '@njit(cache=True, error_model="numpy")\n'
head, rest = text.split(jit + "def run_chunk", 1)
base = head + jit + "def run_chunk" + rest.split("\n\n\n@njit", 1)[0] + "\n"
P = {"plant_derivs = _plant.derivs": "plant_derivs = _inline(_plant.derivs)",
     "plant_outputs = _plant.outputs": "plant_outputs = _inline(_plant.outputs)",
     "plant_fast_rate = _plant.fast_rate": "plant_fast_rate = _inline(_plant.fast_rate)"}
C = {"ctrl_init = _ctrl.init": "ctrl_init = _inline(_ctrl.init)",
     "ctrl_step = _ctrl.step": "ctrl_step = _inline(_ctrl.step)"}
def sub(t, d):
    for a, b in d.items():
        assert a in t, a
        t = t.replace(a, b)
    return t
tmp = Path(tempfile.mkdtemp(prefix="u3var"))
variants = {"as generated": base, "plant inlined": sub(base, P), "controller inlined": sub(base, C),
            "both inlined": sub(sub(base, P), C)}
fns = {}
for i, (k, t) in enumerate(variants.items()):
    t0 = time.perf_counter()
    fns[k] = build(t, f"u3var_{n_units}{topo}_{i}", tmp)
    prep = R.prepare(sc)
    rec = np.zeros((int(round(sc.recording["chunk"] / sc.Ts)), len(prep.signals)))
    R._call(fns[k], 0, 0, rec, prep.args)
    print(f"built {k} in {time.perf_counter() - t0:.0f} s", flush=True)
f1, _, _ = R.compile_loop(sc1)
p1 = R.prepare(sc1)
rec1 = np.zeros((int(round(sc1.recording["chunk"] / sc1.Ts)), len(p1.signals)))
def once(fn, s, rec):
    a = R.prepare(s).args
    n = s.n_ticks; ch = rec.shape[0]
    t = time.perf_counter(); done = 0
    while done < n:
        done += R._call(fn, done, min(ch, n - done), rec, a)
    return (time.perf_counter() - t) / n * 1e9
res = {k: [] for k in fns}; res["single unit"] = []
for r in range(5):
    for k, fn in fns.items():
        res[k].append(once(fn, sc, rec))
    res["single unit"].append(once(f1, sc1, rec1))
s1 = st.median(res["single unit"])
print(f"{n_units} units {topo}, Ts 50 us, 0.5 s, median of 5 (interleaved); single unit {s1:.0f} ns/tick")
for k, v in res.items():
    m = st.median(v)
    print(f"  {k:20s} {m:8.0f} ns/tick  ratio to {n_units} x single {m / (n_units * s1):5.2f}")
shutil.rmtree(tmp, ignore_errors=True)
