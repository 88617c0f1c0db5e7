"""The ``hilrig`` command line: demo, run, report, plugins, export.

User mistakes (a bad scenario, a missing run folder) print one message naming the file, key and
value and exit with status 2; they never print a traceback. Nothing recorded is overwritten.
A paced run that ran but did not hold its ``[paced]`` timing limits exits with status 3
(``EXIT_TIMING_NOT_MET``); a trip is a result of a run, not an error (status 0).
"""
from __future__ import annotations

import argparse
import math
import sys
import time
from importlib.resources import files
from pathlib import Path

from hilrig.runtime.version import installed as installed_version

EXIT_USAGE = 2
#: a paced run that ran but did not hold its [paced] timing limits (summary paced.verdict)
EXIT_TIMING_NOT_MET = 3
EXIT_INTERRUPTED = 130


def _console(plain: bool):
    from rich.console import Console
    return Console(highlight=False, no_color=plain, force_terminal=False if plain else None)


def _demo_path() -> Path:
    return Path(str(files("hilrig.runtime") / "data" / "demo.toml"))


class _Progress:
    """A progress bar that appears only when the run will take longer than about a second."""

    def __init__(self, console, plain: bool, unit: str = "ticks", quiet: bool = False):
        self.quiet = quiet
        self.unit = unit
        self.console = console
        self.plain = plain
        self.t0 = time.perf_counter()
        self.bar = None
        self.task = None
        self.last_line = float("-inf")

    def __call__(self, done: int, total: int) -> None:
        if self.quiet:
            return
        el = time.perf_counter() - self.t0
        if self.bar is None and done < total and el * total / max(done, 1) > 1.0:
            if self.plain or not self.console.is_terminal:
                self.bar = False
            else:
                from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn
                self.bar = Progress(TextColumn("running"), BarColumn(),
                                    TextColumn("{task.percentage:>3.0f} %"), TimeRemainingColumn(),
                                    console=self.console, transient=True)
                self.bar.start()
                self.task = self.bar.add_task("run", total=total)
        if self.bar:
            self.bar.update(self.task, completed=done)
        elif self.bar is False and time.perf_counter() - self.last_line > 2.0:
            self.last_line = time.perf_counter()
            self.console.print(f"progress: {done}/{total} {self.unit} ({100 * done / total:.0f} %)")

    def close(self):
        if self.bar:
            self.bar.stop()


def _show_caution(console, sc) -> None:
    from hilrig.safety.caution import (CAUTION_TITLE, caution_text, scenario_voltages,
                                       unreachable_voltages)
    for note in unreachable_voltages(sc):
        console.print(f"notice: {note}", markup=False, soft_wrap=True)
    text = caution_text(scenario_voltages(sc))
    if text:
        from rich.markup import escape
        from rich.panel import Panel
        console.print(Panel(escape(text), title=CAUTION_TITLE, border_style="bold yellow", expand=False, width=min(console.width, 100)))


def _json_text(obj) -> str:
    """What a --json option prints: strict JSON, a non-finite number as null (the run folder's
    contract, hilrig.runtime.recording)."""
    from hilrig.runtime.recording import dumps_json  # h5py: only when needed
    return dumps_json(obj, indent=2)


def _finite(v) -> bool:
    return isinstance(v, (int, float)) and math.isfinite(v)


def _num(v, spec: str) -> str:
    """A number for a table cell; "n/a" for one that has no finite value (null in summary.json,
    NaN or inf in a summary still in memory)."""
    return format(v, spec) if _finite(v) else "n/a"


def _timing_not_met(s: dict) -> bool:
    """A paced run whose timing verdict says its limits were breached."""
    v = (s.get("paced") or {}).get("verdict")
    return bool(v) and not v.get("timing_met", True)


