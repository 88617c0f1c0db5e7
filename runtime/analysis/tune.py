"""Robust tuning of a controller plugin over an operating range (``hilrig tune``).

1. **Search (fast analysis).** The objective of a parameter set is the worst largest closed-loop
   |z| of the sampled linearised loop over the grid's operating points (of the poles that
   feedback moves; runtime/analysis/design.py), guarded: also with the loop gain perturbed by
   +-3 dB and +-20 degrees (point.guarded_radius), so that a fast decay is never bought with a
   loop on the edge of its margins (without the guard, LQR weights tuned this way reached
   |z| 0.48 with a 1.5 degree phase margin, and collapsed in every SIL cell). Nelder-Mead minimises it over the tunable
   parameters (the plugin's ``Declaration.tunable``, or ``--params``; a log scale for gains),
   from several starts in parallel on local processes: the scenario's values, the plugin's
   design candidates, and seeded random perturbations of them. The search starts on the
   grid's corners and centre; a grid point worse than those joins them and the search goes on.
   A user's plugin with no model written is linearised numerically from its compiled ``step``.
2. **Ranking.** Each start's result is checked on the whole grid; results stable at every
   point come first, then those whose worst point has the gain and phase margins of the
   stability check (runtime/analysis/check.py), then those whose output impedance stays below
   the load's there (Middlebrook's criterion), then by their worst |z|. The winner's margins and the Middlebrook ratio of its output
   impedance to the load's are reported at the grid's hardest point.
3. **Confirmation (compiled simulation).** The stability map (analysis) and the envelope (SIL:
   a step from the start voltage to every point of the grid, with the start excitation of the
   envelope) before and after, and a ramp down over the range at its highest power
   (tune_command.ramp_check), so that a tuned set is never taken on the analysis' word alone.

The result is a TOML snippet for the scenario's ``[controller]``, the maps and a report.
"""
from __future__ import annotations

import dataclasses
import math
import random
import time
from typing import Any, Callable

import numpy as np

from hilrig.plugins.base import DesignRange, Tunable

from . import design as dmod

#: default number of search starts
STARTS = 4
#: the spread of the random starts: each log-parameter moves by up to +-this (natural log)
SPREAD = 0.7


class TuneError(ValueError):
    """A tuning that cannot start (no tunable parameters, a bad --params)."""


def parse_params(spec: str | None, decl) -> list[Tunable]:
    """``--params``: names, each optionally with its range, ``Kp_v,Ki_v:10:1e5``; none: the
    plugin's declared tunables."""
    declared = {t.name: t for t in decl.tunable}
    if not spec:
        if not declared:
            raise TuneError(f"controller {decl.name!r} declares no tunable parameters; name them "
                            f"with --params NAME[:LOW:HIGH],... (its parameters: "
                            f"{', '.join(p.name for p in decl.params)})")
        return list(declared.values())
    out = []
    for item in spec.split(","):
        parts = [x.strip() for x in item.split(":")]
        name = parts[0]
        try:
            q = decl.param(name)
        except KeyError as exc:
            raise TuneError(f"--params: {exc.args[0]}") from None
        if not hasattr(q, "bounds"):
            raise TuneError(f"--params: {name!r} is not a number parameter of {decl.name!r}")
        if len(parts) == 3:
            try:
                lo, hi = float(parts[1]), float(parts[2])
            except ValueError:
                raise TuneError(f"--params: {item!r}: write NAME:LOW:HIGH with numbers") from None
        elif len(parts) == 1:
            if name in declared:
                out.append(declared[name])
                continue
            lo, hi = q.bounds
            if lo <= 0.0:
                lo = max(q.default / 100.0, 1e-9) if q.default > 0 else 1e-9
                hi = min(hi, max(q.default * 100.0, lo * 10))
        else:
            raise TuneError(f"--params: {item!r}: write NAME or NAME:LOW:HIGH")
        if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
            raise TuneError(f"--params: {item!r}: needs LOW < HIGH")
        if q.check(lo) or q.check(hi):
            raise TuneError(f"--params: {item!r}: the range leaves the parameter's bounds "
                            f"[{q.bounds[0]:g}, {q.bounds[1]:g}] {q.unit}")
        out.append(Tunable(name, lo, hi, "log" if lo > 0 else "linear"))
    return out


# -- the parallel searches: forked workers inherit the job -------------------------------------

_JOB: dict[str, Any] = {}


def _one_search(start: dict[str, Any]) -> tuple[dict[str, Any], float, int]:
    job = _JOB
    scorer = dmod._Scorer(job["prep"], job["ctx"], job["points"], guard=job["guard"])
    return dmod._search(scorer, start, [t.name for t in job["tunables"]], job["tunables"])


