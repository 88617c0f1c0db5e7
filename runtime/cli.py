"""The ``hilrig`` command line: demo, run, report, plugins, export.

User mistakes (a bad scenario, a missing run folder) print one message naming the file, key and
value and exit with status 2; they never print a traceback. Nothing recorded is overwritten.
A run's exit status follows its outcome (:mod:`hilrig.runtime.outcome`): 0 completed, 1 the run
did not complete (tripped, integration error, collapsed, stopped, ended on an error of the link,
out of band, oscillating), 3 a
paced run that did not hold its ``[paced]`` timing limits (``EXIT_TIMING_NOT_MET``), so that a
script or a lab's CI can gate on it; 2 is a usage mistake, 130 an interruption.
"""
from __future__ import annotations

import argparse
import math
import sys
import time
from importlib.resources import files
from pathlib import Path

from hilrig.runtime.version import installed as installed_version

#: a run that ran but did not complete: tripped, collapsed, stopped or ended early
EXIT_NOT_COMPLETED = 1
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


def _show_caution(console, sc, notes: list[str] | None = None) -> None:
    """The notices of voltages the plant cannot reach (``notes``, or the scenario's own) and
    the high-voltage caution."""
    from hilrig.safety.caution import (NOTICE_STYLE, WARNING_TITLE, caution_text,
                                       scenario_voltages, unreachable_voltages)
    for note in unreachable_voltages(sc) if notes is None else notes:
        console.print(f"notice: {note}", markup=False, soft_wrap=True)
    text = caution_text(scenario_voltages(sc))
    if text:
        from rich.markup import escape
        from rich.panel import Panel
        console.print(Panel(escape(text), title=WARNING_TITLE, border_style=NOTICE_STYLE, expand=False, width=min(console.width, 100)))


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


def _run_status(s: dict) -> int:
    """The exit status of a run from its outcome: 0 completed, 3 timing not met (and nothing
    worse), 1 any other run that did not complete (out of band and oscillating too)."""
    from hilrig.runtime.outcome import judge
    oc = judge(s)
    if oc["completed"]:
        return 0
    return EXIT_TIMING_NOT_MET if oc["status"] == "timing not met" else EXIT_NOT_COMPLETED


def _band_text(tr) -> str | None:
    """The band check's rule and result in a line (None for a summary without one)."""
    if not isinstance(tr, dict) or not _finite(tr.get("band_rel")):
        return None
    rule = (f"{tr['band_rel'] * 100:g} % of |v_ref_raw|, at least {_num(tr.get('band_floor_V'), 'g')} V, "
            f"from {_num((tr.get('settle_delay_s') or 0) * 1e3, 'g')} ms after each change")
    if not tr.get("windows"):
        return f"{rule}: no settled window to check"
    run = tr.get("out_of_band_run") or {}
    if tr.get("oscillating"):
        res = "oscillating"
    elif tr.get("out_of_band"):
        res = "left it"
    else:
        res = "inside"
    longest = (f"; longest time outside {_num((run.get('duration_s') or 0) * 1e3, '.3g')} ms "
               f"(limit {_num((tr.get('out_of_band_limit_s') or 0) * 1e3, 'g')} ms)" if run else "")
    return f"{res} ({rule}{longest})"


def _summary_table(console, s: dict, folder: Path | None) -> None:
    from rich.markup import escape
    from rich.table import Table

    from hilrig.runtime.outcome import coverage_text, judge
    m = s["metrics"]
    tm = s["timing"]
    t = Table(title=escape((s.get("title") or "run") + ("  [demo data]" if s.get("demo_data") else "")),
              show_header=True, header_style="bold", title_justify="left")
    t.add_column("quantity", no_wrap=True)
    t.add_column("value", justify="right")
    t.add_row("plant / controller / reference", f"{s['plant']} / {s['controller']} / {s['reference']}")
    t.add_row(escape("simulated [s]"), f"{s['simulated_s']:.4g} of {s['ticks_planned'] * s['Ts_s']:.4g}  ({s['ticks_run']} ticks at {s['Ts_s'] * 1e6:.4g} us)")
    oc = judge(s)
    t.add_row("outcome", escape(oc["text"]))
    if coverage_text(oc):
        t.add_row("metrics cover", f"only the run {coverage_text(oc)} (it ended early)")
    if s.get("metrics_note"):
        t.add_row("metrics", escape("none: " + s["metrics_note"]), style="bold red")
    band = _band_text(s.get("tracking"))
    if band:
        t.add_row("tracking band", escape(band))
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
    from hilrig.runtime.trials.sharing import table_rows as _sharing_rows
    for label, value in _sharing_rows(s.get("sharing")):  # paralleled units
        t.add_row(escape(label), escape(value))
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
        from hilrig.runtime.live.paced import realtime_text, verdict_text
        if pc.get("verdict"):
            t.add_row("paced: timing", escape(verdict_text(pc["verdict"])),
                      style=None if pc["verdict"]["timing_met"] else "bold red")
        if pc.get("realtime"):
            t.add_row("paced: real-time requests", escape(realtime_text(pc["realtime"], pc.get("pinned_core"))))
    if folder is not None:
        t.add_row("run folder", str(folder))
    console.print(t)
    _segments_table(console, s.get("segments") or [], s.get("segmentation"))


#: the segment tables' metric columns: heading, kinds that have it, key, scale, format
_SEGMENT_COLS = (("rise/lag [ms]", ("step",), "rise_time_s", 1e3, ".3g"),
                 ("rise/lag [ms]", ("ramp",), "lag_s", 1e3, ".3g"),
                 ("settle [ms]", ("step", "ramp"), "settling_time_s", 1e3, ".3g"),
                 ("overshoot [%]", ("step", "ramp"), "overshoot_pct", 1.0, ".3g"),
                 ("max |e| [V]", ("hold", "ramp"), "max_abs_error_V", 1.0, ".2f"),
                 ("ss error [V]", ("step", "ramp"), "steady_state_error_V", 1.0, ".2f"))