def _summary_table(console, s: dict, folder: Path | None) -> None:
    from rich.markup import escape
    from rich.table import Table
    m = s["metrics"]
    tm = s["timing"]
    t = Table(title=escape((s.get("title") or "run") + ("  [demo data]" if s.get("demo_data") else "")),
              show_header=True, header_style="bold", title_justify="left")
    t.add_column("quantity", no_wrap=True)
    t.add_column("value", justify="right")
    t.add_row("plant / controller / reference", f"{s['plant']} / {s['controller']} / {s['reference']}")
    t.add_row(escape("simulated [s]"), f"{s['simulated_s']:.4g} of {s['ticks_planned'] * s['Ts_s']:.4g}  ({s['ticks_run']} ticks at {s['Ts_s'] * 1e6:.4g} us)")
    outcome = "completed" if s["completed"] else f"ended: {s['end_event'] or 'interrupted'}"
    if _timing_not_met(s):
        outcome = "timing not met" if s["completed"] else f"{outcome}; timing not met"
    t.add_row("outcome", outcome)
    tr = s["trip"]
    t.add_row("trip", "none" if not tr else f"{tr['cause']} at t = {tr['time_s']:.6g} s (tick {tr['tick']}), value {_num(tr.get('value'), '.6g')}")
    t.add_row(escape("RMS tracking error [V]"), _num(m["rms_error_V"], ".4g"))
    t.add_row(escape("max |v_ref - v_out| [V]"), _num(m["max_abs_error_V"], ".4g") + (
        f" at t = {_num(m['time_of_max_abs_error_s'], '.6g')} s" if _finite(m["max_abs_error_V"]) else ""))
    t.add_row(escape("IAE [V s]"), _num(m["iae_Vs"], ".4g"))
    t.add_row(escape("v_out range [V]"), f"{_num(m['v_out_min_V'], '.5g')} .. {_num(m['v_out_max_V'], '.5g')}")
    t.add_row(escape("time in saturation [s]"), _num(m["saturation_time_s"], ".4g"))
    if m.get("nonfinite_samples"):
        t.add_row("non-finite samples", f"{m['nonfinite_samples']} ticks (left out of the metrics above)")
    tps = tm.get("ticks_per_s")
    t.add_row(escape("loop speed [ticks/s]"), f"{tps:,.0f}  ({tm['loop_ns_per_tick']:.0f} ns per tick)" if tps else "-")
    t.add_row(escape("faster than real time [x]"), f"{tm['realtime_factor']:.1f}" if tm.get("realtime_factor") else "-")
    t.add_row(escape("compile or cache load [s]"), f"{tm['compile_or_load_s']:.2f}" + (" (compiled now)" if tm.get("compiled_now") else " (from cache)"))
    pc = s.get("paced")
    if pc:
        la, co = pc["lateness_us"], pc["compute_us"]
        t.add_row(escape("paced: lateness p50 / p99 / max [us]"), f"{la['p50']:.1f} / {la['p99']:.1f} / {la['max']:.0f}")
        t.add_row(escape("paced: compute p50 / p99 / max [us]"), f"{co['p50']:.1f} / {co['p99']:.1f} / {co['max']:.0f}")
        t.add_row("paced: late ticks / deadline misses", f"{pc['late_ticks']} / {pc['deadline_misses']} of {la['n']}")
        from hilrig.runtime.paced import realtime_text, verdict_text
        if pc.get("verdict"):
            t.add_row("paced: timing", escape(verdict_text(pc["verdict"])),
                      style=None if pc["verdict"]["timing_met"] else "bold red")
        if pc.get("realtime"):
            t.add_row("paced: real-time requests", escape(realtime_text(pc["realtime"], pc.get("pinned_core"))))
    if folder is not None:
        t.add_row("run folder", str(folder))
    console.print(t)


def _view_args(p, remote: bool = True) -> None:
    p.add_argument("--no-view", action="store_true",
                   help="do not start the live view (it starts by itself on a terminal)")
    where = "loopback unless --allow-remote" if remote else "loopback only"
    p.add_argument("--telemetry", metavar="ADDRESS",
                   help="publish live telemetry at ADDRESS for 'hilrig watch' viewers "
                        f"(tcp://127.0.0.1:PORT or ipc:///PATH; {where})")


def _no_realtime_arg(p) -> None:
    p.add_argument("--no-realtime", action="store_true",
                   help="paced runs: do not ask the system for a real-time priority and locked "
                        "memory (as paced.realtime = false)")


def _catch_ctrl_c() -> None:
    """Ctrl-C ends the run in order at the next chunk (the recording closed, marked not
    complete); a second Ctrl-C interrupts at once."""
    import signal

    from hilrig.runtime.run import INTERRUPTED
    INTERRUPTED.clear()

    def handler(signum, frame):
        if INTERRUPTED.is_set():
            raise KeyboardInterrupt
        INTERRUPTED.set()
    try:
        signal.signal(signal.SIGINT, handler)
    except ValueError:  # not the main thread (e.g. called from a test harness)
        pass


def _wants_view(args, plain: bool) -> bool:
    """The live view starts by itself on a terminal, unless --no-view or plain output."""
    return not args.no_view and not plain and sys.stdout.isatty() and sys.stdin.isatty()


def _check_hv_acknowledged(sc, address: str, ack_hv: bool, allow_remote: bool) -> None:
    """A bridge to another machine at hazardous voltage needs the explicit acknowledgement."""
    from hilrig.bridge.transport import _is_loopback, check_address
    check_address(address, allow_remote)  # the --allow-remote message comes first
    from hilrig.safety.caution import hazardous_voltages, scenario_voltages
    hv = hazardous_voltages(scenario_voltages(sc))
    if hv and not _is_loopback(address) and not ack_hv:
        raise ValueError(
            f"the bridge address {address} is not on this machine and the scenario configures "
            f"voltages above 60 V DC ({hv[0][0]} = {hv[0][1]:g} V). The far end may drive real "
            f"equipment: confirm that hardware protection and isolation are in place and that "
            f"the work follows local codes and licensed practice, then pass "
            f"--acknowledge-high-voltage. hilrig's interlocks are monitoring functions, not "
            f"safety-rated functions.")


