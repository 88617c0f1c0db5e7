"""Lab reports of a run folder (report.md with PNG plots) and ASAM MDF4 export.

The report is Markdown, readable as text and rendered by any Markdown viewer, ready to attach
to a lab test record: the outcome, the metrics table, the interlock events, timing (with a
histogram for paced runs), the plots, the scenario that ran and the versions. Runs on demo
data say so at the top; every report carries the project's NOTICE that its interlocks are not safety-rated, and
the high-voltage WARNING when the scenario configures more than 60 V DC.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from hilrig.safety.caution import WARNING_TITLE

from ..errors import RecordingError
from ..outcome import coverage_text, judge
from ..recording import Run

CAUTION = ("hilrig's interlocks and watchdogs are monitoring functions of a test tool, not "
           "safety-rated functions (IEC 61508, ISO 13849). This report documents a simulation "
           "or rehearsal; hardware protection and isolation must stay in place, and local codes "
           "and licensed practice govern any connection to real equipment.")


def _hazard_text(run: Run) -> str | None:
    """The high-voltage WARNING of the scenario the run recorded (None at most 60 V DC). When
    the recorded scenario cannot be read any more (a plugin gone), the WARNING is given:
    it must never be missing for a run above 60 V DC."""
    from hilrig.safety.caution import caution_text, scenario_voltages

    from ..scenario import parse_scenario
    try:
        sc = parse_scenario(run.attrs.get("scenario_text", ""), name="scenario.toml")
        return caution_text(scenario_voltages(sc))
    except Exception:  # noqa: BLE001 - any failure gives the notice, never a missing one
        return ("The scenario of this run could not be read back to check its voltages; treat "
                "it as configuring voltages above 60 V DC, which on real equipment can kill. "
                + CAUTION)


def _fmt(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def _metric(v) -> str:
    """A metric's cell: "n/a" when it has no finite value (null in summary.json)."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "n/a"
    return _fmt(v)


def timing_png(run: Run, dest: Path) -> Path | None:
    """Histograms of each tick's lateness and compute time (paced runs); None otherwise."""
    s = run.signals
    if "tick_lateness" not in s:
        return None
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, axes = plt.subplots(1, 2, figsize=(9, 3.2), constrained_layout=True)
    for ax, name, label in ((axes[0], "tick_lateness", "lateness"), (axes[1], "tick_compute", "compute time")):
        v = s[name] * 1e6
        hi = max(float(np.percentile(v, 99.9)), 1.0)
        ax.hist(np.clip(v, 0, hi), bins=80, color="tab:blue")
        ax.set_yscale("log")
        ax.set_xlabel(f"{label} [us], clipped at p99.9 = {hi:.1f} us", fontsize=8)
        ax.set_ylabel("ticks")
        ax.grid(True, lw=0.3)
    fig.suptitle("paced timing per tick", fontsize=10)
    fig.savefig(dest, dpi=90)
    plt.close(fig)
    return dest


#: per kind of reference segment: the sentence that heads its table
SEGMENT_TEXT = {
    "step": "Steps (from the step to the next step or ramp; 10-90 % rise, 2 % settling, "
            "overshoot, undershoot, peak, the definitions of python-control's `step_info`, on "
            "the output minus its value at the step):",
    "ramp": "Ramps (lag: (v_ref_raw - v_out) / slope at the ramp's end, steady for lag_steady_s "
            "before it; largest |v_ref_raw - v_out| from the ramp's start until settled; "
            "settling: from the ramp's end until |v_ref_raw - v_out| stays below 2 % of the "
            "change; overshoot: the output past the reference, in % of the change):",
    "hold": "Holds (largest |v_ref_raw - v_out| from the instant the previous step or ramp "
            "settled, settled_from_s, to the hold's end):",
}


def _segment_tables(segments: list[dict], info: dict) -> list[str]:
    """The report's lines for every reference segment: one table per kind, in time order,
    each row numbered by its place among all segments."""
    if not segments:
        return []
    L = ["", "## Reference segments", ""]
    line = ("The raw reference (what the scenario commands) split into holds, steps and ramps "
            "(rule: `hilrig.runtime.trials.metrics.split_reference`)")
    if info:
        line += f"; changes above {_metric(info.get('threshold_V'))} V count"
        left = (info.get("changes_found") or 0) - (info.get("changes_listed") or 0)
        if left:
            line += f"; the {left} smallest steps and ramps are not listed"
    L += [line + ".", ""]
    for kind in ("step", "ramp", "hold"):
        rows = [(i + 1, g) for i, g in enumerate(segments) if g.get("kind") == kind]
        if not rows:
            continue
        # every row's keys (a segment cut at a trip has cut_at_s); notes go below the table
        keys = [k for k in dict.fromkeys(k for _, g in rows for k in g) if k not in ("kind", "note")]
        L += [SEGMENT_TEXT[kind], "", "| # | " + " | ".join(keys) + " |",
              "| " + " | ".join("---" for _ in range(len(keys) + 1)) + " |"]
        for i, g in rows:
            L.append(f"| {i} | " + " | ".join(_metric(g.get(k)) for k in keys) + " |")
        notes = [f"- segment {i}: {g['note']}" for i, g in rows if g.get("note")]
        if notes:
            L += [""] + notes
        L.append("")
    return L[:-1]