_SEGMENT_HEADS = tuple(dict.fromkeys(c[0] for c in _SEGMENT_COLS))


def _segment_label(i: int, seg: dict) -> list[str]:
    """The cells that say which segment it is: number and kind, times, reference."""
    t0, t1 = seg.get("t_start_s"), seg.get("t_end_s")
    when = _num(t0, ".5g") if seg.get("kind") == "step" else f"{_num(t0, '.5g')}..{_num(t1, '.5g')}"
    v0, v1 = seg.get("v_from_V"), seg.get("v_to_V")
    if seg.get("kind") == "hold":
        lo, hi = seg.get("v_ref_min_V"), seg.get("v_ref_max_V")
        ref = _num(v0, ".4g") if lo == hi else f"{_num(lo, '.4g')}..{_num(hi, '.4g')}"
    else:
        ref = f"{_num(v0, '.4g')}->{_num(v1, '.4g')}"
    return [f"{i} {seg.get('kind')}", when, ref]


def _segment_cells(seg: dict) -> list[str]:
    """The metric cells of one segment ('' where its kind has no such metric)."""
    kind = seg.get("kind")
    cells = dict.fromkeys(_SEGMENT_HEADS, "")
    for head, kinds, k, sc, fm in _SEGMENT_COLS:
        if kind in kinds:
            cells[head] = _num(seg[k] * sc if _finite(seg.get(k)) else None, fm)
    return list(cells.values())


_SEGMENT_NOTE = ("step: 10-90 % rise, 2 % settling, overshoot (python-control step_info); ramp: "
                 "lag of v_out behind the ramp at its end, settling after its end, largest "
                 "|v_ref_raw - v_out| until settled; hold: largest |v_ref_raw - v_out| once the "
                 "previous response settled")


def _segment_table(title: str, label_heads: tuple):
    from rich import box
    from rich.markup import escape
    from rich.table import Table
    t = Table(title=escape(title), title_justify="left", header_style="bold", box=box.SIMPLE_HEAD,
              collapse_padding=True)
    for head in label_heads:
        t.add_column(escape(head), no_wrap=True)
    for head in _SEGMENT_HEADS:
        # one word a line: the table fits an 80-column terminal
        t.add_column(escape(head.replace("overshoot", "over-\nshoot").replace(" ", "\n")),
                     justify="right")
    return t


def _segments_table(console, segments: list, info: dict | None,
                    title: str = "reference segments", note: bool = True) -> None:
    """Every segment of a run's reference with its metrics, one row each."""
    from rich.markup import escape
    if not segments:
        return
    t = _segment_table(title, ("segment", "t [s]", "v_ref [V]"))
    for i, seg in enumerate(segments):
        t.add_row(*[escape(c) for c in _segment_label(i + 1, seg)], *_segment_cells(seg))
    console.print(t)
    for i, seg in enumerate(segments):
        if seg.get("note"):
            console.print(escape(f"  segment {i + 1}: {seg['note']}"))
    if not note:
        return
    text = _SEGMENT_NOTE
    if info:
        left = (info.get("changes_found") or 0) - (info.get("changes_listed") or 0)
        text += (f". Changes of the raw reference above {_num(info.get('threshold_V'), '.3g')} V"
                 " count" + (f"; {left} smaller steps and ramps are not listed" if left else ""))
    console.print(escape(text + "."))


def _compare_segments(console, by_name: dict) -> None:
    """compare's segments: when every controller's reference split the same way (a profile's),
    one table with a row per segment and controller under a list of the segments; else each
    controller's own table (a battery model's reference follows each controller's output)."""
    from rich.markup import escape
    lists = list(by_name.values())
    if not any(lists):
        return

    def shape(segs):
        return [(g.get("kind"), g.get("t_start_s"), g.get("t_end_s")) for g in segs]
    if all(shape(x) == shape(lists[0]) for x in lists):
        console.print("reference segments:")
        for i, seg in enumerate(lists[0]):
            num_kind, when, ref = _segment_label(i + 1, seg)
            console.print(escape(f"  {num_kind}: t {when} s, v_ref {ref} V"))
        t = _segment_table("reference segments, per controller", ("segment", "controller"))
        for i, seg in enumerate(lists[0]):
            for j, (name, segs) in enumerate(by_name.items()):
                t.add_row(escape(_segment_label(i + 1, seg)[0]) if j == 0 else "",
                          escape(str(name)), *_segment_cells(segs[i]),
                          end_section=j == len(by_name) - 1)
        console.print(t)
        for name, segs in by_name.items():
            for i, seg in enumerate(segs):
                if seg.get("note"):
                    console.print(escape(f"  segment {i + 1}, {name}: {seg['note']}"))
    else:
        for name, segs in by_name.items():
            _segments_table(console, segs, None, title=f"reference segments: {name}", note=False)
    console.print(escape(_SEGMENT_NOTE + "."))


def _view_args(p, remote: bool = True) -> None:
    p.add_argument("--no-view", action="store_true",
                   help="do not start the live view (it starts by itself on a terminal)")
    where = "loopback unless --allow-remote" if remote else "loopback only"
    p.add_argument("--telemetry", metavar="ADDRESS",
                   help="publish live telemetry at ADDRESS for 'hilrig watch' viewers "
                        f"(tcp://127.0.0.1:PORT or ipc:///PATH; {where})")
    if remote:
        p.add_argument("--telemetry-keys", metavar="DIR",
                       help="CurveZMQ keys folder (hilrig keys DIR); required for telemetry off "
                            "loopback, whose command socket can stop the run and clear a trip")


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


