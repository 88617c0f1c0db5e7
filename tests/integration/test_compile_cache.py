"""The generated loop module is compiled once and loaded from numba's on-disk cache by a new
process (the start-up budget depends on it)."""
import json
import os
import subprocess
import sys

CHILD = r"""
import json, sys
from hilrig.runtime.scenario import load_scenario
from hilrig.runtime.run import run_scenario, compile_loop
sc = load_scenario(sys.argv[1], overrides={"timing.duration": "0.01 s"})
res = run_scenario(sc, sys.argv[2])
fn, _, _ = compile_loop(sc)
print(json.dumps({"compiled_now": res.summary["timing"]["compiled_now"],
                  "hits": sum(fn.stats.cache_hits.values()),
                  "misses": sum(fn.stats.cache_misses.values())}))
"""


def _child(demo_path, out, cache):
    env = dict(os.environ, HILRIG_CACHE_DIR=str(cache))
    p = subprocess.run([sys.executable, "-c", CHILD, demo_path, str(out)], env=env,
                       capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stderr
    return json.loads(p.stdout.strip().splitlines()[-1])


def test_second_process_does_not_recompile(tmp_path, demo_path):
    cache = tmp_path / "cache"
    first = _child(demo_path, tmp_path / "a", cache)
    second = _child(demo_path, tmp_path / "b", cache)
    assert first["compiled_now"] is True
    assert first["hits"] == 0
    assert second["compiled_now"] is False
    assert second["hits"] >= 1 and second["misses"] == 0
    # the generated module is keyed by the hash of its sources: exactly one file for one combination
    mods = sorted(p.name for p in (cache / "loops").glob("loop_*.py"))
    assert len(mods) == 1


def test_plant_own_rk4_step_is_used_when_present(tmp_path, monkeypatch):
    """A plant module with ``rk4_step`` (two_stage_lc) is integrated with it; one without
    (single_lc) with the runtime's generic stages over ``derivs``; both compile into the loop."""
    from hilrig.runtime import loop as L
    from hilrig.runtime.registry import load as find

    monkeypatch.setenv("HILRIG_CACHE_DIR", str(tmp_path / "cache"))
    ctrl, ref = find("controller", "cascaded_pi"), find("reference", "profile")
    own, _ = L.generate(find("plant", "two_stage_lc"), ctrl, ref)
    generic, _ = L.generate(find("plant", "single_lc"), ctrl, ref)
    own_text, generic_text = own.read_text(), generic.read_text()
    assert "s = plant_rk4_step(dt, pp, s, u, d)" in own_text
    assert "k4 = plant_derivs(" not in own_text
    assert "plant_rk4_step" not in generic_text
    assert "k4 = plant_derivs(ta + dt, pp, (s[0] + dt * k3[0], s[1] + dt * k3[1],), u, d)" in generic_text
