"""The outcome of a run: one verdict, judged from its summary, that every table, report, plot
and JSON file shows.

``judge(summary)`` is the only place that decides how a run ended; the run table, report.md,
the comparison (table, ``--json``, comparison.json, plots) and the live view's end state all
show what it returns, and ``run.execute`` stores it as ``summary["outcome"]``. It reads only the
summary (``ticks_planned``, ``ticks_run``, ``Ts_s``, ``simulated_s``, ``end_event``,
``events``, ``paced``, ``tracking``), so a summary.json written by an older version is judged
the same way (one without ``tracking`` is not judged on its band).

Statuses, worst cause first (the status names the first abnormal thing; anything after it is
in ``then``):

``tripped``
    an interlock or watchdog tripped (the operator's stop request aside). The run may have
    ended early after it (a collapse once the safe output is applied) or held the safe output
    to its planned end: it is "tripped" either way.
``integration error``
    the plant's integration failed (end event "plant integration error": a non-finite state, or
    one beyond the energy the circuit can hold; its ``detail`` names the tick) with no trip
    before it. Every metric of such a run is null (``summary["metrics_note"]`` says why). A
    summary written before the event was renamed ("non-finite plant state") is judged the
    same way. A trip before it keeps "tripped", with the integration error in ``then``.
``collapsed``
    the output voltage fell below ``limits.v_collapse`` with no trip before it.
``stopped``
    the operator stopped the run (live view).
``ended``
    another abnormal end: a bridge error (stale, peer lost, protocol, timeout, stop not
    acknowledged); ``first_cause`` names it.
``interrupted``
    the run stopped short of its planned end with no recorded cause (Ctrl-C, a killed
    process).
``oscillating``
    the run otherwise reached its planned end, but inside a settled window the output swung
    across the window's mean at least ``metrics.OSC_SWINGS`` (3) full periods, each
    half-swing from more than one band above the mean to more than one band below it (so
    peak to peak above twice the band), with at least one full period in the window's last
    half (sustained, not a decaying transient). Takes precedence over "out of band".
``out of band``
    the run otherwise reached its planned end, but inside a settled window
    ``|v_ref_raw - v_out|`` stayed above the tracking band for longer than
    ``metrics.OUT_OF_BAND_S`` (2 ms, and 20 ticks) without a break.
``timing not met``
    a paced run that otherwise completed, whose timing verdict
    (``summary["paced"]["verdict"]["timing_met"]``) is false (after "oscillating" and "out of
    band", which name a fault of the loop itself; "timing not met" is then listed in ``then``).
``completed``
    the run reached its planned end with none of the above: the only status that is "ok".

The band and the settled windows (``runtime/trials/metrics.py`` ``band_check``, stored by
``run.execute`` as ``summary["tracking"]``): the band at a sample is
``max(BAND_REL |v_ref_raw|, BAND_FLOOR_V)`` = max(5 % of the raw reference, 0.5 V); a settled
window starts ``SETTLE_DELAY_S`` (10 ms, at least 100 ticks) after the run's start and after each step's or ramp's
end, and lasts to the next step or ramp (or the run's end, or its first trip or collapse).

Only "completed" counts as completed: a tripped run that held its safe output to the planned
end has ``whole_run`` true (its metrics cover the whole run) but did not complete.
"""
from __future__ import annotations

import math
from typing import Any, Mapping

STATUSES = ("completed", "tripped", "integration error", "collapsed", "stopped",
            "timing not met", "ended", "interrupted", "out of band", "oscillating")
#: statuses of a run that reached its planned end without a trip or another abnormal end, but
#: did not do its job: they rank right after the completed runs
RAN_TO_END = ("oscillating", "out of band", "timing not met")

#: the loop's end events (runtime/loop.py EVENT_TEXT) that have a status of their own
COLLAPSE = "voltage collapse"
STOPPED = "stopped by the operator"
#: the loop's end event when the plant's integration failed (runtime/loop.py), and the name it
#: had before (summaries written then are judged the same way)
INTEGRATION_ERROR = "plant integration error"
INTEGRATION_ERRORS = frozenset({INTEGRATION_ERROR, "non-finite plant state"})
#: the cause id of the trip an operator's stop raises (it is the stop, not a fault)
STOP_CAUSE = "stop requested"
#: events of the interlocks' log that are not an end of the run (safety/interlocks.py
#: EVENT_NAMES, and the log's overflow note); kept as text so that judging needs no numba
LOG_EVENTS = frozenset({"trip", "reset accepted", "reset refused", "reset (nothing latched)",
                        "warning", "also beyond while tripped", "event log full"})


def time_text(t: float | None) -> str:
    """A simulated time for a sentence: milliseconds below one second."""
    if t is None or not isinstance(t, (int, float)) or not math.isfinite(t):
        return "?"
    return f"{t * 1e3:.4g} ms" if abs(t) < 1.0 else f"{t:.4g} s"


def _num(v) -> float | None:
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else None