def _run(console, plain, scenario_path: Path, out: str | None, overwrite: bool, sets: list[str],
         bridge: str | None = None, mode: str = "lockstep", timeout: float = 2.0,
         allow_remote: bool = False, curve_keys: str | None = None, ack_hv: bool = False,
         paced: bool = False, view: bool = False, telemetry: str | None = None,
         realtime: bool = True):
    from hilrig.runtime.plots import overview_png
    from hilrig.runtime.recording import open_run
    from hilrig.runtime.run import run_scenario
    from hilrig.runtime.scenario import load_scenario

    sc = load_scenario(scenario_path, overrides=_overrides(sets))
    _show_caution(console, sc)
    if bridge:
        _check_hv_acknowledged(sc, bridge, ack_hv, allow_remote)
    _catch_ctrl_c()
    viewer = None
    tmpdir = None
    if view and not telemetry:
        import tempfile
        tmpdir = tempfile.mkdtemp(prefix="hilrig-view-")
        telemetry = f"ipc://{tmpdir}/telemetry"
    if telemetry:
        from hilrig.bridge.transport import check_address
        check_address(telemetry, allow_remote)
    prog = _Progress(console, plain or view)
    if view:
        import subprocess
        # the viewer owns the terminal while the run lasts; this process stays quiet
        viewer = subprocess.Popen([sys.executable, "-m", "hilrig.runtime.cli", "watch", telemetry,
                                   "--exit-when-done"])
        from hilrig.runtime import telemetry as _tel
        _tel.WAIT_FOR_VIEWER_S = 10.0  # the run starts once the viewer is there (or after 10 s)
        prog = _Progress(console, True, quiet=True)
    try:
        if bridge:
            from hilrig.bridge.session import run_bridge
            res = run_bridge(sc, bridge, Path(out) if out else None, mode=mode, timeout_s=timeout,
                             allow_remote=allow_remote, overwrite=overwrite, progress=prog,
                             curve_keys=Path(curve_keys) if curve_keys else None,
                             notice=None if view else (lambda msg: console.print(msg)),
                             telemetry=telemetry)
        elif paced or sc.mode == "paced":
            from hilrig.runtime.paced import run_paced
            # no progress bar: its redraws would compete with the loop for this process
            res = run_paced(sc, Path(out) if out else None, overwrite=overwrite,
                            notice=None if view else (lambda msg: console.print(msg)),
                            telemetry=telemetry, allow_remote=allow_remote,
                            realtime=None if realtime else False)
        else:
            res = run_scenario(sc, Path(out) if out else None, overwrite=overwrite, progress=prog,
                               notice=None if view else (lambda msg: console.print(msg)),
                               telemetry=telemetry, allow_remote=allow_remote)
    finally:
        prog.close()
        if viewer is not None:
            try:
                viewer.wait(timeout=10)
            except subprocess.TimeoutExpired:
                viewer.terminate()
                viewer.wait(timeout=10)
        if tmpdir:
            import shutil
            shutil.rmtree(tmpdir, ignore_errors=True)
    try:
        overview_png(open_run(res.folder), res.folder / "overview.png")
    except ImportError:
        console.print("(matplotlib is not installed: no overview.png)")
    _summary_table(console, res.summary, res.folder)
    return res


def _overrides(sets: list[str]) -> dict:
    out = {}
    for item in sets:
        if "=" not in item:
            raise ValueError(f"--set {item!r}: write KEY=VALUE, e.g. --set timing.duration='0.5 s'")
        k, v = item.split("=", 1)
        out[k.strip()] = _literal(v.strip())
    return out