def _fixed_layout(sc, layout: str | None, address: str | None, mode: str):
    """``--layout [FILE]``: the fixed-layout datagrams' layout (hilrig.bridge.datagram), from
    FILE or, given as ``--layout`` alone, from the scenario's [bridge.layout]; else None."""
    if layout is None:
        return None
    if not address:
        raise ValueError("--layout applies to a bridge run or serve-sim: give --bridge "
                         "udp://HOST:PORT (run) or --bind udp://HOST:PORT (serve-sim)")
    from hilrig.bridge.datagram import check_address, load_layout
    check_address(address)
    lay = load_layout(layout or None, sc)
    lay.require_counters(mode)
    return lay


def _run(console, plain, scenario_path: Path, out: str | None, overwrite: bool, sets: list[str],
         bridge: str | None = None, mode: str = "lockstep", timeout: float = 2.0,
         allow_remote: bool = False, curve_keys: str | None = None, ack_hv: bool = False,
         paced: bool = False, view: bool = False, telemetry: str | None = None,
         realtime: bool = True, telemetry_keys: str | None = None, strict: bool = False,
         layout: str | None = None):
    from hilrig.runtime.trials.plots import overview_png, units_png
    from hilrig.runtime.recording import open_run
    from hilrig.runtime.run import run_scenario
    from hilrig.runtime.scenario import load_scenario

    sc = load_scenario(scenario_path, overrides=_overrides(sets))
    _show_caution(console, sc)
    _stability_check(console, {sc.controller.plugin.name: sc}, strict)
    if bridge:
        _check_hv_acknowledged(sc, bridge, ack_hv, allow_remote)
    fixed = _fixed_layout(sc, layout, bridge, mode)
    _check_disk(console, sc, out, paced=paced or sc.mode == "paced")
    _catch_ctrl_c()
    viewer = None
    tmpdir = None
    if view and not telemetry:
        import tempfile
        tmpdir = tempfile.mkdtemp(prefix="hilrig-view-")
        telemetry = f"ipc://{tmpdir}/telemetry"
    if telemetry:
        from hilrig.runtime.live import telemetry as _tel
        _tel.check_telemetry_address(telemetry, allow_remote, telemetry_keys)
        if telemetry_keys:
            from hilrig.bridge.keys import server_keys
            server_keys(Path(telemetry_keys))  # a missing or unreadable key: said now
            _tel.CURVE_KEYS = Path(telemetry_keys)
    prog = _Progress(console, plain or view)
    if view:
        import subprocess
        # the viewer owns the terminal while the run lasts; this process stays quiet
        viewer = subprocess.Popen([sys.executable, "-m", "hilrig.runtime.cli", "watch", telemetry,
                                   "--exit-when-done"]
                                  + (["--allow-remote"] if allow_remote else [])
                                  + (["--curve-keys", telemetry_keys] if telemetry_keys else []))
        from hilrig.runtime.live import telemetry as _tel
        _tel.WAIT_FOR_VIEWER_S = 10.0  # the run starts once the viewer is there (or after 10 s)
        prog = _Progress(console, True, quiet=True)
    try:
        if bridge:
            from hilrig.bridge.session import run_bridge
            res = run_bridge(sc, bridge, Path(out) if out else None, mode=mode, timeout_s=timeout,
                             allow_remote=allow_remote, overwrite=overwrite, progress=prog,
                             curve_keys=Path(curve_keys) if curve_keys else None,
                             notice=None if view else (lambda msg: console.print(msg)),
                             telemetry=telemetry, layout=fixed)
        elif paced or sc.mode == "paced":
            from hilrig.runtime.live.paced import run_paced
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
        done = open_run(res.folder)
        overview_png(done, res.folder / "overview.png")
        units_png(done, res.folder / "units.png")  # paralleled units only
    except ImportError:
        console.print("(matplotlib is not installed: no overview.png)")
    except (ValueError, ArithmeticError, OverflowError) as exc:
        # the run and its recording are complete: a plot that cannot be drawn loses nothing
        console.print(f"notice: no overview.png: the plot could not be drawn ({exc}); the "
                      f"recording and summary are complete", markup=False, soft_wrap=True)
    _summary_table(console, res.summary, res.folder)
    return res


def _check_disk(console, sc, out: str | None, paced: bool) -> None:
    """Refuse a run whose recording would not fit on the disk (before anything is written)."""
    from hilrig.runtime.recording import check_free_space
    from hilrig.runtime.run import prepare
    n_signals = len(prepare(sc).signals) + (2 if paced else 0)  # paced: lateness and compute
    note = check_free_space(Path(out) if out else Path("runs"), sc.n_ticks, n_signals,
                            sc.recording["compression"])
    if note:
        console.print(f"notice: {note}", markup=False, soft_wrap=True)


class StabilityCheckError(ValueError):
    """--strict: the stability check before a run found something (nothing ran)."""


def _stability_check(console, scenarios: dict, strict: bool, to_stderr: bool = False) -> None:
    """The operating-point analysis at each scenario's start (runtime/analysis/check.py): one
    notice per finding; with ``strict`` an error before anything runs. A controller the
    analysis cannot handle (an exception of its own) is said and skipped, never fatal."""
    import numpy as np

    from hilrig.runtime.analysis.check import start_check
    from hilrig.runtime.analysis.design import design_line, shaping_line
    from hilrig.runtime.run import prepare
    found = []
    for name, sc in scenarios.items():
        try:
            prep = prepare(sc)
            for line in (design_line(prep.design), shaping_line(prep.shaping)):
                if line:
                    print(line, file=sys.stderr) if to_stderr else console.print(
                        line, markup=False, soft_wrap=True)
            findings, _ = start_check(prep)
        except (ArithmeticError, ValueError, IndexError, TypeError, np.linalg.LinAlgError) as exc:
            line = f"stability check: {name}: not checked ({type(exc).__name__}: {exc})"
            print(line, file=sys.stderr) if to_stderr else console.print(line, markup=False,
                                                                         soft_wrap=True)
            continue
        found += findings
    for f in found:
        line = ("error: " if strict else "notice: ") + f.notice()
        if not strict:
            print(line, file=sys.stderr) if to_stderr else console.print(line, markup=False,
                                                                         soft_wrap=True)
    if strict and found:
        raise StabilityCheckError("; ".join(f.notice() for f in found) + " (--strict: nothing "
                                  "ran; without --strict this is a notice)")


