"""Operating-envelope maps: where does each candidate controller keep tracking?

For every operating point (target reference voltage V, constant load power P) the scenario is
run in SIL with its plant, controller, shaping, interlocks and timing, but with

- a constant-power load P from t = 0 (the device under test's demand),
- a reference that starts at the scenario's start voltage and steps at ``t_step`` (5 ms, or
  10 % of a shorter run) to V (the shaping stage turns the step into a smooth, slew-limited
  transition),

and the run is classified from its final part (the last 30 % of the run):

``trips``      an interlock latched (whatever followed: the safe output may let a
               constant-power load collapse the voltage afterwards);
``collapses``  the output collapsed (or the plant state became non-finite) without a trip;
``tracks``     |v_ref - v_out| stayed within the tolerance band (default 2 % of V);
``saturates``  outside the band with the command at the converter's limits on more than 10 %
               of the ticks (the converter cannot deliver what the controller asks);
``oscillates`` outside the band otherwise (a sustained oscillation or a slow drift).

Points are independent and deterministic, so they run in parallel: on a local process pool
(the default) or on a Dask distributed cluster; both run the same function per row of the grid
and give identical maps.
"""
from __future__ import annotations

import dataclasses
import hashlib
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np

OUTCOMES = ("tracks", "oscillates", "saturates", "trips", "collapses")
#: one character per outcome for the terminal map
SYMBOLS = {"tracks": ".", "oscillates": "~", "saturates": "s", "trips": "T", "collapses": "x"}
FINAL_PART = 0.3
SATURATED_SHARE = 0.1


@dataclass(frozen=True)
class Grid:
    """The operating points: voltages [V] and load powers [W]."""

    v: tuple[float, ...]
    p: tuple[float, ...]

    @classmethod
    def parse(cls, v_range: str, p_range: str, grid: str) -> "Grid":
        from .units import parse_quantity
        try:
            nv, np_ = (int(x) for x in grid.lower().split("x"))
        except ValueError:
            raise ValueError(f"--grid {grid!r}: write NVxNP, e.g. 25x25") from None
        if not (1 <= nv <= 500 and 1 <= np_ <= 500):
            raise ValueError(f"--grid {grid!r}: each count must be in [1, 500]")

        def rng(text, unit, flag):
            parts = text.split(":")
            if len(parts) != 2:
                raise ValueError(f"{flag} {text!r}: write LOW:HIGH, e.g. 50:600")
            lo, hi = (parse_quantity(x.strip(), unit, where=flag) for x in parts)
            if not hi >= lo:
                raise ValueError(f"{flag} {text!r}: HIGH must not be below LOW")
            return lo, hi

        vlo, vhi = rng(v_range, "V", "--v-range")
        plo, phi = rng(p_range, "W", "--p-range")
        if vlo <= 0:
            raise ValueError(f"--v-range {v_range!r}: voltages must be above 0 V (a constant-power "
                             f"load is singular at 0 V)")
        return cls(v=tuple(np.linspace(vlo, vhi, nv).tolist()),
                   p=tuple(np.linspace(plo, phi, np_).tolist()))


@dataclass(frozen=True)
class Task:
    """One grid row: a controller and one voltage at every load power."""

    scenario_text: str
    scenario_name: str
    controller: str
    v: float
    p: tuple[float, ...]
    tol_pct: float
    t_step: float | None
    v_start: float | None


# per-process cache: (scenario hash, controller) -> (base scenario, compiled loop)
_CACHE: dict[tuple[str, str], Any] = {}


def _base(task: Task):
    from .run import compile_loop
    from .scenario import parse_scenario
    key = (hashlib.sha256(task.scenario_text.encode()).hexdigest(), task.controller)
    if key not in _CACHE:
        sc = parse_scenario(task.scenario_text, name=task.scenario_name,
                            overrides=_controller_override(task.scenario_text, task.controller))
        profile = _profile_plugin()
        # every point runs with a profile reference (see point_scenario), whatever reference
        # the scenario names: the loop must be the one compiled for that reference. (It was
        # compiled for the scenario's own; with the demo's battery model that kernel then read
        # the profile's arrays out of bounds and crashed the workers.)
        v_start = _start_voltage(sc)
        probe = point_scenario(sc, profile, v_start, v_start, 0.0, 0.0)
        fn, _, _ = compile_loop(probe)
        # a call with zero ticks compiles (or loads) the loop now, so that forked workers
        # inherit the machine code instead of each loading it again
        from .run import _call, first_call, prepare
        prep = prepare(probe)
        first_call(probe, lambda: _call(fn, 0, 0, np.empty((1, len(prep.signals))), prep.args))
        _CACHE[key] = (sc, fn, profile, v_start)
    return _CACHE[key]