def _compare(console, args) -> None:
    import datetime as _dt
    from rich.markup import escape
    from rich.table import Table

    from hilrig.runtime.compare import compare, json_view
    from hilrig.runtime.scenario import load_scenario

    names = [c.strip() for c in args.controllers.split(",") if c.strip()]
    out = Path(args.out) if args.out else Path("runs") / (
        _dt.datetime.now().strftime("%Y%m%d-%H%M%S") + "-compare")
    overrides = _overrides(args.set)
    if not args.json:
        _show_caution(console, load_scenario(args.scenario, overrides=overrides))
    results = compare(Path(args.scenario), names, out, overwrite=args.overwrite,
                      overrides=overrides,
                      notice=None if args.json else (lambda m: console.print(m)),
                      on_run=None if args.json else (lambda n: console.print(f"running {n} ...")))
    if args.json:
        print(_json_text(json_view(results)))
        return

    def f(v, scale=1.0, fmt="{:.3g}"):
        return "-" if v is None or (isinstance(v, float) and not math.isfinite(v)) else fmt.format(v * scale)

    from rich import box
    cols = [("rise [ms]", "rise_time_s", 1e3, "{:.3g}"), ("settle [ms]", "settling_time_s", 1e3, "{:.3g}"),
            ("overshoot [%]", "overshoot_pct", 1.0, "{:.3g}"), ("ss error [V]", "steady_state_error_V", 1.0, "{:.2g}"),
            ("IAE [V s]", "iae_Vs", 1.0, "{:.3g}"), ("RMS e [V]", "rms_error_V", 1.0, "{:.3g}"),
            ("max |e| [V]", "max_abs_error_V", 1.0, "{:.3g}"), ("saturated [ms]", "saturation_time_s", 1e3, "{:.3g}"),
            ("trips", "trips", 1.0, "{:.0f}"), ("loop [ns/tick]", "compute_ns_per_tick", 1.0, "{:.0f}")]
    from hilrig.runtime.compare import folder_name
    labels = {name: folder_name(name) for name in results}

    def outcome(r):
        return "ok" if r["outcome"] == "completed" else r["outcome"]

    title = escape(f"controller comparison: {args.scenario}")
    if console.width >= 110:  # rows: controllers
        t = Table(title=title, title_justify="left", header_style="bold", box=box.SIMPLE_HEAD)
        t.add_column("controller", no_wrap=True)
        for head, *_ in cols:
            t.add_column(escape(head.replace(" [", "\n[")), justify="right")
        t.add_column("outcome")
        for name, r in results.items():
            t.add_row(escape(labels[name]), *[f(r[k], sc, fm) for _, k, sc, fm in cols], escape(outcome(r)))
    else:  # narrow terminal: rows are the metrics, one column per controller
        t = Table(title=title, title_justify="left", header_style="bold", box=box.SIMPLE_HEAD)
        t.add_column("metric", no_wrap=True)
        for name in results:
            t.add_column(escape(labels[name]), justify="right")
        for head, k, sc, fm in cols:
            t.add_row(escape(head), *[f(results[n][k], sc, fm) for n in results])
        t.add_row("outcome", *[escape(outcome(results[n])) for n in results])
    console.print(t)
    console.print("rise, settle, overshoot and ss error: of the largest reference step of the run "
                  "(10-90 % rise, 2 % settling band). Plots and run folders: " + escape(str(out)))


def _envelope(console, args, plain: bool) -> None:
    import datetime as _dt

    from rich.markup import escape

    from hilrig.runtime import envelope as env
    from hilrig.runtime.scenario import load_scenario
    from hilrig.runtime.units import parse_quantity

    names = [c.strip() for c in args.controllers.split(",") if c.strip()]
    if not names:
        raise ValueError("--controllers: name at least one controller")
    grid = env.Grid.parse(args.v_range, args.p_range, args.grid)
    if not 0.0 < args.tolerance < 100.0:
        raise ValueError(f"--tolerance {args.tolerance:g} %: expected a value in (0, 100)")
    path = Path(args.scenario)
    sc = load_scenario(path)  # validates the file once, with its own messages
    for c in names:  # and every candidate before anything runs
        load_scenario(path, overrides=env._controller_override(sc.text, c))
    v_start = parse_quantity(args.v_start, "V", "--v-start") if args.v_start else None
    out = Path(args.out) if args.out else Path("runs") / (
        _dt.datetime.now().strftime("%Y%m%d-%H%M%S") + "-envelope")
    if (out / "envelope.csv").exists():
        raise FileExistsError(f"{out / 'envelope.csv'} exists; choose another --out (nothing was overwritten)")
    if not args.json:
        _show_caution(console, sc)
        console.print(f"{len(names)} controller(s) x {len(grid.v)} x {len(grid.p)} operating points"
                      + (f" on the Dask cluster at {args.cluster}" if args.cluster else " on local processes"))
    tasks = env.tasks_for(sc.text, path.name, names, grid, tol_pct=args.tolerance, v_start=v_start)
    if not args.cluster:
        if not args.json:
            console.print("preparing the compiled loops (a first compile takes a few seconds per controller) ...")
        env.warm_up(tasks)
    prog = None if args.json else _Progress(console, plain, unit="grid rows")
    t0 = time.perf_counter()
    try:
        results = env.run_envelope(tasks, cluster=args.cluster, workers=args.workers, progress=prog)
    finally:
        if prog:
            prog.close()
    wall = time.perf_counter() - t0
    rows = env.table(tasks, results)
    out.mkdir(parents=True, exist_ok=True)
    env.write_csv(rows, out / "envelope.csv")
    try:
        env.heat_map_png(rows, out / "envelope.png", title=f"{sc.title or path.name}: tracking within "
                         f"{args.tolerance:g} % (SIL, {sc.plant.plugin.name})")
    except ImportError:
        pass
    cnt = env.counts(rows)
    if args.json:
        print(_json_text(cnt))
        return
    for c in names:
        console.print(f"[bold]{escape(c)}[/bold]  " + "  ".join(f"{o} {n}" for o, n in cnt[c].items()))
        for line in env.text_map(rows, c):
            console.print(escape(line), highlight=False)
    console.print("map: " + "  ".join(f"{sym} {o}" for o, sym in env.SYMBOLS.items()))
    console.print(f"{len(rows)} points in {wall:.1f} s; wrote {escape(str(out / 'envelope.csv'))} "
                  f"and {escape(str(out / 'envelope.png'))}")