def _grid_check(console, scenarios: dict, path: Path, grid, args) -> None:
    """The envelope's stability check: the analysis over its grid (runtime/analysis/check.py)."""
    from hilrig.runtime.analysis.check import grid_check
    found = grid_check(scenarios, path, grid, workers=args.workers)
    for f in found:
        line = f"{'error' if args.strict else 'notice'}: stability check: {f.controller}: {f.text}"
        if not args.strict:
            print(line, file=sys.stderr) if args.json else console.print(line, markup=False,
                                                                         soft_wrap=True)
    if args.strict and found:
        raise StabilityCheckError("; ".join(f"{f.controller}: {f.text}" for f in found)
                                  + " (--strict: nothing ran; without --strict this is a notice)")


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

    from hilrig.runtime.trials.compare import compare, json_view
    from hilrig.runtime.scenario import plan_candidates

    names = [c.strip() for c in args.controllers.split(",") if c.strip()]
    out = Path(args.out) if args.out else Path("runs") / (
        _dt.datetime.now().strftime("%Y%m%d-%H%M%S") + "-compare")
    overrides = _overrides(args.set)
    # every candidate and override checked before the caution and the runs (compare checks
    # them again; an override no candidate takes is refused here, before anything is shown)
    shared, plans = plan_candidates(args.scenario, overrides, names)
    if not args.json:
        _show_caution(console, shared)
    _stability_check(console, {c: plans[c].scenario for c in names}, args.strict,
                     to_stderr=args.json)
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
    from hilrig.runtime.trials.compare import RANK_RULE, folder_name
    from hilrig.runtime.outcome import time_text
    labels = {name: folder_name(name) for name in results}
    # a metric of a run that ended early covers only the part it ran: marked with *
    partial = {name: not r["outcome"]["whole_run"] for name, r in results.items()}

    def cell(name, k, sc, fm):
        v = f(results[name][k], sc, fm)
        return v + "*" if partial[name] and k not in ("trips", "compute_ns_per_tick") and v != "-" else v

    def covers(r):
        oc = r["outcome"]
        if oc["whole_run"]:
            return f(oc["end_time_s"], 1e3, "{:.4g}")
        return f"{f(oc['end_time_s'], 1e3, '{:.4g}')} of {f(oc['planned_s'], 1e3, '{:.4g}')}"

    def outcome(r):
        oc = r["outcome"]
        if oc["completed"]:
            return "completed"
        return oc["status"] + (f" at {time_text(oc['first_cause_time_s'])}"
                               if oc["first_cause_time_s"] is not None else "")

    title = escape(f"controller comparison: {args.scenario}")
    if console.width >= 110:  # rows: controllers
        t = Table(title=title, title_justify="left", header_style="bold", box=box.SIMPLE_HEAD)
        t.add_column("#", justify="right")
        t.add_column("controller", no_wrap=True)
        for head, *_ in cols:
            t.add_column(escape(head.replace(" [", "\n[")), justify="right")
        t.add_column(escape("covers\n[ms]"), justify="right")
        t.add_column("outcome")
        for name, r in results.items():
            t.add_row(str(r["rank"]), escape(labels[name]),
                      *[cell(name, k, sc, fm) for _, k, sc, fm in cols], covers(r),
                      escape(outcome(r)))
    else:  # narrow terminal: rows are the metrics, one column per controller
        t = Table(title=title, title_justify="left", header_style="bold", box=box.SIMPLE_HEAD)
        t.add_column("metric", no_wrap=True)
        for name in results:
            t.add_column(escape(labels[name]), justify="right")
        t.add_row("rank", *[str(results[n]["rank"]) for n in results])
        for head, k, sc, fm in cols:
            t.add_row(escape(head), *[cell(n, k, sc, fm) for n in results])
        t.add_row(escape("covers [ms]"), *[covers(results[n]) for n in results])
        t.add_row("outcome", *[escape(outcome(results[n])) for n in results])
    console.print(t)
    for name, r in results.items():
        if not r["outcome"]["completed"]:
            console.print(f"{r['rank']}. {escape(labels[name])}: {escape(r['outcome']['text'])}")
        if r.get("metrics_note"):
            console.print(f"   no metrics: {escape(r['metrics_note'])}")
    console.print(escape(RANK_RULE) + ". * covers only the part of the run before it ended "
                  "(column covers). rise, settle, overshoot and ss error: of the largest "
                  "reference step of the run (10-90 % rise, 2 % settling band). Plots and run "
                  "folders: " + escape(str(out)))
    _compare_segments(console, {labels[n]: r["segments"] for n, r in results.items()})


