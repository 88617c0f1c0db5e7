"""The outcome of a run: one verdict, judged from its summary, that every table, report, plot
and JSON file shows.

``judge(summary)`` is the only place that decides how a run ended; the run table, report.md,
the comparison (table, ``--json``, comparison.json, plots) and the live view's end state all
show what it returns, and ``run.execute`` stores it as ``summary["outcome"]``. It reads only the
summary (``ticks_planned``, ``ticks_run``, ``Ts_s``, ``simulated_s``, ``end_event``,
``events``, ``paced``), so a summary.json written by an older version is judged the same way.

Statuses, worst cause first (the status names the first abnormal thing; anything after it is
in ``then``):

``tripped``
    an interlock or watchdog tripped (the operator's stop request aside). The run may have
    ended early after it (a collapse once the safe output is applied) or held the safe output
    to its planned end: it is "tripped" either way.
``collapsed``
    the output voltage fell below ``limits.v_collapse`` with no trip before it.
``stopped``
    the operator stopped the run (live view).
``ended``
    another abnormal end: a bridge error (stale, peer lost, protocol, timeout, stop not
    acknowledged) or a non-finite plant state; ``first_cause`` names it.
``interrupted``
    the run stopped short of its planned end with no recorded cause (Ctrl-C, a killed
    process).
``timing not met``
    a paced run that otherwise completed, whose timing verdict
    (``summary["paced"]["verdict"]["timing_met"]``) is false.
``completed``
    the run reached its planned end with none of the above.

Only "completed" counts as completed: a tripped run that held its safe output to the planned
end has ``whole_run`` true (its metrics cover the whole run) but did not complete.
"""
from __future__ import annotations

import math
from typing import Any, Mapping

STATUSES = ("completed", "tripped", "collapsed", "stopped", "timing not met", "ended",
            "interrupted")

#: the loop's end events (runtime/loop.py EVENT_TEXT) that have a status of their own
COLLAPSE = "voltage collapse"
STOPPED = "stopped by the operator"
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

    first: Mapping | None = None
    if real_trips:
        status, first = "tripped", real_trips[0]
        cause, cause_t = _trip_text(first), _event_time(first, ts)
    elif end_name == COLLAPSE:
        status, first = "collapsed", end_ev
    elif end_name == STOPPED or stop_trip:
        status, first = "stopped", end_ev
    elif end_name:
        status, first = "ended", end_ev
    elif not whole or any(e.get("event") == "interrupted" for e in events):
        status = "interrupted"
    elif met is False:
        status = "timing not met"
    else:
        status = "completed"
    if status != "tripped":
        if first is not None:
            cause, cause_t = _end_text(first), _event_time(first, ts)
        elif end_name:
            cause, cause_t = str(end_name), None
        elif status == "interrupted":
            cause, cause_t = "interrupted (no end event recorded)", end_s
        elif status == "timing not met":
            cause, cause_t = "paced timing verdict: timing not met", None
        else:
            cause, cause_t = None, None
        if cause_t is None and status in ("collapsed", "stopped", "ended"):
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
    elif status in ("collapsed", "stopped", "ended", "interrupted") and met is False:
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
    among runs that did not complete, those that reached their planned end (tripped onto the
    safe output, timing not met) first, then the longest; then ``metric`` (smaller is better,
    a missing or non-finite value last). Sort with a stable sort to keep ties in their given
    order."""
    m = metric if isinstance(metric, (int, float)) and math.isfinite(metric) else math.inf
    end = outcome.get("end_time_s")
    end = end if isinstance(end, (int, float)) and math.isfinite(end) else 0.0
    return (not outcome.get("completed"), not outcome.get("whole_run"), -end, m)