def _units_section(s: dict, pic: str | None) -> list[str]:
    """Paralleled units (``summary["sharing"]``, runtime/trials/sharing.py): a row per unit
    with its share, its deviation from it in the steady windows, its time blocked and trips;
    the circulating current; the per-unit plot."""
    if "sharing" not in s:
        return []
    sh = s.get("sharing")
    L = ["", "## Units", ""]
    if not isinstance(sh, dict):
        L.append("No sharing metrics: " + (s.get("metrics_note") or "none were computed") + ".")
        return L
    from .sharing import trips_text
    L.append(f"{sh.get('count')} paralleled units ({sh.get('topology', '')} topology, sharing "
             f"\"{sh.get('sharing', '')}\"); the bus is `v_out`, so the tracking metrics above "
             f"are the bus voltage's. A unit's share is its weight over the weights of the units "
             f"that run (renormalised while a unit is blocked); its deviation is its output "
             f"current minus that share of the units' total current, in A and in % of the share, "
             f"taken in the steady windows ({_metric(sh.get('settle_delay_s'))} s after the start "
             f"and after each change of the reference, of the load or of the units that run: "
             f"{_metric(sh.get('steady_s'))} s in all"
             + (f", scored up to {sh['cut_reason']} at {_metric(sh.get('cut_at_s'))} s"
                if sh.get("cut_at_s") is not None else "")
             + "; definitions: `hilrig.runtime.trials.sharing`).")
    L += ["", "| unit | share [%] | mean current [A] | largest deviation [A] | at [s] | "
          "largest deviation [% of share] | RMS deviation [A] | RMS deviation [% of share] | "
          "mean deviation [% of share] | largest current [A] | trip level [A] | "
          "time blocked [s] | trips |",
          "| " + " | ".join("---" for _ in range(13)) + " |"]
    for u in sh.get("units") or []:
        trips = "; ".join(f"{tr['cause']} at {_metric(tr['time_s'])} s"
                          for tr in u.get("trips") or []) or "none"
        L.append(f"| {u['unit']} | {_metric(100.0 * u['share'])} | "
                 f"{_metric(u.get('mean_current_A'))} | {_metric(u.get('largest_deviation_A'))} | "
                 f"{_metric(u.get('time_of_largest_deviation_s'))} | "
                 f"{_metric(u.get('largest_deviation_pct'))} | {_metric(u.get('rms_deviation_A'))} | "
                 f"{_metric(u.get('rms_deviation_pct'))} | {_metric(u.get('mean_deviation_pct'))} | "
                 f"{_metric(u.get('largest_current_A'))} | "
                 f"{_metric(u.get('i_trip_A')) if u.get('i_trip_A') else 'none'} | "
                 f"{_metric(u.get('time_blocked_s'))} | {trips} |")
    c = sh.get("circulating") or {}
    b = sh.get("bus") or {}
    L += ["", "| quantity | value |", "| --- | --- |",
          f"| circulating current, steady: largest [A] | {_metric(c.get('largest_A'))} at "
          f"{_metric(c.get('time_of_largest_s'))} s |",
          f"| circulating current, steady: RMS [A] | {_metric(c.get('rms_A'))} |",
          f"| circulating current, transients included: largest [A] | "
          f"{_metric(c.get('largest_whole_run_A'))} at "
          f"{_metric(c.get('time_of_largest_whole_run_s'))} s |",
          "| reverse current (into a unit while another sources): largest [A] | "
          + (f"{_metric(c.get('reverse_largest_A'))} into unit {c['reverse_unit']} at "
             f"{_metric(c.get('time_of_reverse_largest_s'))} s |" if c.get("reverse_unit")
             else "none |"),
          f"| bus error v_ref_raw - v_out, steady: mean [V] | {_metric(b.get('steady_mean_error_V'))} |",
          f"| bus error, steady: largest magnitude [V] | {_metric(b.get('steady_max_abs_error_V'))} |",
          f"| units tripped | {trips_text(sh)} |",
          "", "Circulating current: half the sum over the units of |deviation|, the current the "
          "units above their share deliver in excess of it (0 when every unit carries exactly "
          "its share)."]
    if pic:
        L += ["", f"![bus voltage and reference; each unit's output current and its share "
                  f"(dashed), trips marked with the unit's number]({pic})"]
    return L