def _envelope(console, args, plain: bool) -> None:
    import datetime as _dt

    from rich.markup import escape

    from hilrig.runtime.trials import envelope as env
    from hilrig.runtime.scenario import not_applied_lines, plan_candidates
    from hilrig.runtime.units import parse_quantity

    names = [c.strip() for c in (args.controllers or "").split(",") if c.strip()]
    if args.cell is not None:
        return _envelope_cell(console, args, plain, names)
    if not names:
        raise ValueError("--controllers: name at least one controller")
    grid = env.Grid.parse(args.v_range, args.p_range, args.grid)
    if not 0.0 < args.tolerance < 100.0:
        raise ValueError(f"--tolerance {args.tolerance:g} %: expected a value in (0, 100)")
    path = Path(args.scenario)
    overrides = _overrides(args.set)
    # validates the file and the --set overrides once, with run's messages, and every
    # candidate before anything runs: a controller parameter reaches the candidates that
    # have it (listed as not applied for the others; none taking it is an error)
    axis = env.Axis.parse(args.axis) if args.axis else None
    sc, plans, ctrl_of, axis_of = env.plan_series(path, overrides, names, axis)
    names = list(plans)  # one map per controller (and axis value)
    v_start = parse_quantity(args.v_start, "V", "--v-start") if args.v_start else None
    out = Path(args.out) if args.out else Path("runs") / (
        _dt.datetime.now().strftime("%Y%m%d-%H%M%S") + "-envelope")
    if (out / "envelope.csv").exists():
        raise FileExistsError(f"{out / 'envelope.csv'} exists; choose another --out (nothing was overwritten)")
    notes = env.grid_notices(sc, grid, v_start)
    if args.json:  # standard output holds the JSON alone
        for note in notes:
            print(f"notice: {note}", file=sys.stderr)
    else:
        _show_caution(console, sc, notes)
    for line in not_applied_lines(plans):
        print(line, file=sys.stderr) if args.json else console.print(line, markup=False, soft_wrap=True)
    _grid_check(console, {c: plans[c].scenario for c in names}, path, grid, args)
    if not args.json:
        console.print(f"{len(names)} controller(s) x {len(grid.v)} x {len(grid.p)} operating points"
                      + (f" on the Dask cluster at {args.cluster}" if args.cluster else " on local processes"))
    # each candidate's scenario text with the overrides it takes: what its cells run
    tasks = [t for c in names for t in env.tasks_for(plans[c].scenario.text, path.name,
                                                     [ctrl_of[c]], grid, tol_pct=args.tolerance,
                                                     v_start=v_start, series=c, axis=axis_of[c])]
    t0 = time.perf_counter()
    if not args.cluster:
        if not args.json:
            console.print("preparing the compiled loops (a first compile takes a few seconds per controller) ...")
        env.warm_up(tasks)
    t_warm = time.perf_counter() - t0
    prog = None if args.json else _Progress(console, plain, unit="operating points")
    try:
        results = env.run_envelope(tasks, cluster=args.cluster, workers=args.workers, progress=prog)
    finally:
        if prog:
            prog.close()
    t_map = time.perf_counter() - t0 - t_warm
    rows = env.table(tasks, results)
    out.mkdir(parents=True, exist_ok=True)
    env.write_csv(rows, out / "envelope.csv")
    try:
        env.heat_map_png(rows, out / "envelope.png", title=f"{sc.title or path.name}: tracking within "
                         f"{args.tolerance:g} % (SIL, {sc.plant.plugin.name})")
    except ImportError:
        pass
    wall = time.perf_counter() - t0
    cnt, why = env.counts(rows), env.cause_counts(rows)
    worst = {}
    for c in names:
        w = env.worst_cell(rows, c)
        # the candidate's own overrides (its controller, then what it takes), then the cell's
        worst[c] = None if w is None else {**w, "command": env.run_command(
            args.scenario, env.set_items(plans[c].overrides),
            env.cell_overrides(plans[c].scenario, ctrl_of[c], w["v_ref_V"], w["p_load_W"], v_start))}
    if args.json:
        print(_json_text({c: {"outcomes": cnt[c], "trip_causes": why[c], "worst": worst[c],
                              "overrides": plans[c].scenario.overrides} for c in names}))
        return
    order = env.causes(rows)
    for c in names:
        console.print(f"[bold]{escape(c)}[/bold]  " + "  ".join(f"{o} {n}" for o, n in cnt[c].items()))
        for line in env.text_map(rows, c, order):
            console.print(escape(line), highlight=False)
    # a cell that trips shows the letter of its first cause (the key below), else T
    console.print(escape("map: " + "  ".join(f"{sym} {env.legend_label(o)}"
                                             for o, sym in env.SYMBOLS.items()
                                             if o != "trips" or not order)))
    for line in env.cause_key(rows):
        console.print("     " + line, markup=False, soft_wrap=True)
    for c in names:
        w = worst[c]
        if w is None:
            continue
        what = w["outcome"]
        if w["first_cause"]:
            what += f": {w['first_cause']} at {w['first_cause_time_s'] * 1e3:.3g} ms"
        elif w["end_event"]:
            what += f": {w['end_event']} at {w['end_event_time_s'] * 1e3:.3g} ms"
        console.print(f"worst cell of {c}: {w['v_ref_V']:g} V, {w['p_load_W'] / 1e3:g} kW ({what}); "
                      f"run it with its recording (or: hilrig envelope ... --cell V,P --controller NAME):",
                      markup=False, soft_wrap=True)
        console.print("  " + w["command"], markup=False, soft_wrap=True)
    console.print(f"{len(rows)} points in {wall:.1f} s (loops compiled or loaded in {t_warm:.1f} s, "
                  f"map {t_map:.1f} s); wrote {escape(str(out / 'envelope.csv'))} "
                  f"and {escape(str(out / 'envelope.png'))}")