def _controller_override(text: str, controller: str) -> dict:
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    raw = tomllib.loads(text)
    own = raw.get("controller", {}).get("plugin", "cascaded_pi")
    return {} if own == controller else {"controller": {"plugin": controller}}


def _profile_plugin():
    from . import registry
    return registry.load("reference", "profile")


def point_scenario(sc, profile, v_start: float, v_target: float, p_load: float, t_step: float):
    """The scenario for one operating point (see the module docstring)."""
    from .scenario import PluginChoice
    points = ((0.0, v_start), (t_step, v_start), (t_step, v_target))
    ref = PluginChoice(plugin=profile, values={"points": points})
    load_t = np.array([0.0])
    load_v = np.array([[p_load], [0.0], [0.0]])
    return dataclasses.replace(sc, reference=ref, load_t=load_t, load_v=load_v, v_out0=v_start)


def classify(n_planned: int, ran: int, event: int, tripped: bool, v_out, v_ref, u, v_dc,
             v_target: float, tol_pct: float) -> str:
    """The outcome of one operating point from its recorded signals (see the module docstring)."""
    if tripped:  # the first event: a collapse after a trip is its consequence (safe output)
        return "trips"
    if event != 0:
        return "collapses"
    k0 = int(n_planned * (1.0 - FINAL_PART))
    e = v_ref[k0:ran] - v_out[k0:ran]
    band = tol_pct / 100.0 * abs(v_target)
    if e.size and bool(np.all(np.abs(e) <= band)):
        return "tracks"
    sat = (u[k0:ran] <= 0.0) | (u[k0:ran] >= v_dc[k0:ran])
    if sat.size and np.count_nonzero(sat) > SATURATED_SHARE * sat.size:
        return "saturates"
    return "oscillates"


def run_row(task: Task) -> list[str]:
    """Outcomes of one grid row (one voltage, every power). Runs in any worker process."""
    from .run import _call, prepare
    sc, fn, profile, v_scenario = _base(task)
    n = sc.n_ticks
    t_step = task.t_step if task.t_step is not None else min(5e-3, 0.1 * sc.duration)
    # the same for every point of the row (and a whole prepare() for a battery reference)
    v_start = task.v_start if task.v_start is not None else v_scenario
    out = []
    for p_load in task.p:
        spt = point_scenario(sc, profile, v_start, task.v, p_load, t_step)
        prep = prepare(spt)
        names = [s.name for s in prep.signals]
        rec = np.empty((n, len(names)))
        ran = _call(fn, 0, n, rec, prep.args)
        a = prep.args
        col = names.index
        v_dc = rec[:ran, col("v_dc")] if "v_dc" in names else np.full(ran, np.inf)
        out.append(classify(n, ran, int(a["ev"][0]), bool(a["latch"][0]), rec[:ran, col("v_out")],
                            rec[:ran, col("v_ref")], rec[:ran, col(prep.u_names[0])], v_dc,
                            task.v, task.tol_pct))
    return out


def _start_voltage(sc) -> float:
    if sc.v_out0 is not None:
        return sc.v_out0
    if sc.reference.plugin.name == "profile":
        return float(sc.reference.values["points"][0][1])
    from .run import prepare
    return prepare(sc).v0


def tasks_for(scenario_text: str, scenario_name: str, controllers: Iterable[str], grid: Grid,
              tol_pct: float = 2.0, t_step: float | None = None,
              v_start: float | None = None) -> list[Task]:
    return [Task(scenario_text, scenario_name, c, v, grid.p, tol_pct, t_step, v_start)
            for c in controllers for v in grid.v]


def run_envelope(tasks: list[Task], *, cluster: str | None = None, workers: int | None = None,
                 progress: Callable[[int, int], None] | None = None) -> list[list[str]]:
    """Run every task (grid row) and return their outcomes, in task order."""
    if cluster:
        return _run_dask(tasks, cluster, progress)
    return _run_pool(tasks, workers, progress)


def warm_up(tasks: list[Task]) -> None:
    """Compile (or load) every controller's loop in this process; forked workers inherit it."""
    for c in dict.fromkeys(t.controller for t in tasks):
        _base(next(t for t in tasks if t.controller == c))


def _run_pool(tasks, workers, progress):
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor
    warm_up(tasks)
    workers = workers or os.cpu_count() or 1
    results: list[list[str] | None] = [None] * len(tasks)
    if workers == 1:
        for i, t in enumerate(tasks):
            results[i] = run_row(t)
            if progress:
                progress(i + 1, len(tasks))
        return results
    methods = mp.get_all_start_methods()
    ctx = mp.get_context("fork" if "fork" in methods else "spawn")
    done = 0
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
        futures = {pool.submit(run_row, t): i for i, t in enumerate(tasks)}
        from concurrent.futures import as_completed
        for fut in as_completed(futures):
            results[futures[fut]] = fut.result()
            done += 1
            if progress:
                progress(done, len(tasks))
    return results