def _event_time(e: Mapping, ts: float) -> float | None:
    t = _num(e.get("time_s"))
    if t is None and _num(e.get("tick")) is not None and ts > 0:
        t = e["tick"] * ts
    return t


def _trip_text(e: Mapping) -> str:
    cause = str(e.get("cause") or e.get("cause_id") or "trip")
    v = _num(e.get("value"))
    if "value" not in e:
        return cause
    if v is None or not math.isfinite(v):
        return f"{cause}, value not finite"
    unit = ""
    # an interlock's cause text ends in its threshold's unit ("interlock v_out > 36 V",
    # "... for 3 ticks"): the value has that unit
    words = cause.split(" for ")[0].split()
    if cause.startswith("interlock ") and len(words) >= 5 and words[-3] in (">", "<"):
        unit = " " + words[-1]
    return f"{cause}, value {v:.4g}{unit}"


def _end_text(e: Mapping) -> str:
    name = str(e.get("event"))
    v = _num(e.get("v_out_V"))
    if name == COLLAPSE and v is not None and math.isfinite(v):
        return f"{name} (v_out {v:.4g} V)"
    detail = e.get("detail")
    if detail:
        detail = str(detail)
        return f"{name}: {detail if len(detail) <= 80 else detail[:77] + '...'}"
    return name


def timing_met(summary: Mapping) -> bool | None:
    """The paced timing verdict, or None when the summary has none (not paced, or written
    before the verdict existed). Read defensively: anything but a bool is no verdict."""
    pc = summary.get("paced")
    verdict = pc.get("verdict") if isinstance(pc, Mapping) else None
    met = verdict.get("timing_met") if isinstance(verdict, Mapping) else None
    return met if isinstance(met, bool) else None


def band_verdict(tracking: Any) -> tuple[str, str, float | None] | None:
    """("oscillating" or "out of band", the cause in words, from when) from a summary's
    ``tracking`` dict (``metrics.band_check``); None when the run stayed in its band or the
    summary has no such dict (written before it existed). Read defensively."""
    if not isinstance(tracking, Mapping):
        return None
    osc = tracking.get("oscillation")
    osc = osc if isinstance(osc, Mapping) else {}
    if tracking.get("oscillating") is True:
        t0, t1 = _num(osc.get("from_s")), _num(osc.get("to_s"))
        n, mean = _num(osc.get("swings")), _num(osc.get("mean_V"))
        pp, band = _num(osc.get("peak_to_peak_V")), _num(osc.get("band_V"))
        text = "v_out oscillates"
        if n is not None and mean is not None:
            text += f": {n:g} full swings across {mean:.4g} V"
        if t0 is not None and t1 is not None:
            text += f" from {time_text(t0)} to {time_text(t1)}"
        if pp is not None and band is not None:
            text += f" (peak to peak {pp:.4g} V, band {band:.3g} V)"
        return "oscillating", text, t0
    run = tracking.get("out_of_band_run")
    run = run if isinstance(run, Mapping) else {}
    if tracking.get("out_of_band") is True:
        t0, dur = _num(run.get("from_s")), _num(run.get("duration_s"))
        err, band = _num(run.get("max_error_V")), _num(run.get("band_V"))
        text = "|v_ref_raw - v_out| outside the tracking band"
        if dur is not None:
            text += f" for {time_text(dur)}"
        if t0 is not None:
            text += f" from {time_text(t0)}"
        if err is not None and band is not None:
            text += f" (up to {err:.4g} V, band {band:.3g} V)"
        return "out of band", text, t0
    return None


