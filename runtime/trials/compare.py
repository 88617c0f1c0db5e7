"""Side-by-side trial of candidate controllers on one scenario.

Each candidate runs the same scenario (same plant, load, reference, interlocks, seed) with only
the controller replaced; each gets its own run folder ``OUT/<controller>/``. An override of a
controller parameter reaches the candidates that have it; the others' scenario.toml and
summary list it as not applied, with the reason
(:func:`hilrig.runtime.scenario.plan_candidates`). The comparison
reports, per candidate, its outcome (:mod:`hilrig.runtime.outcome`), the characteristics of the
largest reference step and the metrics of every reference segment (holds, steps, ramps; see
:mod:`hilrig.runtime.trials.metrics`), the tracking metrics over the time the run lasted, trips and the
loop's compute time per tick, and draws one figure per quantity with every candidate overlaid.

Candidates are ranked by :func:`hilrig.runtime.outcome.rank_key`: every run that completed
(inside its tracking band) before every run that did not, whatever their metrics (a run that
ended early has metrics of only the part it ran, often the best looking ones); then the runs
that ran to their end without a trip but oscillated or left their band; then by IAE. Results, the table, the JSON
and the plots' legends are in rank order.
"""
from __future__ import annotations

import math
import re
import sys
from pathlib import Path
from typing import Any, Callable

from .metrics import largest_change, largest_step
from ..outcome import coverage_text, judge, rank_key, time_text
from ..recording import dumps_json, finite_or_none, open_run
from ..run import run_scenario
from ..scenario import not_applied_lines, plan_candidates

JSON_KEYS = ("rise_time_s", "settling_time_s", "overshoot_pct", "steady_state_error_V", "iae_Vs",
             "rms_error_V", "max_abs_error_V", "saturation_time_s", "trips", "compute_ns_per_tick",
             "segments")
#: what ``--json`` gives per candidate besides the metrics
JSON_FIELDS = ("rank", "outcome", "covers_s", "metrics_note") + JSON_KEYS
#: the metric that orders candidates of the same outcome class (smaller first)
RANK_METRIC = "iae_Vs"
#: the ranking rule in words, for the table's footer and the docs
RANK_RULE = ("ranked: runs that completed first, by IAE (smaller first; completed: inside "
             "the tracking band too); then runs that reached their end without a trip but "
             "oscillated, left their band or missed their timing; then the others, whatever "
             "their metrics (those that reached the planned end first, then the longest)")


def folder_name(candidate: str) -> str:
    """A file-system-safe folder name for a candidate (plugin name or a .py path's stem)."""
    stem = Path(candidate).stem if candidate.endswith(".py") else candidate
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", stem)