def _starts(values: dict[str, Any], cands: list[dict[str, Any]], tunables: list[Tunable],
            n: int, seed: int = 0) -> list[dict[str, Any]]:
    out = [dict(values)]
    for c in cands:
        if len(out) >= n:
            break
        if any(c.get(t.name) != values.get(t.name) for t in tunables):
            out.append(dict(c))
    rnd = random.Random(seed)
    while len(out) < n:
        s = dict(values)
        for t in tunables:
            v = float(values[t.name])
            if t.scale == "log" and v > 0:
                v *= math.exp(rnd.uniform(-SPREAD, SPREAD))
            else:
                v += rnd.uniform(-0.25, 0.25) * (t.high - t.low)
            s[t.name] = min(max(v, t.low), t.high)
        out.append(s)
    return out[:n]


@dataclasses.dataclass
class Tuned:
    controller: str
    params: list[Tunable]
    grid_v: tuple[float, ...]
    grid_p: tuple[float, ...]
    before: dict[str, Any]
    after: dict[str, Any]
    before_worst: float
    after_worst: float
    starts: list[dict[str, Any]]
    evaluations: int
    search_s: float
    checks: dict[str, Any]

    def snippet(self, plugin_ref: str) -> str:
        lines = ["# tuned by hilrig tune: worst closed-loop |z| over the grid "
                 f"{self.before_worst:.4f} -> {self.after_worst:.4f}",
                 "[controller]", f"plugin = \"{plugin_ref}\""]
        for t in self.params:
            lines.append(f"{t.name} = {float(self.after[t.name])!r}")
        return "\n".join(lines) + "\n"


def _margins_at(prep, ctx, values, point) -> dict[str, Any]:
    """Margins and the Middlebrook ratio at one operating point."""
    from . import point as pmod
    from .linear import AnalysisError, linearize
    scorer = dmod._Scorer(prep, ctx, [point])
    pc = scorer.pack(values)
    if pc is None:
        return dict(available=False, why="the parameters do not build")
    scorer.kern.pc = pc
    try:
        m = linearize(scorer.prep, point[0], point[1], scorer.kern)
    except AnalysisError as exc:
        return dict(available=False, why=str(exc))
    mg = pmod.margins(m)
    mb = pmod.middlebrook(m)
    return dict(available=bool(mg.get("available")), v_ref_V=point[0], p_load_W=point[1],
                gain_margin_db=_fin(mg.get("gain_margin_db")),
                phase_margin_deg=_fin(mg.get("phase_margin_deg")),
                middlebrook_margin_db=_fin(mb.get("margin_db")),
                middlebrook_met=bool(mb.get("met")))


def _fin(x):
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None


def _margins_ok(m: dict[str, Any]) -> bool:
    from .check import GAIN_MARGIN_DB, PHASE_MARGIN_DEG
    if not m.get("available"):
        return False
    gm, pm = m.get("gain_margin_db"), m.get("phase_margin_deg")
    return ((gm is None or abs(gm) >= GAIN_MARGIN_DB)
            and (pm is None or pm >= PHASE_MARGIN_DEG))


