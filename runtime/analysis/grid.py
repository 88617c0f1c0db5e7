"""The stability map: the operating-point analysis over a grid of reference voltages and load
powers, per controller, in parallel (a local process pool, one task per controller and voltage,
like the envelope's rows), and its agreement with an envelope map of the same grid.

A point's row: ``controller``, ``v_ref_V``, ``p_load_W``, ``status`` (``stable``,
``unstable``, or ``no steady state`` with the reason in ``note``), ``largest_pole_abs``, the
governing ``gain_margin_db`` and ``phase_margin_deg`` (when ``margins`` is asked for), and
``note`` (the model's notes: a steady-state error, a command at its limit), and
``beyond_interlock`` (the scenario's trip interlocks whose condition holds at the steady state:
the point is stable or not, but it trips there; empty when none).

The load of a point is the scenario's load at t = 0 with its constant power set to the point's
power; ``power_only`` drops the scenario's conductance and constant current, as the envelope's
cells do (:mod:`hilrig.runtime.trials.envelope`), so that the two maps are of the same loads.
"""
from __future__ import annotations

import dataclasses
import hashlib
import math
import os
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

STATUSES = ("stable", "unstable", "no steady state")
#: a map of at most this many points runs in this process
SMALL_MAP = 64
CSV_COLUMNS = ("controller", "v_ref_V", "p_load_W", "status", "largest_pole_abs",
               "gain_margin_db", "phase_margin_deg", "beyond_interlock", "note")


@dataclass(frozen=True)
class MapTask:
    """One grid row: a controller and one voltage at every load power."""

    scenario_text: str
    scenario_name: str
    scenario_path: str
    controller: str
    v: float
    p: tuple[float, ...]
    power_only: bool = False
    margins: bool = False
    overrides: tuple[tuple[str, Any], ...] = ()


_CACHE: dict[tuple[str, str, bool, tuple], Any] = {}


def _overrides(task: MapTask) -> dict[str, Any]:
    out = {key: value for key, value in task.overrides}
    out["controller.plugin"] = task.controller
    return out


def _prepared(task: MapTask):
    from ..run import prepare
    from ..scenario import parse_scenario
    from .linear import kernels
    key = (hashlib.sha256(task.scenario_text.encode()).hexdigest(), task.controller,
           task.power_only, task.overrides)
    if key not in _CACHE:
        sc = parse_scenario(task.scenario_text, name=task.scenario_name, path=task.scenario_path,
                            overrides=_overrides(task))
        # the controller designed for the scenario's range, not for a point's start and load
        from .design import pin
        sc = pin(sc)
        if task.power_only:
            sc = dataclasses.replace(sc, load_t=np.array([0.0]),
                                     load_v=np.array([[0.0], [0.0], [0.0]]))
        prep = prepare(sc)
        _CACHE[key] = (prep, kernels(prep))
    return _CACHE[key]


def point_row(prep, kern, controller: str, v: float, p: float, margins: bool) -> dict[str, Any]:
    """The map's row of one operating point."""
    from . import point
    from .linear import AnalysisError, linearize
    row: dict[str, Any] = dict(controller=controller, v_ref_V=float(v), p_load_W=float(p),
                               status="", largest_pole_abs=None, gain_margin_db=None,
                               phase_margin_deg=None, beyond_interlock="", note="")
    try:
        m = linearize(prep, v, p, kern)
    except AnalysisError as exc:
        row.update(status="no steady state", note=str(exc))
        return row
    top = point.largest_pole(m)
    row.update(status="stable" if top < point.STABLE_BELOW else "unstable",
               largest_pole_abs=top, note="; ".join(m.op.notes),
               beyond_interlock="; ".join(m.op.interlocks_beyond))
    if margins:
        mg = point.margins(m)
        if mg.get("available"):
            row.update(gain_margin_db=_finite(mg["gain_margin_db"]),
                       phase_margin_deg=_finite(mg["phase_margin_deg"]))
    return row


def _finite(x):
    return None if x is None or not math.isfinite(x) else float(x)


def run_row(task: MapTask) -> list[dict[str, Any]]:
    prep, kern = _prepared(task)
    return [point_row(prep, kern, task.controller, task.v, p, task.margins) for p in task.p]


def tasks_for(scenario_text: str, scenario_name: str, scenario_path: str, controllers, grid, *,
              power_only: bool = False, margins: bool = False,
              overrides: dict[str, Any] | None = None) -> list[MapTask]:
    ov = tuple(sorted((overrides or {}).items()))
    return [MapTask(scenario_text, scenario_name, scenario_path, c, float(v),
                    tuple(float(p) for p in grid.p), power_only, margins, ov)
            for c in controllers for v in grid.v]


