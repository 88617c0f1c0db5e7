"""``hilrig analyze``: the operating-point analysis from the command line.

One operating point (``--at V,P``, default: the scenario's start) for each candidate controller:
steady state, closed-loop poles, margins, output impedance against the load's; a table, a figure
(analysis.png) and analysis.json in the output folder, or JSON on standard output. ``--map``: the
stability map over a grid (map.csv, map.png), drawn over an envelope map of the same grid with
``--envelope DIR`` (a folder written by ``hilrig envelope``), with the count of points where the
two agree.

Exit status: 0 when every controller was analysed (stable or not: the analysis is the result),
1 when some controller has no steady state at the point, 2 on a usage mistake (nothing written).
"""
from __future__ import annotations

import datetime as _dt
import math
import sys
import time
from pathlib import Path
from typing import Any

EXIT_NO_STEADY_STATE = 1


def add_parser(sub) -> None:
    p = sub.add_parser("analyze", help="linearised loop at an operating point: poles, margins, "
                                       "output impedance; --map for a stability map")
    p.add_argument("scenario", help="scenario TOML file (plant, controller, load, timing)")
    p.add_argument("--at", metavar="V,P",
                   help="operating point: reference voltage and constant load power, e.g. "
                        "400,50e3 or '400 V,50 kW' (default: the scenario's start voltage and "
                        "load power at t = 0)")
    p.add_argument("--controllers", metavar="A,B,...",
                   help="controllers to analyse (default: the scenario's own)")
    p.add_argument("--out", help="folder for analysis.json and analysis.png (map.csv, map.png "
                                 "with --map); default runs/<time>-analyze")
    p.add_argument("--json", action="store_true", help="print the results as JSON (writes no files)")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override a scenario key, as for run (repeatable)")
    p.add_argument("--headless", action="store_true", help="plain text output")
    p.add_argument("--map", action="store_true",
                   help="stability map over --v-range x --p-range instead of one point")
    p.add_argument("--v-range", default="50:600", metavar="LOW:HIGH",
                   help="map: reference voltages [V] (default 50:600, as envelope)")
    p.add_argument("--p-range", default="0:150e3", metavar="LOW:HIGH",
                   help="map: constant load powers [W] (default 0:150e3, as envelope)")
    p.add_argument("--grid", default="25x25", metavar="NVxNP", help="map: points per axis (default 25x25)")
    p.add_argument("--envelope", metavar="DIR",
                   help="map: draw over this envelope folder's map (its grid, controllers and "
                        "loads replace --v-range, --p-range, --grid) and count agreement")
    p.add_argument("--with-margins", action="store_true",
                   help="map: also the gain and phase margins of every point (slower)")
    p.add_argument("--workers", type=int, help="map: local worker processes (default: all cores)")


def _point_arg(text: str) -> tuple[float, float]:
    from hilrig.runtime.units import parse_quantity
    parts = text.split(",")
    if len(parts) != 2:
        raise ValueError(f"--at {text!r}: write V,P, e.g. --at 400,50e3 or --at '400 V,50 kW'")
    v = parse_quantity(parts[0].strip(), "V", "--at (voltage)")
    p = parse_quantity(parts[1].strip(), "W", "--at (power)")
    if not v > 0.0:
        raise ValueError(f"--at {text!r}: the voltage must be above 0 V")
    return v, p


def _names(args, sc) -> list[str]:
    names = [c.strip() for c in (args.controllers or "").split(",") if c.strip()]
    return names or [sc.controller.plugin.name]


def run(console, args, plain: bool, overrides: dict[str, Any]) -> int:
    from hilrig.runtime.scenario import load_scenario, not_applied_lines, plan_candidates
    path = Path(args.scenario)
    sc0 = load_scenario(path, overrides={k: v for k, v in overrides.items()
                                         if not k.startswith("controller")} or None)
    if sc0.units is not None:
        from hilrig.runtime.errors import ScenarioError
        from .check import UNITS_NOT_ANALYSED
        raise ScenarioError(f"{path.name}: {UNITS_NOT_ANALYSED}; hilrig analyze needs a "
                            f"single-unit scenario (the unit alone: leave [units] out)")
    names = _names(args, sc0)
    if args.controllers:
        sc, plans = plan_candidates(path, overrides, names)
        scenarios = {c: plans[c].scenario for c in names}
        notes = not_applied_lines(plans)
    else:
        sc = load_scenario(path, overrides=overrides or None)
        scenarios = {names[0]: sc}
        notes = []
    for line in notes:
        print(line, file=sys.stderr) if args.json else console.print(line, markup=False,
                                                                     soft_wrap=True)
    if args.map:
        if args.at:
            raise ValueError("--at and --map: choose one (a point, or a map over a grid)")
        return _map(console, args, plain, path, scenarios)
    return _point(console, args, path, scenarios)


def _out_folder(args, what: str) -> Path:
    return Path(args.out) if args.out else Path("runs") / (
        _dt.datetime.now().strftime("%Y%m%d-%H%M%S") + f"-{what}")