def _envelope_cell(console, args, plain: bool, names: list[str]) -> None:
    """--cell V,P: one map cell as a normal run (run folder, recording, summary), then its
    outcome classified as the map classifies it."""
    import datetime as _dt

    from hilrig.runtime.trials import envelope as env
    from hilrig.runtime.scenario import plan_candidates
    from hilrig.runtime.units import parse_quantity

    parts = args.cell.split(",")
    if len(parts) != 2:
        raise ValueError(f"--cell {args.cell!r}: write V,P (target voltage, load power), e.g. "
                         f"--cell '150 V,50 kW' or --cell 150,50e3")
    v = parse_quantity(parts[0].strip(), "V", "--cell V")
    p = parse_quantity(parts[1].strip(), "W", "--cell P")
    if not v > 0.0:
        raise ValueError(f"--cell {args.cell!r}: the voltage must be above 0 V (a constant-power "
                         f"load is singular at 0 V)")
    if args.controller:
        ctrl = args.controller
    elif len(names) == 1:
        ctrl = names[0]
    else:
        raise ValueError("--cell: name its controller with --controller NAME")
    if args.json:
        raise ValueError("--cell runs one cell as a normal run: leave out --json (the run "
                         "folder's summary.json holds the result)")
    if not 0.0 < args.tolerance < 100.0:
        raise ValueError(f"--tolerance {args.tolerance:g} %: expected a value in (0, 100)")
    path = Path(args.scenario)
    # the cell's controller takes every override, or the command is refused (one candidate)
    _, plans = plan_candidates(path, _overrides(args.set), [ctrl])
    sets = env.set_items(plans[ctrl].overrides)  # its controller first, then its parameters
    v_start = parse_quantity(args.v_start, "V", "--v-start") if args.v_start else None
    cell_ov = env.cell_overrides(plans[ctrl].scenario, ctrl, v, p, v_start)
    out = Path(args.out) if args.out else Path("runs") / (
        _dt.datetime.now().strftime("%Y%m%d-%H%M%S") + f"-{path.stem}-cell")
    if (out / "recording.h5").exists():
        raise FileExistsError(f"{out} already holds a recording; choose another --out "
                              f"(nothing was overwritten)")
    console.print(f"cell {v:g} V, {p / 1e3:g} kW with {ctrl} as a normal run, the same as", markup=False)
    import shlex
    console.print("  " + env.run_command(args.scenario, sets, cell_ov) + " --out "
                  + shlex.quote(str(out)),
                  markup=False, soft_wrap=True)
    res = _run(console, plain, path, str(out), False, sets + env.set_items(cell_ov))
    cell = env.cell_of_run(res.folder, v, args.tolerance)
    details = []
    if cell.first_cause:
        details.append(f"{cell.first_cause} at {cell.first_cause_time_s * 1e3:.3g} ms")
    if cell.end_event:
        details.append(f"{cell.end_event} at {cell.end_event_time_s * 1e3:.3g} ms")
    what = cell.outcome + (": " + "; ".join(details) if details else "")
    console.print(f"cell outcome (the map's rules, tracking within {args.tolerance:g} %): {what}",
                  markup=False, soft_wrap=True)


def _literal(text: str):
    from hilrig.runtime.scenario import toml_literal
    return toml_literal(text)


#: options whose value may start with a minus sign (a range or point with a negative power)
_SIGNED_VALUE_FLAGS = ("--p-range", "--v-range", "--at", "--cell")


def _join_negative(argv: list[str]) -> list[str]:
    """``--p-range -40e3:80e3`` as ``--p-range=-40e3:80e3``: argparse reads a value that starts
    with a minus sign and is not a plain number as an option of its own."""
    out, i = [], 0
    while i < len(argv):
        a = argv[i]
        if (a in _SIGNED_VALUE_FLAGS and i + 1 < len(argv) and len(argv[i + 1]) > 1
                and argv[i + 1][0] == "-" and (argv[i + 1][1].isdigit() or argv[i + 1][1] == ".")):
            out.append(f"{a}={argv[i + 1]}")
            i += 2
            continue
        out.append(a)
        i += 1
    return out


def _layout_arg(p) -> None:
    p.add_argument("--layout", nargs="?", const="", metavar="FILE",
                   help="fixed-layout datagrams instead of msgpack frames (udp:// only; "
                        "docs/protocol.md section 16): the layout from FILE, or with --layout "
                        "alone from the scenario's [bridge.layout]")