def _start_text(s: dict) -> str:
    """The start voltage and the excitation (``[initial] v_out_offset``) the run started with."""
    v0, off = s.get("v_out_start_V"), s.get("v_out_start_offset_V")
    text = f"v_out {_metric(v0)} V"
    if off is None:  # a run recorded before the excitation existed
        return text
    if off == 0.0:
        return text + ", exactly at the plant's equilibrium (no start offset)"
    return (text + f", plant's v_out state started {_metric(off)} V from its equilibrium "
            f"(excitation, [initial] v_out_offset)")


def _controller_section(s: dict) -> list[str]:
    """The controller's values, where they came from (its design from the plant) and the
    stability check at the start (absent in runs recorded before they existed)."""
    vals, des, chk = s.get("controller_values"), s.get("design"), s.get("stability_check")
    if vals is None and des is None and chk is None:
        return []
    L = ["## Controller", ""]
    designed = set((des or {}).get("designed") or [])
    if vals:
        L += ["| parameter | value | from |", "| --- | --- | --- |"]
        given = set((des or {}).get("given") or [])
        for k, v in vals.items():
            src = ("designed for the plant" if k in designed else "scenario" if k in given
                   else "declared default")
            L.append(f"| {k} | {_fmt(v) if not isinstance(v, float) else f'{v:.6g}'} | {src} |")
        L.append("")
    if des and designed:
        r = des.get("range") or {}
        g = des.get("grid") or {}
        L.append(f"Design: {des.get('method', '')}. Range {_metric(r.get('v_lo_V'))}-"
                 f"{_metric(r.get('v_hi_V'))} V, {_metric((r.get('p_lo_W') or 0) / 1e3)}.."
                 f"{_metric((r.get('p_hi_W') or 0) / 1e3)} kW ({des.get('range_from', '')}); "
                 f"worst largest closed-loop |z| on a {g.get('n', '?')}-point grid of it: "
                 f"{_metric(g.get('worst_pole_abs'))}"
                 + (" (stable over the range)." if des.get("stable_over_range")
                    else " (NOT stable over the whole range)."))
        mg = des.get("margins") or {}
        if mg.get("points_short_of_margin"):
            L.append("")
            L.append(f"Margins: less than {mg['gain_db']:g} dB of gain or {mg['phase_deg']:g} "
                     f"degrees of phase margin at {mg['points_short_of_margin']} of "
                     f"{g.get('n', '?')} points of the range (`hilrig tune` searches for margin).")
        L.append("")
    elif des and des.get("note"):
        L += [f"Design: none ({des['note']}).", ""]
    if chk:
        text = f"Stability check at the start ({_metric(chk.get('v_ref_V'))} V, " \
               f"{_metric((chk.get('p_load_W') or 0) / 1e3)} kW): {chk.get('status')}"
        if chk.get("largest_pole_abs") is not None:
            text += f", largest closed-loop |z| {_metric(chk['largest_pole_abs'])}"
        if chk.get("gain_margin_db") is not None or chk.get("phase_margin_deg") is not None:
            text += (f", gain margin {_metric(chk.get('gain_margin_db'))} dB, phase margin "
                     f"{_metric(chk.get('phase_margin_deg'))} deg")
        L.append(text + ".")
        for f in chk.get("findings") or []:
            L.append(f"- {f}")
        L.append("")
    return L