def _point(console, args, path: Path, scenarios: dict) -> int:
    from rich.markup import escape

    from hilrig.runtime.run import prepare

    from . import point
    from .linear import AnalysisError, linearize
    first = next(iter(scenarios.values()))
    t0 = time.perf_counter()
    if args.at:
        v, p = _point_arg(args.at)
    else:
        v, p = None, float(first.load_v[0, 0])
    models, sums, failed = {}, {}, {}
    for name, sc in scenarios.items():
        prep = prepare(sc)
        vv = prep.v0 if v is None else v
        try:
            m = linearize(prep, vv, p)
        except AnalysisError as exc:
            failed[name] = str(exc)
            continue
        models[name] = m
        sums[name] = point.summary(m)
    wall = time.perf_counter() - t0
    v_show = v if v is not None else prepare(first).v0
    result = dict(scenario=str(path), v_ref_V=v_show, p_load_W=p, controllers=sums,
                  no_steady_state=failed, seconds=wall)
    if args.json:
        print(_json(result))
        return EXIT_NO_STEADY_STATE if failed else 0
    out = _out_folder(args, "analyze")
    if (out / "analysis.json").exists():
        raise FileExistsError(f"{out / 'analysis.json'} exists; choose another --out (nothing "
                              f"was overwritten)")
    console.print(escape(f"operating point: v_ref = {v_show:g} V, constant load power "
                         f"{p / 1e3:g} kW ({path.name}, plant {first.plant.plugin.name}, "
                         f"Ts = {first.Ts * 1e6:g} us, actuation delay "
                         f"{first.actuation_delay:g} periods)"), soft_wrap=True)
    for name, s in sums.items():
        _print_point(console, name, s)
    for name, why in failed.items():
        console.print(f"{name}: no steady state: {why}", markup=False, soft_wrap=True)
    out.mkdir(parents=True, exist_ok=True)
    (out / "analysis.json").write_text(_json(result) + "\n")
    wrote = [out / "analysis.json"]
    if models:
        try:
            from .plots import point_png
            wrote.append(point_png(models, sums, out / "analysis.png",
                                   title=f"{path.name}: linearised loop at {v_show:g} V, "
                                         f"{p / 1e3:g} kW"))
        except ImportError:
            pass
    console.print(escape(f"analysed in {wall * 1e3:.0f} ms; wrote "
                         + ", ".join(str(w) for w in wrote)), soft_wrap=True)
    return EXIT_NO_STEADY_STATE if failed else 0


def _fmt(x, fmt="{:.3g}"):
    return "-" if x is None or (isinstance(x, float) and not math.isfinite(x)) else fmt.format(x)


def _print_point(console, name: str, s: dict[str, Any]) -> None:
    from rich import box
    from rich.markup import escape
    from rich.table import Table
    word = "[green]stable[/green]" if s["stable"] else "[red]unstable[/red]"
    console.print(f"[bold]{escape(name)}[/bold]: {word}, largest closed-loop |z| = "
                  f"{s['largest_pole_abs']:.4f}; v_out = {s['v_out_V']:.6g} V, command "
                  f"{escape(', '.join(f'{u:.5g}' for u in s['steady_state']['command']))} V "
                  f"(controller model: {escape(s['controller_model'])})")
    t = Table(box=box.SIMPLE_HEAD, header_style="bold")
    for head in ("|z| [-]", "z", "s [1/s]", "damping [-]", "f_n [Hz]"):
        t.add_column(escape(head), justify="right")
    for pz in s["poles"]:
        z = complex(pz["z_re"], pz["z_im"])
        sv = "-" if pz["s_re"] is None else f"{pz['s_re']:.4g}{pz['s_im']:+.4g}j"
        t.add_row(f"{pz['abs_z']:.5f}", f"{z.real:.5f}{z.imag:+.5f}j", sv,
                  _fmt(pz["damping"]), _fmt(pz["f_n_hz"], "{:.4g}"))
    console.print(t)
    mg = s["margins"]
    if mg.get("available"):
        console.print(escape(
            f"  gain margin {_fmt(mg['gain_margin_db'], '{:.2f}')} dB at "
            f"{_fmt(mg['f_phase_crossover_hz'], '{:.4g}')} Hz; phase margin "
            f"{_fmt(mg['phase_margin_deg'], '{:.1f}')} deg at "
            f"{_fmt(mg['f_gain_crossover_hz'], '{:.4g}')} Hz (loop broken at the converter "
            f"command; {len(mg['gain_crossovers'])} gain and {len(mg['phase_crossovers'])} "
            f"phase crossover(s) below Nyquist)"), soft_wrap=True)
    else:
        console.print(escape(f"  margins: {mg['why']}"))
    mb = s["middlebrook"]
    zl = mb["z_load_ohm"]
    console.print(escape(
        f"  output impedance: |Z_out| up to {_fmt(mb['z_out_max_ohm'])} ohm; load "
        f"{'none' if not math.isfinite(zl) else _fmt(zl) + ' ohm'}; Middlebrook "
        f"{'met' if mb['met'] else 'NOT met'} (margin {_fmt(mb['margin_db'], '{:.1f}')} dB"
        + (f", closest at {_fmt(mb['f_at_max_hz'], '{:.4g}')} Hz)" if mb["f_at_max_hz"] else ")")),
        soft_wrap=True)
    for n in s["notes"]:
        console.print(escape(f"  note: {n}"), soft_wrap=True)
    for n in s["interlocks_beyond"]:
        console.print(escape(f"  beyond an interlock at rest: {n}: a run here trips"),
                      soft_wrap=True)