def tune(prep, tunables: list[Tunable], grid_v, grid_p, *, starts: int = STARTS,
         workers: int = 1, progress: Callable[[str], None] | None = None,
         guard: bool = True) -> Tuned:
    """Search the tunables for the lowest worst |z| over the grid (module docstring, 1-2)."""
    from hilrig.runtime.trials.pool import run_rows
    sc = prep.sc
    decl = sc.controller.plugin.declaration
    ctx = prep.ctx
    rng = DesignRange(min(grid_v), max(grid_v), min(grid_p), max(grid_p))
    full = list(dict.fromkeys((float(v), float(p)) for v in grid_v for p in grid_p))
    before = dict(sc.controller.values)
    for t in tunables:
        if not isinstance(before.get(t.name), (int, float)):
            raise TuneError(f"{t.name}: not a number parameter")
    # the design candidates as starts (the rules of the plugin, for the grid's range)
    cands: list[dict[str, Any]] = []
    if decl.design is not None:
        cctx = dataclasses.replace(ctx, design_range=rng)
        choice = dataclasses.replace(sc.controller, given=frozenset())
        cands, _ = dmod.candidates(choice, cctx)
    points = rng.points()
    t0 = time.perf_counter()
    scorer = dmod._Scorer(prep, ctx, full, guard=guard)
    before_worst, _ = scorer.score(before, full, movable=False)
    start_sets = _starts(before, cands, tunables, starts)
    _JOB.update(prep=prep, ctx=ctx, points=points, tunables=tunables, guard=guard)
    if progress:
        progress(f"search: {len(start_sets)} starts x {len(tunables)} parameters, "
                 f"{len(points)} points, on {min(workers, len(start_sets))} process(es)")
    results = run_rows(_one_search, start_sets, max(1, min(workers, len(start_sets))),
                       (lambda d, n: progress(f"search: {d} of {n} starts done"))
                       if progress else None, size=lambda t: 1)
    evals = sum(r[2] for r in results)
    ends = []
    for s, (vals, w, n) in zip(start_sets, results):
        gw, gz = scorer.score(vals, full, movable=True)
        worst_pt = full[int(np.argmax([dmod.PENALTY if z is None else z for z in gz]))]
        ends.append(dict(values=vals, search_worst=w, grid_worst=gw, worst_point=worst_pt,
                         evaluations=n, start=s))
    # the best end; a grid point worse than the search's points: search again with it
    ends.sort(key=lambda e: e["grid_worst"])
    best = ends[0]
    pts = list(points)
    for _ in range(dmod.ROUNDS - 1):
        if best["grid_worst"] <= best["search_worst"] + 1e-4:
            break
        pts.append(best["worst_point"])
        sc2 = dmod._Scorer(prep, ctx, pts, guard=guard)
        vals, w, n = dmod._search(sc2, best["values"], [t.name for t in tunables], tunables)
        evals += n
        gw, gz = scorer.score(vals, full, movable=True)
        if gw < best["grid_worst"]:
            best = dict(values=vals, search_worst=w, grid_worst=gw, evaluations=n,
                        start=best["start"], worst_point=full[int(np.argmax([dmod.PENALTY if z is None else z
                                                        for z in gz]))])
            ends.insert(0, best)
        else:
            break
    # ranking: margins at the worst point first, then the worst |z|
    for e in ends:
        e["margins"] = _margins_at(prep, ctx, e["values"], e["worst_point"])
        e["margins_ok"] = _margins_ok(e["margins"])
    # nominally unstable somewhere on the grid: last (the guarded measure can stay above 1
    # where no set holds the margins, and then prefer a set that is not even stable)
    for e in ends:
        e["nominal"], _ = scorer.score(e["values"], full, movable=False)
    # then the output impedance against the load's at the hardest point (Middlebrook: a margin
    # that holds whatever the load's dynamics), then the measure itself
    ends.sort(key=lambda e: (e["nominal"] >= 1.0, not e["margins_ok"],
                             not e["margins"].get("middlebrook_met", False), e["grid_worst"]))
    best = ends[0]
    if guard and not best["grid_worst"] < 1.0:
        # no set found keeps the margins at every point (the guarded |z| stays above 1): the
        # guarded optimum then need not even be stable; tune for the plain |z| instead, and say so
        if progress:
            progress("search: no set keeps 3 dB / 20 deg of margin over the grid; searching "
                     "the plain worst |z| instead")
        res = tune(prep, tunables, grid_v, grid_p, starts=starts, workers=workers,
                   progress=progress, guard=False)
        res.checks["objective"]["fallback"] = ("no set keeps 3 dB of gain and 20 degrees of "
                                               "phase margin at every point: tuned for the "
                                               "plain worst |z|")
        res.evaluations += evals
        return res
    after = dict(before)
    after.update({t.name: float(best["values"][t.name]) for t in tunables})
    after_worst, _ = scorer.score(after, full, movable=False)
    b_obj, _ = scorer.score(before, full, movable=True)
    a_obj, _ = scorer.score(after, full, movable=True)
    if (after_worst >= 1.0 > before_worst) or a_obj > b_obj:
        # nothing better than the scenario's own: keep it
        after, after_worst = dict(before), before_worst
    # the search's own measure (guarded, of the poles feedback moves) before and after
    before_obj, _ = scorer.score(before, full, movable=True)
    after_obj, _ = scorer.score(after, full, movable=True)
    search_s = time.perf_counter() - t0
    checks = dict(margins_after=best["margins"],
                  margins_before=_margins_at(prep, ctx, before, best["worst_point"]),
                  objective=dict(before=before_obj, tuned=after_obj, guarded=guard))
    return Tuned(controller=decl.name, params=list(tunables), grid_v=tuple(grid_v),
                 grid_p=tuple(grid_p), before=before, after=after, before_worst=before_worst,
                 after_worst=after_worst,
                 starts=[dict(start={t.name: e["start"][t.name] for t in tunables},
                              end={t.name: e["values"][t.name] for t in tunables},
                              grid_worst_pole_abs=e["grid_worst"] if e["grid_worst"] < dmod.PENALTY
                              else None, nominal_worst_pole_abs=e["nominal"]
                              if e["nominal"] < dmod.PENALTY else None,
                              margins_ok=e["margins_ok"], margins=e["margins"])
                         for e in ends],
                 evaluations=evals, search_s=search_s, checks=checks)


def objective(prep, tunables: list[Tunable], grid_v, grid_p, guard: bool = True):
    """The search's objective as a plain function of the tunables' values (in their order):
    for a check against another optimiser minimising the same thing."""
    full = list(dict.fromkeys((float(v), float(p)) for v in grid_v for p in grid_p))
    scorer = dmod._Scorer(prep, prep.ctx, full, guard=guard)
    movable = True
    base = dict(prep.sc.controller.values)

    def f(x) -> float:
        vals = dict(base)
        vals.update({t.name: float(xi) for t, xi in zip(tunables, x)})
        return scorer.score(vals, full, movable=movable)[0]
    return f