def _param_value(q: dict) -> str:
    if "shape" in q:  # a table: its shape and hash, not its rows
        return f"table {' x '.join(str(n) for n in q['shape'])}, sha256 {q['sha256'][:16]}"
    v = q.get("value")
    return _fmt(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else str(v)


def _plugin_lines(e: dict, heading: str) -> list[str]:
    L = ["", f"### {heading}: {e['name']}", "",
         f"- origin: {e['origin_kind']} `{e['origin']}`, version {e['version']}"]
    for src in e.get("sources", []):
        L.append(f"- {src['role']}: `{src['file']}` sha256 `{src['sha256']}`")
    if e.get("parameters"):
        L += ["", "| parameter | value | unit | set |", "|---|---:|---|---|"]
        for q in e["parameters"]:
            cells = (q["name"], _param_value(q), q["unit"], q["set"])
            L.append("| " + " | ".join(str(c).replace("|", "\\|") for c in cells) + " |")
    return L


def _what_ran_section(prov: dict | None) -> list[str]:
    """Each plugin of the run: origin, version, source hashes, every resolved parameter."""
    L = ["", "## What ran", ""]
    if not prov:
        L.append("This run's summary has no plugin record (written by an older hilrig).")
        return L
    L.append("Every plugin of the run with the sha256 of its source files and every parameter "
             "as it ran: `given` by the scenario or an override, the plugin's `default`, or "
             "`designed` from the plant.")
    for e in prov.get("plugins", []):
        L += _plugin_lines(e, e["role"])
    for u in prov.get("units", []):
        L += _plugin_lines(u["plant"], f"unit {u['unit']} plant")
        L += _plugin_lines(u["controller"], f"unit {u['unit']} controller")
    return L


def write_report(run: Run, dest: Path | None = None) -> Path:
    """Write ``report.md`` (and its PNGs in ``report/``) for a finished run; return its path."""
    from .plots import overview_png, units_png
    if not run.summary:
        raise RecordingError(f"{run.folder}: no summary.json (the run did not finish): no report")
    s = run.summary
    dest = Path(dest) if dest else run.folder / "report.md"
    pics = dest.parent / "report"
    pics.mkdir(parents=True, exist_ok=True)
    over = overview_png(run, pics / "overview.png")
    tim = timing_png(run, pics / "timing.png")
    uni = units_png(run, pics / "units.png")
    rel = lambda p: p.relative_to(dest.parent).as_posix()  # noqa: E731
    L: list[str] = []
    title = s.get("title") or run.folder.name
    L.append(f"# Run report: {title}")
    L.append("")
    if s.get("demo_data"):
        L.append("**Demo data**: an invented scenario, not measurements of real equipment.")
        L.append("")
    hazard = _hazard_text(run)
    if hazard:
        L.append(f"> **{WARNING_TITLE}.** {hazard}")
        L.append(">")
    L.append(f"> **NOTICE.** {CAUTION}")
    L.append("")
    L.append("## Outcome")
    L.append("")
    L.append("| item | value |")
    L.append("| --- | --- |")
    oc = judge(s)
    outcome = oc["text"]
    trip = s.get("trip")
    rows = [("run folder", str(run.folder)), ("mode", s.get("mode")),
            ("plant / controller / reference", f"{s.get('plant')} / {s.get('controller')} / {s.get('reference')}"),
            ("tick period", f"{s.get('Ts_s', 0) * 1e6:g} us, {s.get('substeps')} RK4 substeps"),
            ("start", _start_text(s)),
            ("simulated", f"{s.get('simulated_s', 0):.6g} s ({s.get('ticks_run')} of {s.get('ticks_planned')} ticks)"),
            ("outcome", outcome), ("status", oc["status"]), ("seed", s.get("seed")),
            ("first trip", "none" if not trip else
             f"{trip['cause']} at t = {trip['time_s']:.6g} s (tick {trip['tick']}), value {_metric(trip.get('value'))}")]
    for k, v in rows:
        L.append(f"| {k} | {_fmt(v)} |")
    L.append("")
    L += _controller_section(s)
    L.append("## Tracking metrics")
    L.append("")
    if coverage_text(oc):
        L.append(f"The run ended early ({oc['status']}): these metrics cover only the run "
                 f"{coverage_text(oc)}.")
        L.append("")
    if s.get("metrics_note"):
        L.append(f"**No metrics**: {s['metrics_note']}.")
        L.append("")
    tr = s.get("tracking")
    if isinstance(tr, dict) and tr.get("band_rel") is not None:
        run_ = tr.get("out_of_band_run") or {}
        L.append(f"Tracking band (outcomes \"out of band\" and \"oscillating\"): "
                 f"{_fmt(tr['band_rel'] * 100)} % of |v_ref_raw|, at least "
                 f"{_fmt(tr.get('band_floor_V'))} V, checked from {_fmt(tr.get('settle_delay_s'))} s "
                 f"after the start and after each step or ramp ({_fmt(tr.get('checked_s'))} s "
                 f"checked); longest time outside: {_fmt(run_.get('duration_s', 0.0))} s (limit "
                 f"{_fmt(tr.get('out_of_band_limit_s'))} s); oscillating: "
                 f"{'yes' if tr.get('oscillating') else 'no'}.")
        L.append("")
    L.append("| metric | value |")
    L.append("| --- | --- |")
    for k, v in (s.get("metrics") or {}).items():
        L.append(f"| {k} | {_metric(v)} |")
    L += _segment_tables(s.get("segments") or [], s.get("segmentation") or {})
    L += _units_section(s, rel(uni) if uni else None)
    L.append("")
    L.append("## Interlock and watchdog events")
    L.append("")
    evs = s.get("events") or []
    if evs:
        L.append("| tick | time [s] | event | cause | value |")
        L.append("| --- | --- | --- | --- | --- |")
        for e in evs:
            L.append(f"| {_fmt(e.get('tick'))} | {_fmt(e.get('time_s'))} | {e.get('event')} | "
                     f"{e.get('cause', e.get('detail', ''))} | "
                     f"{_metric(e['value']) if 'value' in e else '-'} |")
    else:
        L.append("No trips, resets or other events.")
    if s.get("faults"):
        L.append("")
        L.append("Faults injected:")
        L.append("")
        for f in s["faults"]:
            L.append(f"- {f['kind']}" + (f" on {f['signal']}" if f.get("signal") else "")
                     + (f" when {f['when']}" if f.get("when") else "")
                     + f": active from {_fmt(f['active_from_s'])} s to {_fmt(f['active_to_s'])} s")
    L.append("")
    L.append("## Plots")
    L.append("")
    L.append(f"![v_out and reference, error, command, currents, trip marker]({rel(over)})")
    L.append("")
    L.append("## Timing")
    L.append("")
    tm = s.get("timing") or {}
    L.append("| quantity | value |")
    L.append("| --- | --- |")
    for k in ("compile_or_load_s", "loop_s", "write_s", "wall_s", "loop_ns_per_tick",
              "ticks_per_s", "realtime_factor"):
        if k in tm:
            L.append(f"| {k} | {_fmt(tm[k])} |")
    pc = s.get("paced")
    if pc:
        from ..live.paced import realtime_text, verdict_text
        if pc.get("verdict"):
            L.append(f"| paced timing | {verdict_text(pc['verdict'])} |")
        if pc.get("realtime"):
            L.append(f"| paced real-time requests | {realtime_text(pc['realtime'], pc.get('pinned_core'))} |")
        for k in ("late_ticks", "deadline_misses", "overruns", "wait"):
            L.append(f"| paced {k} | {_fmt(pc.get(k))} |")
        for k in ("lateness_us", "compute_us"):
            d = pc[k]
            L.append(f"| paced {k} p50 / p99 / max | {_fmt(d['p50'])} / {_fmt(d['p99'])} / {_fmt(d['max'])} |")
    br = s.get("bridge")
    if br:
        for k, v in br.items():
            if isinstance(v, (int, float, str)) or v is None:
                L.append(f"| bridge {k} | {_fmt(v)} |")
        rtt = br.get("rtt_us") or br.get("response_us")
        if rtt:
            L.append(f"| bridge round trip p50 / p99 / max [us] | {_fmt(rtt['p50'])} / {_fmt(rtt['p99'])} / {_fmt(rtt['max'])} |")
    if tim:
        L.append("")
        L.append(f"![paced timing histograms]({rel(tim)})")
    elif not pc:
        L.append("")
        L.append("SIL and bridge runs have no per-tick wall-clock stamps (SIL has no wall clock "
                 "inside a tick): no timing histogram.")
    L.append("")
    L.append("## Versions")
    L.append("")
    for k, v in (s.get("versions") or {}).items():
        L.append(f"- {k} {v}")
    L += _what_ran_section(s.get("provenance"))
    L.append("")
    L.append("## Scenario")
    L.append("")
    L.append("```toml")
    L.append(run.attrs.get("scenario_text", "").rstrip())
    L.append("```")
    L.append("")
    dest.write_text("\n".join(L))
    return dest


def export_mdf4(run: Run, dest: Path) -> Path:
    """Write the recording as ASAM MDF 4 (through asammdf): one channel per signal with its
    unit and description, the run's time as the master channel."""
    try:
        from asammdf import MDF, Signal
    except ImportError:
        raise RecordingError("MDF4 export needs the optional package asammdf: "
                             "pip install 'hilrig[mdf]' (or pip install asammdf)") from None
    mdf = MDF(version="4.10")
    sigs = []
    for name, v in run.signals.items():
        sigs.append(Signal(samples=np.asarray(v, dtype=np.float64), timestamps=run.time,
                           name=name, unit=run.units.get(name, ""),
                           comment=f"hilrig signal {name}"))
    comment = json.dumps({"title": run.attrs.get("title", ""), "demo_data": bool(run.attrs.get("demo_data")),
                          "plant": run.attrs.get("plant"), "controller": run.attrs.get("controller")})
    mdf.append(sigs, comment=comment)
    mdf.save(dest, overwrite=True)
    mdf.close()
    return dest