def _map(console, args, plain: bool, path: Path, scenarios: dict) -> int:
    from rich.markup import escape

    from hilrig.runtime.trials.envelope import Grid

    from . import grid as gmod
    env_rows = None
    if args.envelope:
        csv_path = Path(args.envelope) / "envelope.csv"
        if not csv_path.exists():
            raise ValueError(f"--envelope {args.envelope}: no envelope.csv there (write one with "
                             f"hilrig envelope ... --out {args.envelope})")
        env_rows = gmod.read_envelope_csv(csv_path)
        env_ctrls = list(dict.fromkeys(r["controller"] for r in env_rows))
        if args.controllers:
            missing = [c for c in scenarios if c not in env_ctrls]
            if missing:
                raise ValueError(f"--envelope {args.envelope}: its map has no controller "
                                 f"{', '.join(missing)} (it has {', '.join(env_ctrls)})")
        else:
            from hilrig.runtime.scenario import plan_candidates
            _, plans = plan_candidates(path, _overrides_of(args), env_ctrls)
            scenarios = {c: plans[c].scenario for c in env_ctrls}
        grid = Grid(v=tuple(sorted({r["v_ref_V"] for r in env_rows})),
                    p=tuple(sorted({r["p_load_W"] for r in env_rows})))
    else:
        grid = Grid.parse(args.v_range, args.p_range, args.grid)
    out = _out_folder(args, "analyze-map")
    if not args.json and (out / "map.csv").exists():
        raise FileExistsError(f"{out / 'map.csv'} exists; choose another --out (nothing was "
                              f"overwritten)")
    tasks = []
    for c, sc in scenarios.items():
        tasks += gmod.tasks_for(sc.text, path.name, str(path), [c], grid,
                                power_only=env_rows is not None, margins=args.with_margins)
    if not args.json:
        console.print(f"{len(scenarios)} controller(s) x {len(grid.v)} x {len(grid.p)} operating "
                      f"points" + (" (the envelope's grid and loads)" if env_rows else ""))
    from hilrig.runtime.cli import _Progress
    prog = None if args.json else _Progress(console, plain, unit="operating points")
    t0 = time.perf_counter()
    try:
        rows = gmod.stability_map(tasks, workers=args.workers, progress=prog)
    finally:
        if prog:
            prog.close()
    wall = time.perf_counter() - t0
    cnt = gmod.counts(rows)
    agree = gmod.agreement(rows, env_rows) if env_rows is not None else None
    if args.json:
        print(_json(dict(scenario=str(path), counts=cnt, agreement=agree, points=rows,
                         seconds=wall)))
        return 0
    for c, n in cnt.items():
        console.print(escape(f"{c}: " + ", ".join(f"{k} {v}" for k, v in n.items())),
                      soft_wrap=True)
        if agree and c in agree:
            a = agree[c]
            console.print(escape(
                f"  against the envelope: {a['agree']} of {a['points']} points agree; predicted "
                f"to track but did not {len(a['stable_not_tracking'])}, predicted not to track "
                f"(unstable, no steady state or beyond an interlock) but tracked "
                f"{len(a['unstable_tracking'])}"), soft_wrap=True)
    out.mkdir(parents=True, exist_ok=True)
    gmod.write_csv(rows, out / "map.csv")
    wrote = [out / "map.csv"]
    if agree is not None:
        (out / "agreement.json").write_text(_json(agree) + "\n")
        wrote.append(out / "agreement.json")
    try:
        from .plots import map_png
        first = next(iter(scenarios.values()))
        wrote.append(map_png(rows, out / "map.png", env_rows, title=(
            f"{first.title or path.name}: " + ("SIL envelope and the linear analysis"
                                               if env_rows else "largest closed-loop |z|"))))
    except ImportError:
        pass
    console.print(escape(f"{len(rows)} points in {wall:.1f} s; wrote "
                         + ", ".join(str(w) for w in wrote)), soft_wrap=True)
    return 0


def _overrides_of(args) -> dict[str, Any]:
    from hilrig.runtime.cli import _overrides
    return _overrides(args.set)


def _json(obj) -> str:
    from hilrig.runtime.recording import dumps_json
    return dumps_json(_plain(obj), indent=2)


def _plain(obj):
    """Complex numbers and numpy scalars as plain JSON values."""
    import numpy as np
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, complex):
        return dict(re=obj.real, im=obj.imag)
    if isinstance(obj, np.generic):
        return obj.item()
    return obj
