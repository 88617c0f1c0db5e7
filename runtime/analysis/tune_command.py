"""``hilrig tune``: robust tuning of a controller over an operating range (runtime/analysis/
tune.py), confirmed by the stability map and the SIL envelope before and after."""
from __future__ import annotations

import datetime as _dt
import json
import sys
import time
from pathlib import Path
from typing import Any

from . import tune as tmod


def add_parser(sub) -> None:
    p = sub.add_parser("tune", help="tune a controller's parameters for the worst case over an "
                                    "operating range (analysis), confirmed in SIL")
    p.add_argument("scenario", help="scenario TOML file (plant, controller, timing)")
    p.add_argument("--controller", metavar="NAME",
                   help="controller plugin to tune (default: the scenario's own)")
    p.add_argument("--params", metavar="NAME[:LOW:HIGH],...",
                   help="parameters to tune, each with an optional search range (default: the "
                        "plugin's declared tunable parameters)")
    p.add_argument("--v-range", metavar="LOW:HIGH",
                   help="reference voltages [V] (default: the scenario's design range)")
    p.add_argument("--p-range", metavar="LOW:HIGH",
                   help="constant load powers [W], negative = regeneration; write a negative "
                        "start as --p-range=-40e3:80e3 (default: the scenario's design range)")
    p.add_argument("--grid", default="8x8", metavar="NVxNP",
                   help="operating points per axis (default 8x8)")
    p.add_argument("--starts", type=int, default=tmod.STARTS,
                   help=f"search starts, run in parallel (default {tmod.STARTS})")
    p.add_argument("--workers", type=int, help="local worker processes (default: all cores)")
    p.add_argument("--no-confirm", action="store_true",
                   help="skip the SIL confirmation before and after (envelopes and ramps; the "
                        "analysis only)")
    p.add_argument("--unguarded", action="store_true",
                   help="minimise the plain worst |z| (default: guarded, the loop also stable "
                        "with its gain off by 3 dB and its phase by 20 degrees)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="run the confirming envelopes on this Dask scheduler (as envelope "
                        "--cluster); the search runs on local processes")
    p.add_argument("--tolerance", type=float, default=2.0,
                   help="envelope: tracking band in %% of the target (default 2)")
    p.add_argument("--out", help="folder for tuned.toml, tune.json, the maps and report.md "
                                 "(default runs/<time>-tune)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override a scenario key, as for run (repeatable)")
    p.add_argument("--headless", action="store_true", help="plain text output")


def _range(text: str | None, unit: str, flag: str, default: tuple[float, float]):
    from hilrig.runtime.units import parse_quantity
    if not text:
        return default
    try:
        lo, hi = text.split(":")
        a, b = parse_quantity(lo, unit, flag), parse_quantity(hi, unit, flag)
    except ValueError:
        raise ValueError(f"{flag} {text!r}: write LOW:HIGH, e.g. "
                         + ("300:500" if unit == "V" else "-40e3:80e3")) from None
    if not b >= a:
        raise ValueError(f"{flag} {text!r}: HIGH is below LOW")
    return a, b


def _grid_axes(spec: str, vr, pr):
    import numpy as np
    try:
        nv, np_ = (int(x) for x in spec.lower().split("x"))
    except ValueError:
        raise ValueError(f"--grid {spec!r}: write NVxNP, e.g. 8x8") from None
    if not (1 <= nv <= 100 and 1 <= np_ <= 100):
        raise ValueError(f"--grid {spec!r}: 1 to 100 points per axis")
    v = tuple(float(x) for x in np.linspace(vr[0], vr[1], nv)) if vr[1] > vr[0] else (vr[0],)
    p = tuple(float(x) for x in np.linspace(pr[0], pr[1], np_)) if pr[1] > pr[0] else (pr[0],)
    return v, p


def _plain(obj):
    import math
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if hasattr(obj, "item"):
        return obj.item()
    return obj


def run(console, args, plain: bool, overrides: dict[str, Any]) -> int:
    import os

    from rich.markup import escape

    from hilrig.runtime.cli import _Progress, _show_caution
    from hilrig.runtime.run import plain_values, prepare
    from hilrig.runtime.scenario import load_scenario, parse_scenario
    from hilrig.runtime.trials import envelope as env

    from . import design as dmod
    from . import grid as gmod

    path = Path(args.scenario)
    ov = dict(overrides)
    if args.controller:
        ov["controller"] = {"plugin": args.controller}
    sc = load_scenario(path, overrides=ov or None)
    if sc.units is not None:
        from hilrig.runtime.errors import ScenarioError
        from .check import UNITS_NOT_ANALYSED
        raise ScenarioError(f"{path.name}: {UNITS_NOT_ANALYSED}; hilrig tune needs a "
                            f"single-unit scenario (tune the unit alone: leave [units] out)")
    sc = dmod.pin(sc)
    name = sc.controller.plugin.name
    # the controller as the scenario names it (a path for a user's plugin): what the map's and
    # the envelope's tasks select it by
    ref = args.controller or _plugin_ref(sc.text)
    decl = sc.controller.plugin.declaration
    tunables = tmod.parse_params(args.params, decl)
    d = sc.design
    vr = _range(args.v_range, "V", "--v-range", tuple(d["v_range"]))
    pr = _range(args.p_range, "W", "--p-range", tuple(d["p_range"]))
    gv, gp = _grid_axes(args.grid, vr, pr)
    if args.starts < 1:
        raise ValueError(f"--starts {args.starts}: at least 1")
    workers = max(1, args.workers or os.cpu_count() or 1)
    out = Path(args.out) if args.out else Path("runs") / (
        _dt.datetime.now().strftime("%Y%m%d-%H%M%S") + "-tune")
    if (out / "tune.json").exists():
        raise FileExistsError(f"{out / 'tune.json'} exists; choose another --out (nothing was "
                              f"overwritten)")
    say = (lambda line: print(line, file=sys.stderr)) if args.json else (
        lambda line: console.print(line, markup=False, soft_wrap=True))
    if not args.json:
        _show_caution(console, sc, [])
    prep = prepare(sc)
    say(f"tuning {name}: {', '.join(t.name for t in tunables)} over {vr[0]:.6g}-{vr[1]:.6g} V, "
        f"{pr[0] / 1e3:.6g}..{pr[1] / 1e3:.6g} kW ({len(gv)} x {len(gp)} points)")
    t0 = time.perf_counter()
    res = tmod.tune(prep, tunables, gv, gp, starts=args.starts, workers=workers,
                    progress=None if args.json else say, guard=not args.unguarded)
    ob = res.checks["objective"]
    if ob.get("fallback"):
        say("notice: " + ob["fallback"])
    say(f"worst closed-loop |z| over the grid: {res.before_worst:.4f} before, "
        f"{res.after_worst:.4f} tuned; " + ("with the gain off by 3 dB and the phase by "
                                            "20 deg: " if ob["guarded"] else "searched: ")
        + f"{ob['before']:.4f} before, {ob['tuned']:.4f} tuned ({res.evaluations} "
        f"evaluations, {res.search_s:.1f} s)")
    # the scenario with the tuned values, as text: what the maps, envelope and snippet run
    sets = {f"controller.{t.name}": float(res.after[t.name]) for t in tunables}
    before_text = sc.text if not args.controller else parse_scenario(
        sc.text, name=path.name, path=str(path), overrides={"controller": {"plugin": ref}}).text
    pinned = dmod.pinned_overrides(sc)
    before_text = parse_scenario(before_text, name=path.name, path=str(path),
                                 overrides=pinned).text
    after_text = parse_scenario(before_text, name=path.name, path=str(path), overrides=sets).text
    labels = {"before": f"{name} before", "after": f"{name} tuned"}
    # the stability map before and after (analysis)
    grid = env.Grid(v=gv, p=gp)
    mrows = []
    for key, text in (("before", before_text), ("after", after_text)):
        rows = gmod.stability_map(gmod.tasks_for(text, path.name, str(path), [ref], grid),
                                  workers=workers)
        for r in rows:
            r["controller"] = labels[key]
        mrows += rows
    mcount = gmod.counts(mrows)
    erows = []
    ecount = {}
    if not args.no_confirm:
        say("confirming in SIL: the envelope before and after "
            f"({2 * len(gv) * len(gp)} operating points) ...")
        tasks = {key: env.tasks_for(text, path.name, [ref], grid, tol_pct=args.tolerance)
                 for key, text in (("before", before_text), ("after", after_text))}
        env.warm_up(tasks["before"])
        prog = None if args.json else _Progress(console, plain, unit="operating points")
        try:
            allt = tasks["before"] + tasks["after"]
            results = env.run_envelope(allt, cluster=args.cluster, workers=workers,
                                       progress=prog)
        finally:
            if prog:
                prog.close()
        nb = len(tasks["before"])
        for key, rs, ts in (("before", results[:nb], tasks["before"]),
                            ("after", results[nb:], tasks["after"])):
            rows = env.table(ts, rs)
            for r in rows:
                r["controller"] = labels[key]
            erows += rows
        ecount = env.counts(erows)
        say("confirming in SIL: a ramp over the range at its highest power, before and after ...")
        ramps = {key: ramp_check(text, path, vr, pr, out / f"ramp_{key}")
                 for key, text in (("before", before_text), ("after", after_text))}
    else:
        ramps = None
    wall = time.perf_counter() - t0
    snippet = res.snippet(ref)
    # the SIL confirmation has the last word: a tuned set that tracks at fewer cells than the
    # scenario's own, or fails the ramp the scenario's own finishes, is not recommended
    rejected = []
    if ecount:
        nb = ecount.get(labels["before"], {}).get("tracks", 0)
        na = ecount.get(labels["after"], {}).get("tracks", 0)
        if na < nb:
            rejected.append(f"the tuned set tracks at {na} envelope cells, the scenario's own at {nb}")
    if ramps and ramps["before"]["completed"] and not ramps["after"]["completed"]:
        rejected.append(f"the tuned set does not finish the ramp ({ramps['after']['outcome']}); "
                        f"the scenario's own does")
    result = dict(
        scenario=str(path), controller=name, parameters=[dataclass_dict(t) for t in tunables],
        range=dict(v_lo_V=vr[0], v_hi_V=vr[1], p_lo_W=pr[0], p_hi_W=pr[1]),
        grid=dict(v=list(gv), p=list(gp)),
        before=plain_values({t.name: res.before[t.name] for t in tunables}),
        tuned=plain_values({t.name: res.after[t.name] for t in tunables}),
        worst_pole_abs=dict(before=res.before_worst, tuned=res.after_worst),
        objective=res.checks["objective"],
        stability_map={k: mcount.get(v, {}) for k, v in labels.items()},
        envelope={k: ecount.get(v, {}) for k, v in labels.items()} if ecount else None,
        ramp=ramps,
        margins=res.checks, starts=res.starts, evaluations=res.evaluations,
        search_s=res.search_s, seconds=wall, snippet=snippet, guarded=not args.unguarded,
        confirmed=None if args.no_confirm else not rejected, rejected_because=rejected)
    out.mkdir(parents=True, exist_ok=True)
    wrote = []
    if not rejected:
        (out / "tuned.toml").write_text(snippet)
        wrote.append(out / "tuned.toml")
    (out / "tune.json").write_text(json.dumps(_plain(result), indent=1) + "\n")
    gmod.write_csv(mrows, out / "map.csv")
    wrote += [out / "tune.json", out / "map.csv"]
    if erows:
        env.write_csv(erows, out / "envelope.csv")
        wrote.append(out / "envelope.csv")
    try:
        from .plots import map_png
        wrote.append(map_png(mrows, out / "map.png", title=f"{sc.title or path.name}: largest "
                             f"closed-loop |z| before and after tuning"))
        if erows:
            wrote.append(env.heat_map_png(erows, out / "envelope.png", title=(
                f"{sc.title or path.name}: SIL envelope before and after tuning")))
    except ImportError:
        pass
    wrote.append(_report(out / "report.md", result, wrote))
    if args.json:
        print(json.dumps(_plain(result), indent=1))
        return 1 if rejected else 0
    console.print(escape(f"stability map (analysis): before {_counts(mcount.get(labels['before']))}; "
                         f"tuned {_counts(mcount.get(labels['after']))}"), soft_wrap=True)
    if ecount:
        console.print(escape(f"envelope (SIL): before {_counts(ecount.get(labels['before']))}; "
                             f"tuned {_counts(ecount.get(labels['after']))}"), soft_wrap=True)
    if ramps:
        console.print(escape("ramp (SIL, " + ramps["before"]["description"] + "): before "
                             + ramps["before"]["outcome"] + "; tuned " + ramps["after"]["outcome"]),
                      soft_wrap=True)
    ma = res.checks.get("margins_after") or {}
    if ma.get("available"):
        console.print(escape(
            f"at the hardest point ({ma['v_ref_V']:.6g} V, {ma['p_load_W'] / 1e3:.6g} kW): gain "
            f"margin {_f(ma['gain_margin_db'], ' dB')}, phase margin "
            f"{_f(ma['phase_margin_deg'], ' deg')}, Middlebrook margin "
            f"{_f(ma['middlebrook_margin_db'], ' dB')}"), soft_wrap=True)
    if rejected:
        console.print(escape("REJECTED by the SIL confirmation: " + "; ".join(rejected)
                             + ". The tuned set is not recommended (tuned.toml not written; "
                             "tune.json keeps it). Try a narrower range, more starts, or the "
                             "scenario's own values."), soft_wrap=True)
    else:
        console.print("tuned set for the scenario" + (" (analysis only, not confirmed in SIL)"
                                                      if args.no_confirm else "") + ":")
        console.print(snippet, markup=False, highlight=False)
    console.print(escape(f"{wall:.1f} s; wrote " + ", ".join(str(w) for w in wrote)),
                  soft_wrap=True)
    return 1 if rejected else 0


#: the confirming ramp: a hold, then the ramp over the range, then a hold [s]
RAMP_HOLD_S = 0.01
RAMP_S = 0.05


def ramp_check(text: str, path: Path, vr, pr, folder: Path) -> dict[str, Any]:
    """One SIL run: the reference ramps from the range's top to its bottom in RAMP_S at the
    range's highest load power (down at constant power: the hard direction), with the
    scenario's start excitation; its outcome and largest tracking error after the first hold."""
    import numpy as np

    from hilrig.runtime.outcome import judge
    from hilrig.runtime.recording import open_run
    from hilrig.runtime.run import run_scenario
    from hilrig.runtime.scenario import parse_scenario
    hi, lo, p = float(vr[1]), float(vr[0]), float(pr[1])
    t1, t2 = RAMP_HOLD_S, RAMP_HOLD_S + RAMP_S
    ov = {"mode": "sil",
          "reference": {"plugin": "profile", "points": [[0.0, hi], [t1, hi], [t2, lo],
                                                        [t2 + RAMP_HOLD_S, lo]]},
          "load": {"points": [{"t": 0.0, "P": p}]}, "initial.v_out": hi,
          "timing.duration": t2 + RAMP_HOLD_S}
    sc = parse_scenario(text, name=path.name, path=str(path), overrides=ov)
    res = run_scenario(sc, folder, overwrite=True)
    oc = judge(res.summary)
    run = open_run(folder)
    t = np.asarray(run.time)
    err = np.abs(np.asarray(run.signals["v_ref_raw"]) - np.asarray(run.signals["v_out"]))
    after = err[t >= t1] if np.any(t >= t1) else err
    return dict(description=f"{hi:.6g} -> {lo:.6g} V in {RAMP_S * 1e3:g} ms at "
                            f"{p / 1e3:.6g} kW", outcome=oc["text"], status=oc["status"],
                completed=bool(oc["completed"]),
                max_error_V=float(np.max(after)) if after.size else None, folder=str(folder))


def _plugin_ref(text: str) -> str:
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    return tomllib.loads(text).get("controller", {}).get("plugin", "cascaded_pi")


def dataclass_dict(t) -> dict[str, Any]:
    return dict(name=t.name, low=t.low, high=t.high, scale=t.scale)


def _f(x, unit):
    return "none" if x is None else f"{x:.3g}{unit}"


def _counts(c: dict | None) -> str:
    if not c:
        return "-"
    return ", ".join(f"{k} {v}" for k, v in c.items() if v)


def _report(dest: Path, r: dict[str, Any], wrote: list[Path]) -> Path:
    lines = [f"# Tuning of {r['controller']} ({Path(r['scenario']).name})", "",
             f"Range: {r['range']['v_lo_V']:.6g}-{r['range']['v_hi_V']:.6g} V, "
             f"{r['range']['p_lo_W'] / 1e3:.6g}..{r['range']['p_hi_W'] / 1e3:.6g} kW, "
             f"{len(r['grid']['v'])} x {len(r['grid']['p'])} points.", "",
             "| parameter | before | tuned | search range |", "| --- | --- | --- | --- |"]
    for t in r["parameters"]:
        lines.append(f"| {t['name']} | {r['before'][t['name']]:.6g} | {r['tuned'][t['name']]:.6g} "
                     f"| {t['low']:g} .. {t['high']:g} ({t['scale']}) |")
    w = r["worst_pole_abs"]
    lines += ["", f"Worst largest closed-loop |z| over the grid: {w['before']:.4f} before, "
              f"{w['tuned']:.4f} tuned (below 1: stable at every point).", "",
              "| | stability map (analysis) | envelope (SIL) |", "| --- | --- | --- |"]
    for k in ("before", "tuned"):
        key = "before" if k == "before" else "after"
        lines.append(f"| {k} | {_counts(r['stability_map'].get(key))} | "
                     f"{_counts((r['envelope'] or {}).get(key))} |")
    if r.get("ramp"):
        rb, ra = r["ramp"]["before"], r["ramp"]["after"]
        lines += ["", f"Ramp ({rb['description']}, SIL): before {rb['outcome']} (largest error "
                  f"{_f(rb['max_error_V'], ' V')}); tuned {ra['outcome']} (largest error "
                  f"{_f(ra['max_error_V'], ' V')})."]
    lines += ["", "Starts of the search (grid worst |z| of each end; margins at its hardest "
              "point):", ""]
    for s in r["starts"]:
        lines.append(f"- {s['grid_worst_pole_abs']}: margins "
                     f"{'met' if s['margins_ok'] else 'NOT met'}")
    if r.get("rejected_because"):
        lines += ["", "**REJECTED by the SIL confirmation**: " + "; ".join(r["rejected_because"])
                  + ". The set below is not recommended."]
    lines += ["", "Tuned set for the scenario:", "", "```toml", r["snippet"].rstrip(), "```", "",
              "Files: " + ", ".join(p.name for p in wrote), "",
              "The analysis is linear (small deviations around each operating point); the SIL "
              "envelope confirms it on the compiled loop. Neither replaces tests on the real "
              "equipment under local codes and licensed practice.", ""]
    dest.write_text("\n".join(lines))
    return dest