def main(argv: list[str] | None = None) -> int:
    import warnings
    # numpy's per-operation warnings on absurd values (a peer sending 1e308): the summary says
    # n/a or inf where a figure overflows, and the plot notes what it clipped
    warnings.filterwarnings("ignore", message="(overflow|invalid value) encountered",
                            category=RuntimeWarning)
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
    _layout_arg(p)
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
    p.add_argument("--curve-keys", metavar="DIR",
                   help="CurveZMQ keys folder (hilrig keys DIR): required for a run's telemetry "
                        "off loopback (the run's --telemetry-keys folder)")
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
    _layout_arg(p)
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
    p.add_argument("--controllers", metavar="A,B,...",
                   help="comma-separated controller plugin names or .py paths")
    p.add_argument("--v-range", default="50:600", metavar="LOW:HIGH", help="target voltages [V] (default 50:600)")
    p.add_argument("--p-range", default="0:150e3", metavar="LOW:HIGH", help="constant load powers [W] (default 0:150e3)")
    p.add_argument("--grid", default="25x25", metavar="NVxNP", help="points per axis (default 25x25)")
    p.add_argument("--tolerance", type=float, default=2.0, metavar="PCT",
                   help="tracking band in %% of the target voltage (default 2)")
    p.add_argument("--v-start", metavar="V", help="start voltage (default: the scenario's start)")
    p.add_argument("--out", help="folder for envelope.csv and the heat map (default: runs/<time>-envelope); "
                   "with --cell, the run folder (default: runs/<time>-<scenario>-cell)")
    p.add_argument("--json", action="store_true", help="print per controller: outcome counts, first trip causes and the worst cell "
                        "with its run command, as JSON")
    p.add_argument("--cluster", metavar="ADDRESS", help="run on a Dask distributed scheduler instead of local processes")
    p.add_argument("--workers", type=int, help="local worker processes (default: all cores)")
    p.add_argument("--headless", action="store_true", help="plain text output, no progress bar or colours")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override a scenario value for every candidate (repeatable)")
    p.add_argument("--cell", metavar="V,P",
                   help="run one cell (target voltage, load power) as a normal run into a run "
                        "folder (--out) with its recording, instead of the map")
    p.add_argument("--controller", metavar="NAME", help="the controller of --cell")
    p.add_argument("--axis", metavar="KEY=V1,V2,...",
                   help="a further axis: one map per value of a scenario key, e.g. "
                        "units.count=2,3,4 or units.unit2.L1='\"150 uH\",\"162 uH\"'")
    from hilrig.runtime.analysis.command import add_parser as _add_analyze
    _add_analyze(sub)
    from hilrig.runtime.analysis.tune_command import add_parser as _add_tune
    _add_tune(sub)
    p = sub.add_parser("report", help="write a lab report of a run folder (report.md with plots)")
    p.add_argument("run", help="run folder")
    p.add_argument("--json", action="store_true", help="print summary.json (writes nothing)")
    p.add_argument("--out", help="report file to write (default: RUN/report.md)")
    p = sub.add_parser("diff", help="compare two run folders: metrics, largest signal "
                                    "differences, bit-identical verdict, overlaid plot; exit 1 "
                                    "beyond a tolerance")
    p.add_argument("run_a", metavar="RUN_A", help="run folder A (e.g. the stored baseline run)")
    p.add_argument("run_b", metavar="RUN_B", help="run folder B (e.g. the changed controller's run)")
    p.add_argument("--tol", action="append", default=[], metavar="SIGNAL=VALUE",
                   help="largest |B - A| allowed for a signal: absolute in its unit (v_out=0.5V) "
                        "or %% of B's range of it (i_L1=2%%) (repeatable)")
    p.add_argument("--tol-metric", action="append", default=[], metavar="METRIC=VALUE",
                   help="largest |B - A| allowed for a summary metric (iae=5%%: %% of B's "
                        "value; or absolute in its unit) (repeatable)")
    p.add_argument("--bit-identical", action="store_true",
                   help="fail (exit 1) unless the runs are bit-identical")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--out", help="the overlaid plot: a .png file or a folder for diff.png "
                                 "(default: diff-A-vs-B.png beside run A)")
    p.add_argument("--no-plot", action="store_true", help="write no plot")
    p = sub.add_parser("plugins", help="list installed plugins with their parameters, and the "
                                       "controllers' defaults designed for a scenario's plant")
    p.add_argument("--json", action="store_true", help="machine-readable list")
    p.add_argument("--scenario", metavar="FILE",
                   help="design the controllers' defaults for this scenario's plant, control "
                        "period and design range (default: the demo scenario)")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override a scenario key for the design (repeatable)")
    p = sub.add_parser("export", help="export a run's recording")
    p.add_argument("run", help="run folder")
    fmt = p.add_mutually_exclusive_group(required=True)
    fmt.add_argument("--csv", action="store_true", help="write recording.csv")
    fmt.add_argument("--mf4", action="store_true",
                     help="write recording.mf4 (ASAM MDF 4; needs the optional package asammdf)")
    p.add_argument("--out", help="file to write (default: RUN/recording.csv or RUN/recording.mf4)")
    for name in ("demo", "run", "compare", "envelope"):
        sub.choices[name].add_argument(
            "--strict", action="store_true",
            help="make the stability check before the run an error: a controller whose "
                 "linearised loop is unstable, has no steady state, rests beyond an interlock "
                 "or has little margin at the start (docs/analysis.md) does not run (exit 2)")
    for name in ("demo", "run", "interlock-test", "serve-sim", "compare", "envelope"):
        sub.choices[name].add_argument(
            "--checked", action="store_true",
            help="bounds-checked build of the compiled loop (slower, cached apart): an index "
                 "out of range in a plugin kernel stops the run with an error naming the kernel "
                 "(also HILRIG_CHECKED=1)")
    args = ap.parse_args(_join_negative(sys.argv[1:] if argv is None else list(argv)))
    from hilrig.runtime import checked
    if getattr(args, "checked", False) or checked.requested():
        checked.enable()  # before numba loads; child processes inherit it

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
                       realtime=not args.no_realtime, strict=args.strict)
            return _run_status(res.summary)
        elif args.cmd == "run":
            res = _run(console, plain, Path(args.scenario), args.out, args.overwrite, args.set,
                       bridge=args.bridge, mode=args.mode, timeout=args.timeout,
                       allow_remote=args.allow_remote, curve_keys=args.curve_keys,
                       ack_hv=args.acknowledge_high_voltage, paced=args.paced,
                       view=_wants_view(args, plain), telemetry=args.telemetry,
                       realtime=not args.no_realtime, telemetry_keys=args.telemetry_keys,
                       strict=args.strict, layout=args.layout)
            return _run_status(res.summary)
        elif args.cmd == "watch":
            from hilrig.bridge.errors import BridgeError as _BridgeError
            from hilrig.bridge.transport import check_address
            from hilrig.runtime.live.telemetry import DEFAULT_ADDRESS, needs_keys
            from hilrig.runtime.live.watch import watch
            address = args.address or DEFAULT_ADDRESS
            check_address(address, args.allow_remote)
            if args.curve_keys is None and needs_keys(address):
                raise _BridgeError(f"telemetry at {address}, reachable from other machines, "
                                   f"needs CurveZMQ keys: make them with 'hilrig keys DIR', start "
                                   f"the run with --telemetry-keys DIR and pass --curve-keys DIR")
            if args.curve_keys:
                from hilrig.bridge.keys import client_keys
                client_keys(Path(args.curve_keys))  # a missing or unreadable key: said now
            return watch(address, plain=args.plain, exit_when_done=args.exit_when_done,
                         give_up_s=args.give_up,
                         curve_keys=Path(args.curve_keys) if args.curve_keys else None)
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
            fixed = _fixed_layout(sc, args.layout, args.bind, args.mode)
            if fixed is not None:
                from hilrig.bridge import datagram
                if args.curve_keys:
                    raise ValueError("--curve-keys applies to ZeroMQ addresses (tcp://, ipc://), "
                                     "not to fixed-layout datagrams (udp://)")
                datagram.serve(sc, args.bind, fixed, mode=args.mode, sessions=args.sessions,
                               allow_remote=args.allow_remote, idle_timeout_s=args.idle_timeout,
                               faults=faults, commands=sys.stdin if args.commands else None,
                               log=lambda m: console.print(m, markup=False))
                return 0
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
        elif args.cmd == "analyze":
            from hilrig.runtime.analysis.command import run as _analyze
            return _analyze(console, args, plain, _overrides(args.set))
        elif args.cmd == "tune":
            from hilrig.runtime.analysis.tune_command import run as _tune
            return _tune(console, args, plain, _overrides(args.set))
        elif args.cmd == "report":
            from hilrig.runtime.recording import open_run
            run = open_run(args.run)
            if not run.summary:
                raise RecordingError(f"{args.run}: no summary.json (the run did not finish)")
            if args.json:
                print(_json_text(run.summary))
            else:
                from hilrig.runtime.trials.report import write_report
                _summary_table(console, run.summary, run.folder)
                for ev in run.summary.get("events", []):
                    console.print(f"event: {ev}")
                dest = write_report(run, Path(args.out) if args.out else None)
                console.print(f"wrote {dest}", markup=False)
        elif args.cmd == "diff":
            from hilrig.runtime.trials import diff as _diff
            res = _diff.diff_runs(args.run_a, args.run_b, args.tol, args.tol_metric,
                                  args.bit_identical, args.out, draw=not args.no_plot)
            if args.json:
                print(_json_text(res.as_dict()))
            else:
                _diff.print_result(console, res)
            return res.exit_code
        elif args.cmd == "plugins":
            from hilrig.runtime.registry import all_plugins
            items = [p.declaration.describe() for p in all_plugins()]
            path = Path(args.scenario) if args.scenario else _demo_path()
            for it in items:
                if it["kind"] == "controller" and it.get("designed"):
                    it["designed_for"] = _designed_for(path, it["name"], _overrides(args.set))
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
                from hilrig.runtime.trials.report import export_mdf4
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

    from hilrig.safety.caution import NOTICE_STYLE, WARNING_TITLE
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
                        title=WARNING_TITLE, border_style=NOTICE_STYLE, expand=False,
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