def compare(scenario: Path, candidates: list[str], out: Path, *, overwrite: bool = False,
            overrides: dict[str, Any] | None = None,
            notice: Callable[[str], None] | None = None,
            on_run: Callable[[str], None] | None = None) -> dict[str, dict[str, Any]]:
    """Run every candidate; return {controller: results} in rank order (each with ``rank``,
    ``outcome``, ``covers_s``, the metrics, ``step`` and ``folder``) and write plots and
    comparison.json."""
    if not candidates:
        raise ValueError("--controllers: name at least one controller, e.g. cascaded_pi,flatness")
    if len(set(candidates)) != len(candidates):
        raise ValueError(f"--controllers: {','.join(candidates)} names a controller twice")
    out = Path(out)
    # check every candidate (and every target folder) before running any; a controller
    # parameter override goes to the candidates that have it, and is listed as not applied
    # in the others' scenario.toml and summary (none taking it is an error)
    _, plans = plan_candidates(scenario, overrides, candidates)
    scenarios = {name: plan.scenario for name, plan in plans.items()}
    for name in candidates:
        folder = out / folder_name(name)
        if (folder / "recording.h5").exists() and not overwrite:
            raise FileExistsError(f"{folder} already holds a recording; choose another --out, "
                                  f"or pass --overwrite to replace it (nothing was overwritten)")
    for line in not_applied_lines(plans):
        if notice:
            notice(line)
        else:
            print(line, file=sys.stderr)
    results: dict[str, dict[str, Any]] = {}
    for name, sc in scenarios.items():
        if on_run:
            on_run(name)
        res = run_scenario(sc, out / folder_name(name), overwrite=overwrite, notice=notice)
        s = res.summary
        segments = s["segments"]
        big = largest_step(segments)
        m = s["metrics"]
        oc = judge(s)
        results[name] = {
            "rank": None,
            "outcome": oc,
            # the metrics describe the run up to here (the whole run when it reached its end)
            "covers_s": oc["end_time_s"],
            # why there are no metrics at all (a plant integration error), else None
            "metrics_note": s.get("metrics_note"),
            "rise_time_s": big["rise_time_s"] if big else math.nan,
            "settling_time_s": big["settling_time_s"] if big else math.nan,
            "overshoot_pct": big["overshoot_pct"] if big else math.nan,
            "steady_state_error_V": big["steady_state_error_V"] if big else math.nan,
            "iae_Vs": m["iae_Vs"], "rms_error_V": m["rms_error_V"],
            "max_abs_error_V": m["max_abs_error_V"], "saturation_time_s": m["saturation_time_s"],
            "trips": m["trips"],
            "compute_ns_per_tick": s["timing"]["loop_ns_per_tick"],
            "step": big,
            "change": largest_change(segments),
            "segments": segments,
            "folder": str(res.folder),
            "overrides": sc.overrides,
        }
    results = ranked(results)
    (out / "comparison.json").write_text(dumps_json(results, indent=2) + "\n")
    try:
        plot_comparison(out, results)
    except ImportError:
        pass
    return results