def judge(summary: Mapping[str, Any]) -> dict[str, Any]:
    """The outcome of a run from its summary (see the module's docstring for the statuses).

    Returns a dict: ``status`` (one of :data:`STATUSES`), ``completed`` (status is
    "completed"), ``whole_run`` (the run reached its planned end), ``end_time_s`` (simulated
    time reached), ``planned_s``, ``first_cause`` (the trip's cause with its value, or the end
    event; None for a completed run) and ``first_cause_time_s``, ``then`` (later events in
    short text, or None) and ``text`` (the whole verdict on one line).
    """
    ts = _num(summary.get("Ts_s")) or 0.0
    planned_ticks = _num(summary.get("ticks_planned"))
    run_ticks = _num(summary.get("ticks_run"))
    planned_s = planned_ticks * ts if planned_ticks is not None else None
    end_s = _num(summary.get("simulated_s"))
    if end_s is None and run_ticks is not None:
        end_s = run_ticks * ts
    whole = (planned_ticks is not None and run_ticks is not None and run_ticks >= planned_ticks)
    events = [e for e in (summary.get("events") or []) if isinstance(e, Mapping)]
    trips = [e for e in events if e.get("event") == "trip"]
    real_trips = [e for e in trips if e.get("cause_id") != STOP_CAUSE]
    stop_trip = any(e.get("cause_id") == STOP_CAUSE for e in trips)
    end_name = summary.get("end_event")
    if end_name is None:  # a summary without the key: the first event that ends a run
        ending = [e for e in events if e.get("event") not in LOG_EVENTS
                  and e.get("ends_run", True)]
        end_name = ending[0].get("event") if ending else None
    end_ev = next((e for e in events if e.get("event") == end_name), None) if end_name else None
    met = timing_met(summary)
    band = band_verdict(summary.get("tracking"))
    integ = end_name in INTEGRATION_ERRORS
    if integ and real_trips:
        # only a trip strictly before the integration error is a real cause: one on the same
        # tick may have read the diverged state
        t_int = _event_time(end_ev, ts) if end_ev is not None else None
        def before(e):
            t = _event_time(e, ts)
            return t_int is None or (t is not None and t < t_int)
        late = [e for e in real_trips if not before(e)]
        real_trips = [e for e in real_trips if before(e)]
    else:
        late = []

    first: Mapping | None = None
    if real_trips:
        status, first = "tripped", real_trips[0]
        cause, cause_t = _trip_text(first), _event_time(first, ts)
    elif integ:
        status, first = "integration error", end_ev
    elif end_name == COLLAPSE:
        status, first = "collapsed", end_ev
    elif end_name == STOPPED or stop_trip:
        status, first = "stopped", end_ev
    elif end_name:
        status, first = "ended", end_ev
    elif not whole or any(e.get("event") == "interrupted" for e in events):
        status = "interrupted"
    elif band is not None:
        status = band[0]
    elif met is False:
        status = "timing not met"
    else:
        status = "completed"
    if status != "tripped":
        if band is not None and status == band[0]:
            cause, cause_t = band[1], band[2]
        elif first is not None:
            cause, cause_t = _end_text(first), _event_time(first, ts)
        elif end_name:
            cause, cause_t = str(end_name), None
        elif status == "interrupted":
            cause, cause_t = "interrupted (no end event recorded)", end_s
        elif status == "timing not met":
            cause, cause_t = "paced timing verdict: timing not met", None
        else:
            cause, cause_t = None, None
        if cause_t is None and status in ("integration error", "collapsed", "stopped", "ended"):
            cause_t = end_s

    then: list[str] = []
    if status == "tripped":
        t0 = cause_t if cause_t is not None else -math.inf
        for e in events:
            if e is first:
                continue
            t = _event_time(e, ts)
            kind = e.get("event")
            if kind == "trip":
                if t is not None and t >= t0:
                    then.append(f"tripped again: {_trip_text(e)} at {time_text(t)}")
            elif kind == "reset accepted":
                then.append(f"reset at {time_text(t)}")
            elif e is end_ev:
                then.append(f"{_end_text(e)} at {time_text(t if t is not None else end_s)}")
        if met is False:
            then.append("timing not met")
    elif status == "integration error":
        for e in late:
            then.append(f"tripped on the same tick: {_trip_text(e)} at "
                        f"{time_text(_event_time(e, ts))}")
        if met is False:
            then.append("timing not met")
    elif status in ("collapsed", "stopped", "ended", "interrupted", "oscillating",
                    "out of band") and met is False:
        then.append("timing not met")
    if status == "interrupted" and not whole and planned_s is not None:
        cause = f"interrupted at {time_text(end_s)} of {time_text(planned_s)}"
    then_text = "; ".join(then) or None

    text = status
    if cause and status != "interrupted":
        text += (f" at {time_text(cause_t)}" if cause_t is not None else "") + f": {cause}"
    elif cause:
        text = cause
    if then_text:
        text += f"; then {then_text}"
    return {
        "status": status,
        "completed": status == "completed",
        "whole_run": bool(whole),
        "end_time_s": end_s,
        "planned_s": planned_s,
        "first_cause": cause,
        "first_cause_time_s": cause_t,
        "then": then_text,
        "text": text,
    }


def coverage_text(outcome: Mapping[str, Any]) -> str | None:
    """"to 10.7 ms of 40 ms" for a run that ended before its planned end (its metrics cover
    only the part that ran); None for a run that reached its end."""
    if outcome.get("whole_run"):
        return None
    return f"to {time_text(outcome.get('end_time_s'))} of {time_text(outcome.get('planned_s'))}"


def rank_key(outcome: Mapping[str, Any], metric: float | None) -> tuple:
    """Sort key of candidates: every completed run before every run that did not complete;
    then the runs that reached their planned end with neither a trip nor another abnormal end
    (:data:`RAN_TO_END`: oscillating, out of band, timing not met); then the others, those
    that reached their planned end (tripped onto the safe output) first, then the longest;
    within each class ``metric`` (smaller is better, a missing or non-finite value last). Sort
    with a stable sort to keep ties in their given order."""
    m = metric if isinstance(metric, (int, float)) and math.isfinite(metric) else math.inf
    end = outcome.get("end_time_s")
    end = end if isinstance(end, (int, float)) and math.isfinite(end) else 0.0
    cls = 0 if outcome.get("completed") else 1 if outcome.get("status") in RAN_TO_END else 2
    return (cls, not outcome.get("whole_run"), -end, m)