def _literal(text: str):
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="hilrig", description=(
        "Trial battery-emulator voltage controllers in a deterministic fixed-step loop: SIL "
        "against an embedded plant model, soft-HIL against an external simulator over a "
        "socket (--bridge), paced timing rehearsals, interlock test suites."))
    ap.add_argument("--version", action="version", version=f"hilrig {installed_version()}")
    sub = ap.add_subparsers(dest="cmd", required=True, metavar="COMMAND")
    p = sub.add_parser("demo", help="run the shipped demo scenario (invented demo data)")
    p.add_argument("--paced", action="store_true",
                   help="paced mode: one tick per tick period of the wall clock")
    _no_realtime_arg(p)
    _view_args(p, remote=False)
    p.add_argument("--out", help="run folder to write (default: runs/<time>-demo)")
    p.add_argument("--headless", action="store_true", help="plain text output, no progress bar or colours")
    p.add_argument("--overwrite", action="store_true", help="replace a recording already in --out")
    p = sub.add_parser("run", help="run a scenario file")
    p.add_argument("scenario", help="scenario TOML file")
    p.add_argument("--out", help="run folder to write (default: runs/<time>-<scenario>)")
    p.add_argument("--headless", action="store_true", help="plain text output, no progress bar or colours")
    p.add_argument("--overwrite", action="store_true", help="replace a recording already in --out")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override a scenario value, e.g. --set 'timing.duration=\"0.2 s\"' (repeatable)")
    p.add_argument("--bridge", metavar="ADDRESS",
                   help="run against an external simulator at ADDRESS (tcp://127.0.0.1:PORT, ipc:///PATH or udp://HOST:PORT) instead of the embedded plant")
    p.add_argument("--mode", default="lockstep", choices=["lockstep", "free-running"],
                   help="bridge mode (default lockstep)")
    p.add_argument("--timeout", type=float, default=2.0, metavar="S", help="bridge reply timeout [s] (default 2)")
    p.add_argument("--allow-remote", action="store_true",
                   help="allow a bridge address that is not on this machine (you take responsibility for the network)")
    p.add_argument("--curve-keys", metavar="DIR", help="CurveZMQ keys folder (hilrig keys DIR); required for a remote ZeroMQ peer")
    p.add_argument("--paced", action="store_true",
                   help="paced mode: one tick per tick period of the wall clock (timing rehearsal)")
    _no_realtime_arg(p)
    _view_args(p)
    p.add_argument("--acknowledge-high-voltage", action="store_true",
                   help="required for a bridge to another machine when the scenario exceeds 60 V DC: "
                        "you confirm hardware protection, isolation and local codes are in place")
    p = sub.add_parser("interlock-test", help="run an interlock test suite: cases of scenario, fault and expected trip")
    p.add_argument("suite", help="suite TOML file (see examples/interlock_suite.toml)")
    p.add_argument("--out", help="folder for the cases' run folders and results.json (default: runs/<time>-<suite>)")
    p.add_argument("--junit", metavar="FILE", help="also write the results as JUnit XML")
    p.add_argument("--workers", type=int, help="parallel worker processes for SIL cases (default: all cores)")
    p.add_argument("--headless", action="store_true", help="plain text output")
    p = sub.add_parser("watch", help="the live view of a run that publishes telemetry")
    p.add_argument("address", nargs="?", default=None,
                   help="the run's telemetry address (default tcp://127.0.0.1:47820)")
    p.add_argument("--plain", action="store_true", help="plain lines, one a second, no screen")
    p.add_argument("--exit-when-done", action="store_true", help="close when the run has ended")
    p.add_argument("--give-up", type=float, metavar="S",
                   help="close after S seconds without telemetry (default: keep waiting)")
    p.add_argument("--allow-remote", action="store_true",
                   help="allow an address that is not on this machine")
    p = sub.add_parser("keys", help="make CurveZMQ key pairs for a bridge between two machines")
    p.add_argument("folder", help="folder to write simulator.key[_secret] and runtime.key[_secret]")
    p = sub.add_parser("serve-sim", help="serve the stand-in simulator: the scenario's plant over the bridge protocol")
    p.add_argument("--scenario", required=True, help="scenario whose plant, load profile and timing to simulate")
    p.add_argument("--bind", default="tcp://127.0.0.1:47810", metavar="ADDRESS",
                   help="address to listen on (default tcp://127.0.0.1:47810)")
    p.add_argument("--sessions", type=int, metavar="N", help="stop after N sessions (default: serve until interrupted)")
    p.add_argument("--mode", default="lockstep", choices=["lockstep", "free-running"],
                   help="lockstep: advance one tick per actuation; free-running: on the simulator's own clock")
    p.add_argument("--idle-timeout", type=float, metavar="S", help="stop when nothing arrives for S seconds")
    p.add_argument("--allow-remote", action="store_true", help="allow binding to a non-loopback address")
    p.add_argument("--curve-keys", metavar="DIR", help="CurveZMQ keys folder; only runtimes whose public key is there get in")
    p.add_argument("--drop", type=float, default=0.0, metavar="FRACTION",
                   help="fault injection: drop this fraction of replies (udp:// only)")
    p.add_argument("--delay", type=float, default=0.0, metavar="S", help="fault injection: delay every reply")
    p.add_argument("--jitter", type=float, default=0.0, metavar="S", help="fault injection: plus up to this random delay")
    p.add_argument("--freeze-after", type=int, metavar="N", help="fault injection: stop answering from tick N on")
    p.add_argument("--corrupt-every", type=int, metavar="N", help="fault injection: mangle every N-th reply")
    p.add_argument("--disconnect-after", type=int, metavar="N", help="fault injection: close the connection at tick N")
    p.add_argument("--fault-seed", type=int, default=0, metavar="SEED", help="seed of the fault injection")
    p.add_argument("--commands", action="store_true",
                   help="read fault commands from standard input while serving, one per line: "
                        "freeze, disconnect, drop FRACTION, delay S, jitter S, corrupt N, clear")
    p = sub.add_parser("compare", help="run one scenario with several controllers side by side")
    p.add_argument("scenario", help="scenario TOML file")
    p.add_argument("--controllers", required=True, metavar="A,B,...",
                   help="comma-separated controller plugin names or .py paths")
    p.add_argument("--out", help="folder for the candidates' run folders and plots (default: runs/<time>-compare)")
    p.add_argument("--json", action="store_true", help="print the metrics as JSON")
    p.add_argument("--overwrite", action="store_true", help="replace recordings already in --out")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override a scenario value for every candidate (repeatable)")
    p = sub.add_parser("envelope", help="map where each controller keeps tracking (voltage x load power)")
    p.add_argument("scenario", help="scenario TOML file (plant, controller settings, shaping, interlocks, timing)")
    p.add_argument("--controllers", required=True, metavar="A,B,...",
                   help="comma-separated controller plugin names or .py paths")
    p.add_argument("--v-range", default="50:600", metavar="LOW:HIGH", help="target voltages [V] (default 50:600)")
    p.add_argument("--p-range", default="0:150e3", metavar="LOW:HIGH", help="constant load powers [W] (default 0:150e3)")
    p.add_argument("--grid", default="25x25", metavar="NVxNP", help="points per axis (default 25x25)")
    p.add_argument("--tolerance", type=float, default=2.0, metavar="PCT",
                   help="tracking band in %% of the target voltage (default 2)")
    p.add_argument("--v-start", metavar="V", help="start voltage (default: the scenario's start)")
    p.add_argument("--out", help="folder for envelope.csv and the heat map (default: runs/<time>-envelope)")
    p.add_argument("--json", action="store_true", help="print per-controller outcome counts as JSON")
    p.add_argument("--cluster", metavar="ADDRESS", help="run on a Dask distributed scheduler instead of local processes")
    p.add_argument("--workers", type=int, help="local worker processes (default: all cores)")
    p = sub.add_parser("report", help="write a lab report of a run folder (report.md with plots)")
    p.add_argument("run", help="run folder")
    p.add_argument("--json", action="store_true", help="print summary.json (writes nothing)")
    p.add_argument("--out", help="report file to write (default: RUN/report.md)")
    p = sub.add_parser("plugins", help="list installed plugins with their parameters")
    p.add_argument("--json", action="store_true", help="machine-readable list")
    p = sub.add_parser("export", help="export a run's recording")
    p.add_argument("run", help="run folder")
    fmt = p.add_mutually_exclusive_group(required=True)
    fmt.add_argument("--csv", action="store_true", help="write recording.csv")
    fmt.add_argument("--mf4", action="store_true",
                     help="write recording.mf4 (ASAM MDF 4; needs the optional package asammdf)")
    p.add_argument("--out", help="file to write (default: RUN/recording.csv or RUN/recording.mf4)")
    args = ap.parse_args(argv)

    plain = getattr(args, "headless", False) or getattr(args, "json", False)
    console = _console(plain)
    from hilrig.runtime.errors import PluginError, RecordingError, ScenarioError, UnitError
    from hilrig.safety.errors import InterlockConfigError
    try:
        from hilrig.bridge.errors import BridgeError
    except ImportError:  # pragma: no cover - the bridge package is part of hilrig
        BridgeError = ValueError
    try:
        if args.cmd == "demo":
            console.print("hilrig demo: invented demo data, not measurements of real equipment.")
            res = _run(console, plain, _demo_path(), args.out, args.overwrite, [],
                       paced=args.paced, view=_wants_view(args, plain), telemetry=args.telemetry,
                       realtime=not args.no_realtime)
            if _timing_not_met(res.summary):
                return EXIT_TIMING_NOT_MET
        elif args.cmd == "run":
            res = _run(console, plain, Path(args.scenario), args.out, args.overwrite, args.set,
                       bridge=args.bridge, mode=args.mode, timeout=args.timeout,
                       allow_remote=args.allow_remote, curve_keys=args.curve_keys,
                       ack_hv=args.acknowledge_high_voltage, paced=args.paced,
                       view=_wants_view(args, plain), telemetry=args.telemetry,
                       realtime=not args.no_realtime)
            if _timing_not_met(res.summary):
                return EXIT_TIMING_NOT_MET
        elif args.cmd == "watch":
            from hilrig.bridge.transport import check_address
            from hilrig.runtime.telemetry import DEFAULT_ADDRESS
            from hilrig.runtime.watch import watch
            address = args.address or DEFAULT_ADDRESS
            check_address(address, args.allow_remote)
            return watch(address, plain=args.plain, exit_when_done=args.exit_when_done,
                         give_up_s=args.give_up)
        elif args.cmd == "interlock-test":
            return _interlock_test(console, args)
        elif args.cmd == "keys":
            from hilrig.bridge.keys import generate
            for f in generate(Path(args.folder)):
                console.print(f"wrote {f}", markup=False)
            console.print("Keep the *.key_secret files private: the simulator side needs "
                          "simulator.key_secret and runtime.key; the runtime side runtime.key_secret "
                          "and simulator.key.")
        elif args.cmd == "serve-sim":
            from hilrig.bridge.standin import Faults, serve
            from hilrig.runtime.scenario import load_scenario
            faults = Faults(drop=args.drop, delay_s=args.delay, jitter_s=args.jitter,
                            freeze_after=args.freeze_after, corrupt_every=args.corrupt_every,
                            seed=args.fault_seed, disconnect_after=args.disconnect_after)
            sc = load_scenario(args.scenario)
            _show_caution(console, sc)
            if args.mode == "free-running":
                from hilrig.bridge.standin import serve_free_running
                serve_free_running(sc, args.bind, sessions=args.sessions,
                                   idle_timeout_s=args.idle_timeout, faults=faults,
                                   allow_remote=args.allow_remote, curve_keys=args.curve_keys,
                                   commands=sys.stdin if args.commands else None,
                                   log=lambda m: console.print(m, markup=False))
                return 0
            serve(sc, args.bind, sessions=args.sessions, allow_remote=args.allow_remote,
                  idle_timeout_s=args.idle_timeout, faults=faults, curve_keys=args.curve_keys,
                  commands=sys.stdin if args.commands else None,
                  log=lambda m: console.print(m, markup=False))
        elif args.cmd == "compare":
            _compare(console, args)
        elif args.cmd == "envelope":
            _envelope(console, args, plain)
        elif args.cmd == "report":
            from hilrig.runtime.recording import open_run
            run = open_run(args.run)
            if not run.summary:
                raise RecordingError(f"{args.run}: no summary.json (the run did not finish)")
            if args.json:
                print(_json_text(run.summary))
            else:
                from hilrig.runtime.report import write_report
                _summary_table(console, run.summary, run.folder)
                for ev in run.summary.get("events", []):
                    console.print(f"event: {ev}")
                dest = write_report(run, Path(args.out) if args.out else None)
                console.print(f"wrote {dest}", markup=False)
        elif args.cmd == "plugins":
            from hilrig.runtime.registry import all_plugins
            items = [p.declaration.describe() for p in all_plugins()]
            if args.json:
                print(_json_text(items))
            else:
                _plugins_table(console, items)
        elif args.cmd == "export":
            from hilrig.runtime.recording import export_csv, open_run
            run = open_run(args.run)
            ext = "mf4" if args.mf4 else "csv"
            default = run.folder / f"recording.{ext}"
            dest = Path(args.out) if args.out else default
            if dest.exists() and dest.resolve() != default.resolve():
                raise FileExistsError(f"{dest} exists; choose another --out (nothing was overwritten)")
            if args.mf4:
                from hilrig.runtime.report import export_mdf4
                export_mdf4(run, dest)
                console.print(f"wrote {dest} (ASAM MDF 4, {len(run.signals)} channels, "
                              f"{run.time.shape[0]} samples)")
            else:
                export_csv(run, dest)
                console.print(f"wrote {dest} ({run.time.shape[0]} rows, {len(run.signals) + 1} columns)")
    except (ScenarioError, PluginError, RecordingError, UnitError, InterlockConfigError,
            FileExistsError, ValueError, BridgeError) as exc:
        console.print(f"error: {exc}", markup=False, soft_wrap=True)
        return EXIT_USAGE
    except KeyboardInterrupt:
        console.print("interrupted: the recording is kept up to its last flushed chunk")
        return EXIT_INTERRUPTED
    return 0