def stability_map(tasks: list[MapTask], *, workers: int | None = None,
                  progress: Callable[[int, int], None] | None = None) -> list[dict[str, Any]]:
    """Every task's rows, in task order. ``progress(done, total)`` counts points."""
    from hilrig.runtime.trials.pool import run_rows
    # prepare each controller here first: a mistake is one error before any worker starts, and
    # forked workers inherit the compiled kernels
    for c in dict.fromkeys(t.controller for t in tasks):
        _prepared(next(t for t in tasks if t.controller == c))
    workers = max(1, workers or os.cpu_count() or 1)
    total = sum(len(t.p) for t in tasks)
    # a small map is done before a pool of processes would have started
    if len(tasks) == 1 or total <= SMALL_MAP:
        workers = 1
    results = run_rows(run_row, tasks, workers, progress)
    return [row for rows in results for row in rows]


def counts(rows: list[dict[str, Any]]) -> dict[str, dict[str, int]]:
    out: dict[str, dict[str, int]] = {}
    for r in rows:
        c = out.setdefault(r["controller"], {s: 0 for s in STATUSES})
        c[r["status"]] += 1
    return out


def agreement(map_rows: list[dict[str, Any]], env_rows: list[dict[str, Any]]) -> dict[str, Any]:
    """How the analysis and an envelope of the same grid agree, per controller.

    The analysis predicts that a cell tracks when the point is "stable" and its steady state
    is inside every trip interlock; it predicts that it does not when the point is "unstable",
    has no steady state (a limit of the controller or converter cannot hold it) or rests
    beyond an interlock. The two agree where the prediction and the cell's outcome match. The
    points where they differ are listed by kind: ``stable_not_tracking`` (a large-signal
    effect that a linear model cannot see: the transition to the point trips or leaves the
    region of attraction, or the command saturates) and ``unstable_tracking`` (the simulation
    settles where the model predicts otherwise). ``no_steady_state`` and ``beyond_interlock``
    list those points, whatever the envelope says. Points are matched by (controller, V, P)."""
    def key(r):
        return (r["controller"], round(float(r["v_ref_V"]), 6), round(float(r["p_load_W"]), 3))
    env = {key(r): r for r in env_rows}
    out: dict[str, Any] = {}
    for r in map_rows:
        e = env.get(key(r))
        if e is None:
            continue
        c = out.setdefault(r["controller"], dict(points=0, agree=0, stable_not_tracking=[],
                                                 unstable_tracking=[], no_steady_state=[],
                                                 beyond_interlock=[]))
        c["points"] += 1
        where = dict(v_ref_V=r["v_ref_V"], p_load_W=r["p_load_W"], outcome=e["outcome"],
                     largest_pole_abs=r["largest_pole_abs"])
        tracks = e["outcome"] == "tracks"
        if r["status"] == "no steady state":
            c["no_steady_state"].append(where)
        if r.get("beyond_interlock"):
            c["beyond_interlock"].append({**where, "interlock": r["beyond_interlock"]})
        predicted = r["status"] == "stable" and not r.get("beyond_interlock")
        if predicted == tracks:
            c["agree"] += 1
        elif predicted:
            c["stable_not_tracking"].append(where)
        else:
            c["unstable_tracking"].append(where)
    return out


def write_csv(rows: list[dict[str, Any]], dest) -> Any:
    import csv

    def num(x):
        return "" if x is None else repr(x)
    with open(dest, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(CSV_COLUMNS))
        w.writeheader()
        for r in rows:
            w.writerow({k: (num(r[k]) if k not in ("controller", "status", "note",
                                                    "beyond_interlock") else r[k])
                        for k in CSV_COLUMNS})
    return dest


def read_envelope_csv(path) -> list[dict[str, Any]]:
    """Rows of an envelope.csv (hilrig envelope), numbers as floats."""
    import csv
    rows = []
    with open(path, newline="") as fh:
        for r in csv.DictReader(fh):
            try:
                r["v_ref_V"] = float(r["v_ref_V"])
                r["p_load_W"] = float(r["p_load_W"])
            except (KeyError, ValueError):
                raise ValueError(f"{path}: not an envelope.csv of hilrig envelope (no numeric "
                                 f"v_ref_V, p_load_W columns)") from None
            rows.append(r)
    if not rows:
        raise ValueError(f"{path}: the envelope table is empty")
    return rows