def _run_dask(tasks, address, progress):
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise ValueError("--cluster needs Dask: pip install 'hilrig[cluster]' "
                         "(dask[distributed])") from None
    client = Client(address) if isinstance(address, str) else Client(address)
    try:
        futures = client.map(run_row, tasks, pure=False)
        index = {f.key: i for i, f in enumerate(futures)}
        results: list[list[str] | None] = [None] * len(tasks)
        done = 0
        for fut in as_completed(futures):
            results[index[fut.key]] = fut.result()
            done += 1
            if progress:
                progress(done, len(tasks))
        return results
    finally:
        client.close()


def table(tasks: list[Task], results: list[list[str]]) -> list[dict[str, Any]]:
    """Rows (controller, v_ref_V, p_load_W, outcome) in grid order."""
    rows = []
    for t, outs in zip(tasks, results):
        for p, o in zip(t.p, outs):
            rows.append({"controller": t.controller, "v_ref_V": t.v, "p_load_W": p, "outcome": o})
    return rows


def counts(rows: list[dict[str, Any]]) -> dict[str, dict[str, int]]:
    out: dict[str, dict[str, int]] = {}
    for r in rows:
        c = out.setdefault(r["controller"], {o: 0 for o in OUTCOMES})
        c[r["outcome"]] += 1
    return out


def write_csv(rows: list[dict[str, Any]], dest: Path) -> Path:
    import csv
    with open(dest, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=["controller", "v_ref_V", "p_load_W", "outcome"])
        w.writeheader()
        for r in rows:
            w.writerow({**r, "v_ref_V": repr(r["v_ref_V"]), "p_load_W": repr(r["p_load_W"])})
    return dest


def text_map(rows: list[dict[str, Any]], controller: str) -> list[str]:
    """Lines of a compact terminal map: voltage rows (highest first), one character per power."""
    sel = [r for r in rows if r["controller"] == controller]
    vs = sorted({r["v_ref_V"] for r in sel}, reverse=True)
    ps = sorted({r["p_load_W"] for r in sel})
    cell = {(r["v_ref_V"], r["p_load_W"]): r["outcome"] for r in sel}
    lines = []
    for v in vs:
        lines.append(f"{v:7.1f} V  " + "".join(SYMBOLS[cell[(v, p)]] for p in ps))
    lines.append(f"{'':10s} P: {ps[0] / 1e3:g} .. {ps[-1] / 1e3:g} kW ->")
    return lines


#: colours of the heat map (our own choice: green good, warm colours worse)
COLOURS = {"tracks": "#3a9a4a", "oscillates": "#e0c040", "saturates": "#e08a30",
           "trips": "#8060c0", "collapses": "#c03030"}


def heat_map_png(rows: list[dict[str, Any]], dest: Path, title: str = "") -> Path:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    ctrls = list(dict.fromkeys(r["controller"] for r in rows))
    vs = sorted({r["v_ref_V"] for r in rows})
    ps = sorted({r["p_load_W"] for r in rows})
    cmap = ListedColormap([COLOURS[o] for o in OUTCOMES])
    fig, axes = plt.subplots(1, len(ctrls), figsize=(4.2 * len(ctrls) + 1.5, 4.4),
                             squeeze=False, constrained_layout=True)
    for ax, c in zip(axes[0], ctrls):
        grid = np.full((len(vs), len(ps)), np.nan)
        for r in rows:
            if r["controller"] == c:
                grid[vs.index(r["v_ref_V"]), ps.index(r["p_load_W"])] = OUTCOMES.index(r["outcome"])
        dv = (vs[-1] - vs[0]) / max(len(vs) - 1, 1) / 2 or 1.0
        dp = (ps[-1] - ps[0]) / max(len(ps) - 1, 1) / 2 or 1.0
        ax.imshow(grid, origin="lower", aspect="auto", cmap=cmap, vmin=-0.5,
                  vmax=len(OUTCOMES) - 0.5, interpolation="nearest",
                  extent=((ps[0] - dp) / 1e3, (ps[-1] + dp) / 1e3, vs[0] - dv, vs[-1] + dv))
        ax.set_title(c, fontsize=10)
        ax.set_xlabel("constant load power [kW]")
        ax.set_ylabel("target reference voltage [V]")
    fig.legend(handles=[Patch(color=COLOURS[o], label=o) for o in OUTCOMES], loc="outside right center",
               fontsize=8)
    if title:
        fig.suptitle(title, fontsize=10)
    fig.savefig(dest, dpi=90)
    plt.close(fig)
    return dest