def _interlock_test(console, args) -> int:
    import datetime as _dt
    from rich.markup import escape
    from rich.table import Table

    from hilrig.safety.caution import CAUTION_TITLE
    from hilrig.safety.suite import junit_xml, latency_text, load_suite, run_suite
    suite = load_suite(args.suite)
    out = Path(args.out) if args.out else Path("runs") / (
        _dt.datetime.now().strftime("%Y%m%d-%H%M%S") + "-" + Path(args.suite).stem)
    if (out / "results.json").exists():
        raise FileExistsError(f"{out} already holds suite results; choose another --out "
                              f"(nothing was overwritten)")
    from rich.panel import Panel
    console.print(Panel("Interlock test cases prove what hilrig's software interlocks do in "
                        "simulation. They are monitoring functions, not safety-rated functions "
                        "(IEC 61508, ISO 13849); hardware protection and isolation must stay in "
                        "place, and local codes and licensed practice govern real equipment.",
                        title=CAUTION_TITLE, border_style="bold yellow", expand=False,
                        width=min(console.width, 100)))
    n_bridge = sum(c.bridge is not None for c in suite.cases)
    console.print(f"{suite.title}{'  [demo data]' if suite.demo_data else ''}: "
                  f"{len(suite.cases)} cases ({len(suite.cases) - n_bridge} SIL in parallel, "
                  f"{n_bridge} bridge one at a time) -> {out}", markup=False)

    def progress(r, done, total):
        mark = "pass" if r.passed else "FAIL"
        console.print(f"[{done}/{total}] {mark}  {r.name}  ({r.outcome}; {latency_text(r)})",
                      markup=False)

    results = run_suite(suite, out, workers=args.workers, progress=progress)
    t = Table(title=escape(suite.title), header_style="bold", title_justify="left")
    for col in ("case", "expected", "got", "trip latency", "result"):
        t.add_column(col)
    for c, r in zip(suite.cases, results):
        exp = c.expect if c.expect == "no trip" else f"trip: {c.cause or 'any'}"
        res = "pass" if r.passed else "FAIL: " + "; ".join(r.reasons)
        t.add_row(escape(r.name), escape(exp), escape(r.outcome), latency_text(r),
                  escape(res), style=None if r.passed else "bold red")
    console.print(t)
    failed = sum(not r.passed for r in results)
    if args.junit:
        Path(args.junit).parent.mkdir(parents=True, exist_ok=True)
        Path(args.junit).write_text(junit_xml(suite, results))
        console.print(f"wrote {args.junit}", markup=False)
    console.print(f"{len(results) - failed} passed, {failed} failed; results in "
                  f"{out / 'results.json'}", markup=False)
    return 1 if failed else 0


def _plugins_table(console, items: list[dict]) -> None:
    from rich.markup import escape
    from rich.table import Table
    for it in items:
        t = Table(title=f"{it['kind']}: {it['name']} - {it['summary']}", title_justify="left",
                  header_style="bold")
        for col in ("parameter", "unit", "default", "min", "max", "description"):
            t.add_column(col)
        for p in it["params"]:
            dflt = p["default"]
            dtxt = (f"{dflt:g}" if isinstance(dflt, (int, float)) else dflt if isinstance(dflt, str)
                    else f"{len(dflt)} rows")
            t.add_row(escape(p["name"]), escape(p["unit"]), dtxt, "" if p["min"] is None else f"{p['min']:g}",
                      "" if p["max"] is None else f"{p['max']:g}", escape(p["description"]))
        console.print(t)
        if it.get("reads"):
            console.print(f"  reads: {', '.join(it['reads'])}")
        if it.get("source"):
            console.print(f"  method: {it['source']}")


if __name__ == "__main__":
    sys.exit(main())