def _designed_for(path: Path, controller: str, overrides: dict) -> dict:
    """The controller's defaults designed for the scenario's plant (runtime/analysis/design.py)."""
    from hilrig.runtime.run import plain_values, prepare
    from hilrig.runtime.scenario import load_scenario
    out: dict = {"scenario": str(path)}
    try:
        sc = load_scenario(path, overrides={**overrides, "controller": {"plugin": controller}})
        bus = sc.plant.plugin.name
        if sc.units is not None:
            # paralleled units: each unit's controller is designed as a single unit; show unit 1
            from hilrig.runtime.multi.design import unit_scenario
            sc = unit_scenario(sc, 0)
            bus = f"{sc.plant.plugin.name} (unit 1 of {bus}, its share of the load)"
        prep = prepare(sc)
    except (ScenarioError, PluginError, ValueError) as exc:
        out["error"] = str(exc)
        return out
    d = prep.design or {}
    out.update(plant=bus, Ts_s=sc.Ts, range=d.get("range"),
               range_from=d.get("range_from"), values=plain_values(prep.sc.controller.values),
               designed=d.get("designed", []), worst_pole_abs=d.get("worst_pole_abs"),
               stable_over_range=d.get("stable_over_range"), note=d.get("note"))
    return out


def _plugins_table(console, items: list[dict]) -> None:
    from rich.markup import escape
    from rich.table import Table
    for it in items:
        t = Table(title=f"{it['kind']}: {it['name']} - {it['summary']}", title_justify="left",
                  header_style="bold")
        des = it.get("designed_for") or {}
        dvals = des.get("values") or {}
        cols = ["parameter", "unit", "declared" if des else "default"]
        if dvals:
            cols.append("designed")
        for col in cols + ["min", "max", "description"]:
            t.add_column(col)

        def num(v):
            return (f"{v:.6g}" if isinstance(v, (int, float)) else v if isinstance(v, str)
                    else f"{len(v)} rows")
        for p in it["params"]:
            row = [escape(p["name"]), escape(p["unit"]), num(p["default"])]
            if dvals:
                name = p["name"]
                row.append(num(dvals[name]) + (" *" if name in des.get("designed", []) else "")
                           if name in dvals else "")
            row += ["" if p["min"] is None else f"{p['min']:g}",
                    "" if p["max"] is None else f"{p['max']:g}", escape(p["description"])]
            t.add_row(*row)
        console.print(t)
        if des.get("error"):
            console.print(f"  designed for {escape(des['scenario'])}: cannot be made: "
                          f"{escape(des['error'])}", soft_wrap=True)
        elif dvals:
            r = des.get("range") or {}
            w = des.get("worst_pole_abs")
            rng = (f"{r['v_lo_V']:.6g}-{r['v_hi_V']:.6g} V, {r['p_lo_W'] / 1e3:.6g}.."
                   f"{r['p_hi_W'] / 1e3:.6g} kW" if r else "")
            console.print(f"  designed (*) for {escape(des['scenario'])}: plant {des['plant']}, "
                          f"Ts = {des['Ts_s'] * 1e6:.6g} us" + (f", range {rng}" if rng else "")
                          + (f"; worst closed-loop |z| over the range {w:.4f}" if w else "")
                          + (" (stable over the range)" if des.get("stable_over_range")
                             else " (NOT stable over the whole range)"
                             if des.get("stable_over_range") is False else ""), soft_wrap=True)
        if it.get("design_method"):
            console.print(f"  design from the plant: {escape(it['design_method'])}")
        if it.get("tunable"):
            console.print("  tunable: " + ", ".join(
                f"{x['name']} [{x['low']:g}, {x['high']:g}]" for x in it["tunable"]))
        if it.get("reads"):
            console.print(f"  reads: {', '.join(it['reads'])}")
        if it.get("source"):
            console.print(f"  method: {it['source']}")


if __name__ == "__main__":
    sys.exit(main())