def ranked(results: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """The results in rank order, each with its ``rank`` (1 = best) set: see
    :func:`hilrig.runtime.outcome.rank_key` (ties keep the candidates' given order)."""
    order = sorted(results, key=lambda n: rank_key(results[n]["outcome"],
                                                   results[n][RANK_METRIC]))
    return {n: {**results[n], "rank": i} for i, n in enumerate(order, 1)}


def json_view(results: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """The documented ``--json`` shape, in rank order: rank, outcome, covers_s and the metric
    keys; NaN as null."""
    return finite_or_none({k: {key: r[key] for key in JSON_FIELDS} for k, r in results.items()})


def curve_style(name: str, r: dict[str, Any]) -> tuple[str, str]:
    """(legend label, line style) of a candidate in the overlaid plots: the label carries the
    outcome, and a run that did not complete is drawn dashed."""
    oc = r["outcome"]
    if oc["completed"]:
        return f"{r['rank']}. {name} (completed)", "-"
    when = f" at {time_text(oc['first_cause_time_s'])}" if oc["first_cause_time_s"] is not None else ""
    cover = coverage_text(oc)
    return f"{r['rank']}. {name} ({oc['status']}{when}{'; ran ' + cover if cover else ''})", "--"


def plot_comparison(out: Path, results: dict[str, dict[str, Any]]) -> list[Path]:
    """One PNG per quantity (v_out and reference, error, command u), all candidates overlaid."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    runs = {name: open_run(r["folder"]) for name, r in results.items()}
    written = []
    # a zoom window around the largest step or ramp when there is one, else the whole run
    first = next(iter(results.values()))
    window = None
    if first["change"]:
        t0 = first["change"]["t_start_s"]
        window = (t0 - 0.002, first["change"]["t_end_s"] + 0.012)
    specs = [("compare_v_out.png", "output voltage [V]", lambda r: r.signals["v_out"], True),
             ("compare_error.png", "v_ref - v_out [V]", lambda r: r.signals["v_ref"] - r.signals["v_out"], False),
             ("compare_u.png", command_label(runs), command, False)]
    for fname, ylabel, get, with_ref in specs:
        fig, axes = plt.subplots(1, 2 if window else 1, figsize=(11 if window else 8, 4),
                                 constrained_layout=True, squeeze=False)
        for ax, win in zip(axes[0], ([None, window] if window else [None])):
            if with_ref:
                r0 = next(iter(runs.values()))
                ax.plot(r0.time, r0.signals["v_ref"], color="0.6", lw=2.0, label="v_ref")
            for name, run in runs.items():
                label, ls = curve_style(name, results[name])
                ax.plot(run.time, get(run), lw=0.9, ls=ls, label=label)
            if win:
                ax.set_xlim(*win)
                ax.set_title("around the largest reference step or ramp", fontsize=9)
            ax.set_xlabel("time [s]")
            ax.set_ylabel(ylabel)
            ax.grid(True, lw=0.3)
            ax.legend(fontsize=8, loc="best")
        fig.savefig(out / fname, dpi=90)
        plt.close(fig)
        written.append(out / fname)
    rng = wide_range(runs)
    if rng is not None:
        written.append(_range_plot(plt, out / "compare_range.png", runs, results))
    return written


def _unit_commands(run) -> list[str]:
    """The recorded commands of a run of paralleled units (unitK_u, K = 1..N), else []."""
    return sorted((n for n in run.signals if re.fullmatch(r"unit\d+_u", n)),
                  key=lambda n: int(n[4:-2]))


def command(run):
    """A run's converter command: ``u``, or for paralleled units the mean of the units'
    commands (each unit's own is in its run folder)."""
    if "u" in run.signals or not _unit_commands(run):
        return run.signals["u"]
    import numpy as np
    return np.mean([np.asarray(run.signals[n]) for n in _unit_commands(run)], axis=0)


def command_label(runs) -> str:
    counts = {len(_unit_commands(r)) for r in runs.values() if "u" not in r.signals}
    counts.discard(0)
    if not counts:
        return "converter command u [V]"
    return f"mean of the units' commands unitK_u [V] ({'/'.join(map(str, sorted(counts)))} units)"


#: a trial whose reference spans at least this share of its highest value gets compare_range.png
WIDE_RANGE_SHARE = 0.3


def wide_range(runs) -> tuple[float, float] | None:
    """(lowest, highest) reference of a wide-range trial (WIDE_RANGE_SHARE), else None."""
    import numpy as np
    r0 = next(iter(runs.values()))
    v = np.asarray(r0.signals["v_ref"])
    if v.size == 0:
        return None
    lo, hi = float(np.min(v)), float(np.max(v))
    return (lo, hi) if hi > 0 and hi - lo >= WIDE_RANGE_SHARE * hi else None


def _range_plot(plt, dest: Path, runs, results) -> Path:
    """Tracking error against the reference voltage, one curve per candidate, the design range
    shaded: where over the range each controller tracks, and where it stops."""
    import numpy as np
    fig, ax = plt.subplots(figsize=(8, 4), constrained_layout=True)
    shaded = False
    for name, run in runs.items():
        des = (run.summary or {}).get("design") or {}
        r = des.get("range")
        if r and not shaded:
            ax.axvspan(r["v_lo_V"], r["v_hi_V"], color="0.9", zorder=0,
                       label=f"design range {r['v_lo_V']:.4g}-{r['v_hi_V']:.4g} V")
            shaded = True
        v_ref = np.asarray(run.signals["v_ref"])
        err = np.abs(v_ref - np.asarray(run.signals["v_out"]))
        label, ls = curve_style(name, results[name])
        line, = ax.semilogy(v_ref, np.maximum(err, 1e-3), lw=0.9, ls=ls, label=label)
        if not results[name]["outcome"]["completed"] and v_ref.size:
            ax.plot(v_ref[-1], max(err[-1], 1e-3), "x", ms=9, color=line.get_color())
    ax.set_xlabel("reference v_ref [V]")
    ax.set_ylabel("|v_ref - v_out| [V]")
    ax.set_title("tracking error over the reference's range (x: the run ended there)", fontsize=9)
    ax.grid(True, which="both", lw=0.3)
    ax.legend(fontsize=8, loc="best")
    fig.savefig(dest, dpi=90)
    plt.close(fig)
    return dest
