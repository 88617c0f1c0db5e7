"""Operating-envelope maps: where does each candidate controller keep tracking?

For every operating point (target reference voltage V, constant load power P) the scenario is
run in SIL with its plant, controller, shaping, interlocks and timing, but with

- a constant-power load P from t = 0 (the device under test's demand),
- a reference that starts at the scenario's start voltage and steps at ``t_step`` (5 ms, or
  10 % of a shorter run) to V (the shaping stage turns the step into a smooth, slew-limited
  transition),

and the run is classified first by its outcome (``runtime/outcome.py`` ``judge``, on the
cell's events and band check, exactly as a normal run of the cell is judged), then, for a run
that reached its end without a trip, by its final part (the last 30 % of the run):

``trips``      the outcome is "tripped": an interlock latched (whatever followed: the safe
               output may let a constant-power load collapse the voltage afterwards, a
               scheduled reset may clear the latch);
``integration error``  the outcome is "integration error": the plant's integration failed
               (a non-finite or impossible state) without a trip before it;
``collapses``  the outcome is "collapsed": the output collapsed without a trip;
``tracks``     the outcome is "completed" and |v_ref - v_out| stayed within the map's
               tolerance band (default 2 % of V) over the final part;
``saturates``  outside that band (or "out of band" or "oscillating" as an outcome) with the
               command at the converter's limits on more than 10 % of the final part's ticks
               (the converter cannot deliver what the controller asks);
``oscillates`` outside the band otherwise: "oscillating" or "out of band" as an outcome, or a
               slow drift in the final part.

So a cell "tracks" only when its run would read "completed" (the one "ok" of a run), and the
words of the map's legend say which outcome each cell word stands for (:data:`OUTCOME_WORDS`).

A cell that trips also keeps the first trip's cause and time, in the run's own words (the
cause text of the run's event log), and a cell whose loop ended on a collapse (or a non-finite
plant state) keeps that event and its time.

Points are independent and deterministic, so they run in parallel: on a local process pool
(the default) or on a Dask distributed cluster; both run the same function per row of the grid
and give identical maps.

Any cell is also a scenario of its own (:func:`cell_overrides`: the scenario with the point's
reference, load, start voltage and controller as overrides): ``hilrig run`` on it records the
cell's run, and :func:`cell_of_run` classifies that recording by the same rules.
"""
from __future__ import annotations

import dataclasses
import hashlib
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np

OUTCOMES = ("tracks", "oscillates", "saturates", "trips", "collapses", "integration error")
#: one character per outcome for the terminal map
SYMBOLS = {"tracks": ".", "oscillates": "~", "saturates": "s", "trips": "T", "collapses": "x",
           "integration error": "!"}
#: the run outcome (runtime/outcome.py status) each cell word stands for, shown in the legends
OUTCOME_WORDS = {"tracks": "completed", "oscillates": "oscillating, or out of band",
                 "saturates": "out of band or oscillating, command at its limits",
                 "trips": "tripped",
                 "collapses": "collapsed", "integration error": "integration error"}
FINAL_PART = 0.3
SATURATED_SHARE = 0.1
#: outcomes from worst to best: the order in which a controller's worst cell is chosen
SEVERITY = ("integration error", "collapses", "trips", "saturates", "oscillates", "tracks")
#: letters of the trip causes on the terminal map (a cause beyond them shows as "T")
CAUSE_LETTERS = "ABCDEFGHIJKLMNOPQRSUVWYZ"
#: hatches of the trip causes on the heat map (a cause beyond them has none)
CAUSE_HATCHES = ("//", "..", "xx", "\\\\", "++", "oo", "--", "||", "**", "OO")


@dataclass(frozen=True)
class Cell:
    """One operating point's result: its outcome, and what ended or latched it.

    ``first_cause`` is the first trip's cause as the run's event log words it (empty without a
    trip), at ``first_cause_time_s``; ``end_event`` is the loop's own end of the run ("voltage
    collapse", "plant integration error"; empty if it ran to the end), at ``end_event_time_s``.
    A cell that trips and then collapses (the safe output let the load pull the voltage down)
    has both.
    """

    outcome: str
    first_cause: str = ""
    first_cause_time_s: float | None = None
    end_event: str = ""
    end_event_time_s: float | None = None


@dataclass(frozen=True)
class Grid:
    """The operating points: voltages [V] and load powers [W]."""

    v: tuple[float, ...]
    p: tuple[float, ...]

    @classmethod
    def parse(cls, v_range: str, p_range: str, grid: str) -> "Grid":
        from ..units import parse_quantity
        try:
            nv, np_ = (int(x) for x in grid.lower().split("x"))
        except ValueError:
            raise ValueError(f"--grid {grid!r}: write NVxNP, e.g. 25x25") from None
        if not (1 <= nv <= 500 and 1 <= np_ <= 500):
            raise ValueError(f"--grid {grid!r}: each count must be in [1, 500]")

        def rng(text, unit, flag):
            parts = text.split(":")
            if len(parts) != 2:
                raise ValueError(f"{flag} {text!r}: write LOW:HIGH, e.g. 50:600")
            lo, hi = (parse_quantity(x.strip(), unit, where=flag) for x in parts)
            if not hi >= lo:
                raise ValueError(f"{flag} {text!r}: HIGH must not be below LOW")
            return lo, hi

        vlo, vhi = rng(v_range, "V", "--v-range")
        plo, phi = rng(p_range, "W", "--p-range")
        if vlo <= 0:
            raise ValueError(f"--v-range {v_range!r}: voltages must be above 0 V (a constant-power "
                             f"load is singular at 0 V)")
        return cls(v=tuple(np.linspace(vlo, vhi, nv).tolist()),
                   p=tuple(np.linspace(plo, phi, np_).tolist()))


@dataclass(frozen=True)
class Axis:
    """A further axis of the map (``--axis KEY=V1,V2,...``): a scenario key and its values,
    each value a map of its own (per candidate), e.g. ``units.count=2,3,4`` (the number of
    paralleled units) or ``units.unit2.L1="150 uH","162 uH"`` (a unit's tolerance). Values
    are read as TOML values, as ``--set`` reads them: ``2`` stays an integer, ``2.0`` is a
    float, ``"162 uH"`` (or 162 uH, unquoted) a quantity."""

    key: str
    values: tuple

    #: keys the map sets itself, per cell
    OWN = ("reference", "load", "initial", "mode", "controller")

    @classmethod
    def parse(cls, text: str) -> "Axis":
        if "=" not in text:
            raise ValueError(f"--axis {text!r}: write KEY=V1,V2,..., e.g. --axis units.count=2,3,4")
        key, vals = (x.strip() for x in text.split("=", 1))
        if not key or key.split(".")[0] in cls.OWN:
            raise ValueError(f"--axis {text!r}: {key or 'the key'!r} cannot be an axis (the map "
                             f"sets reference, load, initial voltage and mode per cell; the "
                             f"controllers are --controllers); name another scenario key, e.g. "
                             f"units.count or plant.C2")
        values = tuple(_literal(v.strip()) for v in _split_values(vals))
        if not values or any(v == "" for v in values):
            raise ValueError(f"--axis {text!r}: give at least one value after '=', separated by "
                             f"commas, e.g. --axis units.count=2,3,4")
        if len(set(map(repr, values))) != len(values):
            raise ValueError(f"--axis {text!r}: a value is given twice")
        return cls(key, values)

    def label(self, value) -> str:
        from ..scenario import _inline
        return f"{self.key}={_inline(value)}"


def _literal(text: str):
    from ..scenario import toml_literal
    return toml_literal(text)


def _split_values(text: str) -> list[str]:
    """Comma-separated values; a comma inside double quotes belongs to its value."""
    out, cur, quoted = [], "", False
    for ch in text:
        if ch == '"':
            quoted = not quoted
        if ch == "," and not quoted:
            out.append(cur)
            cur = ""
        else:
            cur += ch
    out.append(cur)
    return out


def series_name(controller: str, axis: Axis | None = None, value=None) -> str:
    """The name of one map: the controller, and with an axis its value, e.g.
    ``cascaded_pi [units.count=2]`` (envelope.csv's controller column)."""
    return controller if axis is None else f"{controller} [{axis.label(value)}]"


def plan_series(path, overrides: dict[str, Any], controllers: list[str],
                axis: Axis | None = None):
    """Every map's scenario: (the first map's shared scenario, {series: CandidatePlan},
    {series: controller}, {series: axis label}), in order controller by controller, each over
    the axis's values. Each axis value is an override of the command's, checked with run's
    messages (``scenario.plan_candidates``) before anything runs."""
    from ..scenario import plan_candidates
    if axis is None:
        sc, plans = plan_candidates(path, overrides, controllers)
        return sc, plans, {c: c for c in controllers}, {c: "" for c in controllers}
    per_value = []
    for v in axis.values:
        sc_v, plans_v = plan_candidates(path, {**overrides, axis.key: v}, controllers)
        per_value.append((v, sc_v, plans_v))
    plans, ctrl_of, axis_of = {}, {}, {}
    for c in controllers:
        for v, _, plans_v in per_value:
            name = series_name(c, axis, v)
            plans[name], ctrl_of[name], axis_of[name] = plans_v[c], c, axis.label(v)
    return per_value[0][1], plans, ctrl_of, axis_of


@dataclass(frozen=True)
class Task:
    """One grid row: a controller and one voltage at every load power."""

    scenario_text: str
    scenario_name: str
    controller: str
    v: float
    p: tuple[float, ...]
    tol_pct: float
    t_step: float | None
    v_start: float | None
    #: the map this row belongs to (:func:`series_name`; the controller without an axis)
    series: str = ""
    #: the axis value of the map (``KEY=VALUE``), "" without an axis
    axis: str = ""


# per-process cache: (scenario hash, controller) -> (base scenario, compiled loop)
_CACHE: dict[tuple[str, str], Any] = {}


def _base(task: Task):
    from ..run import compile_loop
    from ..scenario import parse_scenario
    key = (hashlib.sha256(task.scenario_text.encode()).hexdigest(), task.controller)
    if key not in _CACHE:
        sc = parse_scenario(task.scenario_text, name=task.scenario_name,
                            overrides=_controller_override(task.scenario_text, task.controller))
        # every cell's controller is designed for the scenario's range, not each for its own
        # start and load (runtime/analysis/design.py)
        sc = pin(sc)
        profile = _profile_plugin()
        # every point runs with a profile reference (see point_scenario), whatever reference
        # the scenario names: the loop must be the one compiled for that reference. (It was
        # compiled for the scenario's own; with the demo's battery model that kernel then read
        # the profile's arrays out of bounds and crashed the workers.)
        v_start = _start_voltage(sc)
        probe = point_scenario(sc, profile, v_start, v_start, 0.0, 0.0)
        fn, _, _ = compile_loop(probe)
        # a call with zero ticks compiles (or loads) the loop now, so that forked workers
        # inherit the machine code instead of each loading it again
        from ..run import _call, first_call, prepare
        prep = prepare(probe)
        first_call(probe, lambda: _call(fn, 0, 0, np.empty((1, len(prep.signals))), prep.args))
        _CACHE[key] = (sc, fn, profile, v_start)
    return _CACHE[key]


def pin(sc):
    from ..analysis.design import pin as _pin
    return _pin(sc)


def pinned_overrides(sc) -> dict:
    from ..analysis.design import pinned_overrides as _po
    return _po(sc)


def _controller_override(text: str, controller: str) -> dict:
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    raw = tomllib.loads(text)
    own = raw.get("controller", {}).get("plugin", "cascaded_pi")
    return {} if own == controller else {"controller": {"plugin": controller}}


def _profile_plugin():
    from .. import registry
    return registry.load("reference", "profile")


def point_scenario(sc, profile, v_start: float, v_target: float, p_load: float, t_step: float):
    """The scenario for one operating point (see the module docstring)."""
    from ..scenario import PluginChoice
    points = ((0.0, v_start), (t_step, v_start), (t_step, v_target))
    ref = PluginChoice(plugin=profile, values={"points": points})
    load_t = np.array([0.0])
    load_v = np.array([[p_load], [0.0], [0.0]])
    return dataclasses.replace(sc, reference=ref, load_t=load_t, load_v=load_v, v_out0=v_start)


def classify(n_planned: int, ran: int, event: int, tripped: bool, v_out, v_ref, u, v_dc,
             v_target: float, tol_pct: float) -> str:
    """The outcome of one operating point from its recorded signals (see the module docstring)."""
    if tripped:  # the first event: a collapse after a trip is its consequence (safe output)
        return "trips"
    if event != 0:
        return "collapses"
    k0 = int(n_planned * (1.0 - FINAL_PART))
    e = v_ref[k0:ran] - v_out[k0:ran]
    band = tol_pct / 100.0 * abs(v_target)
    if e.size and bool(np.all(np.abs(e) <= band)):
        return "tracks"
    sat = (u[k0:ran] <= 0.0) | (u[k0:ran] >= v_dc[k0:ran])
    if sat.size and np.count_nonzero(sat) > SATURATED_SHARE * sat.size:
        return "saturates"
    return "oscillates"


def cell_word(status: str, word: str) -> str:
    """A cell's word from its run's outcome ``status`` and the map's own classification of
    the final part (``word``, :func:`classify` of a run that reached its end): see the module
    docstring."""
    if status == "tripped":
        return "trips"
    if status == "integration error":
        return "integration error"
    if status == "completed" or status == "timing not met":
        return word
    if status in ("oscillating", "out of band"):
        # at the command's limits the converter is the cause (a saturated command damps
        # nothing): "saturates"; else the loop's own
        return "saturates" if word == "saturates" else "oscillates"
    # collapsed (and no other end can come from a cell's SIL loop)
    return "collapses"


def _cell_status(ts: float, n: int, ran: int, trip: dict | None, end_event: str,
                 end_tick: int | None, sig: dict) -> str:
    """The outcome status of a cell's run, judged as run.execute's summary is (its events and
    the band check on the recorded v_out and v_ref_raw, cut at the first trip or collapse)."""
    from .metrics import band_check
    from ..outcome import COLLAPSE, judge
    events = [dict(trip, event="trip")] if trip else []
    if end_event:
        events.append({"event": end_event, "tick": end_tick, "time_s": end_tick * ts})
    cut = trip["tick"] if trip else (end_tick if end_event == COLLAPSE else None)
    tracking = None
    if "v_ref_raw" in sig:
        t = np.arange(ran) * ts
        tracking = band_check(t, sig["v_out"][:ran], sig["v_ref_raw"][:ran], cut=cut)
    return judge({"Ts_s": ts, "ticks_planned": n, "ticks_run": ran, "simulated_s": ran * ts,
                  "end_event": end_event or None, "events": events,
                  "tracking": tracking})["status"]


def run_row(task: Task) -> list[Cell]:
    """Cells of one grid row (one voltage, every power). Runs in any worker process."""
    from ..run import _call, prepare
    sc, fn, profile, v_scenario = _base(task)
    n = sc.n_ticks
    t_step = step_time(sc, task.t_step)
    # the same for every point of the row (and a whole prepare() for a battery reference)
    v_start = task.v_start if task.v_start is not None else v_scenario
    out = []
    for p_load in task.p:
        spt = point_scenario(sc, profile, v_start, task.v, p_load, t_step)
        prep = prepare(spt)
        names = [s.name for s in prep.signals]
        rec = np.empty((n, len(names)))
        ran = _call(fn, 0, n, rec, prep.args)
        out.append(_loop_cell(prep, n, ran, {k: rec[:ran, names.index(k)] for k in names},
                              task.v, task.tol_pct))
    return out


def _loop_cell(prep, n: int, ran: int, sig: dict, v_target: float, tol_pct: float) -> Cell:
    """A cell from the loop's state after a point's run: its event log (the first trip) and its
    end event, as run.execute reads them into a run's summary."""
    from hilrig.safety.interlocks import EVT_TRIP

    from ..loop import EVENT_TEXT
    a, ts = prep.args, prep.sc.Ts
    first_cause, first_t, trip = "", None, None
    for row in a["evlog"][:min(int(a["evn"][0]), a["evlog"].shape[0])]:
        if int(row[1]) == EVT_TRIP:
            first_cause = prep.table.cause_text(int(row[2]), len(prep.y_names))
            first_t = int(row[0]) * ts
            trip = {"tick": int(row[0]), "time_s": first_t, "cause": first_cause,
                    "cause_id": prep.table.cause_id(int(row[2])), "value": float(row[3])}
            break
    ev = int(a["ev"][0])
    end_event, end_t = (EVENT_TEXT[ev], int(a["ev"][1]) * ts) if ev else ("", None)
    status = _cell_status(ts, n, ran, trip, end_event, int(a["ev"][1]) if ev else None, sig)
    word = _classify_signals(n, ran, ev, first_t is not None, sig, prep.u_names[0], v_target,
                             tol_pct)
    return Cell(cell_word(status, word), first_cause, first_t, end_event, end_t)


def _v_dc_name(u_name: str) -> str:
    """The DC link that bounds a command: ``v_dc``, or a paralleled unit's own (unitK_u is
    bounded by unitK_v_dc)."""
    import re
    m = re.fullmatch(r"(unit\d+_)u", u_name)
    return f"{m.group(1)}v_dc" if m else "v_dc"


def _classify_signals(n, ran, event, tripped, sig, u_name, v_target, tol_pct) -> str:
    vdc_name = _v_dc_name(u_name)
    v_dc = sig[vdc_name][:ran] if vdc_name in sig else np.full(ran, np.inf)
    return classify(n, ran, event, tripped, sig["v_out"][:ran], sig["v_ref"][:ran],
                    sig[u_name][:ran], v_dc, v_target, tol_pct)


def step_time(sc, t_step: float | None = None) -> float:
    """When a point's reference steps to its target: ``t_step``, or 5 ms (10 % of a shorter
    run)."""
    return t_step if t_step is not None else min(5e-3, 0.1 * sc.duration)


def start_voltage(sc, v_start: float | None = None) -> float:
    """Where every point starts: ``v_start``, or the scenario's start voltage."""
    return v_start if v_start is not None else _start_voltage(sc)


def _start_voltage(sc) -> float:
    if sc.v_out0 is not None:
        return sc.v_out0
    if sc.reference.plugin.name == "profile":
        return float(sc.reference.values["points"][0][1])
    from ..run import prepare
    return prepare(sc).v0


def grid_notices(sc, grid: Grid, v_start: float | None = None) -> list[str]:
    """The notices a run gives for voltages its plant cannot reach
    (``safety.caution.unreachable_voltages``), for what the map asks: its target voltages and
    its start voltage, named as the map's user gave them."""
    from hilrig.safety.caution import unreachable_voltages

    from ..scenario import PluginChoice
    profile = _profile_plugin()
    given = ("--v-start" if v_start is not None else
             "initial.v_out" if sc.v_out0 is not None else "the scenario's reference at t = 0")
    vs = start_voltage(sc, v_start)
    notes = []
    for label, points, count in (
            ("start voltage", ((0.0, vs),), None),
            ("target voltage", ((0.0, min(grid.v)), (1.0, max(grid.v))), grid.v)):
        probe = dataclasses.replace(sc, reference=PluginChoice(plugin=profile,
                                                               values={"points": points}),
                                    v_out0=None)
        for note in unreachable_voltages(probe):
            # the run's own words, with the map's name for the value in place of the probe's
            _, rest = note.split(" = ", 1) if " = " in note else ("", note)
            where = given if label == "start voltage" else "--v-range"
            line = f"{label} ({where}) = {rest}"
            vdc = sc.plant.values.get("V_dc")
            if count is not None and vdc is not None:
                line += f" ({sum(v > vdc for v in count)} of {len(count)} target voltages)"
            notes.append(line)
    return notes


def cell_overrides(sc, controller: str, v_target: float, p_load: float,
                   v_start: float | None = None, t_step: float | None = None) -> dict[str, Any]:
    """Scenario overrides (``--set`` keys) that make ``sc`` the run of one map cell: the point's
    stepped profile reference, its constant load from t = 0, its start voltage, the candidate
    controller (its own parameters when it is not the scenario's), and SIL mode. Applied to the
    scenario, they give the scenario :func:`point_scenario` makes, value for value."""
    vs = start_voltage(sc, v_start)
    ts = step_time(sc, t_step)
    ov: dict[str, Any] = {}
    if sc.mode != "sil":
        ov["mode"] = "sil"  # every map point runs in SIL
    ov.update(_controller_override(sc.text, controller))
    if sc.design.get("v_range") is None or sc.design.get("p_range") is None:
        ov.update(pinned_overrides(sc))
    ov["reference"] = {"plugin": "profile", "points": [[0.0, vs], [ts, vs], [ts, float(v_target)]]}
    ov["load"] = {"points": [{"t": 0.0, "P": float(p_load)}]}
    ov["initial.v_out"] = vs
    return ov


def set_items(overrides: dict[str, Any]) -> list[str]:
    """Overrides as ``--set`` items (KEY=VALUE, the value in TOML's notation: floats are written
    exactly, so the run parses the same numbers)."""
    from ..scenario import _inline
    return [f"{k}={_inline(v)}" for k, v in overrides.items()]


def run_command(scenario: str, sets: list[str], overrides: dict[str, Any]) -> str:
    """The ``hilrig run`` command line that runs a cell: the map's own ``--set`` items, then
    the cell's overrides (which win where a key repeats)."""
    import shlex
    words = ["hilrig", "run", scenario]
    for item in list(sets) + set_items(overrides):
        words += ["--set", item]
    return " ".join(shlex.quote(w) for w in words)


def cell_of_run(folder: Path, v_target: float, tol_pct: float = 2.0) -> Cell:
    """Classify a recorded run (a run folder) by the map's rules: the cell a re-run gave."""
    from ..loop import EVENT_TEXT
    from ..recording import open_run
    from ..scenario import parse_scenario
    run = open_run(folder)
    s = run.summary
    if not s:
        raise ValueError(f"{folder}: no summary.json (the run did not finish)")
    sc = parse_scenario(run.attrs["scenario_text"], name=str(folder))
    u_name = ([q.name for q in sc.plant.plugin.declaration.inputs] or ["u"])[0]
    trip = s.get("trip")
    ends = [e for e in s.get("events", []) if e["event"] in set(EVENT_TEXT.values()) - {""}]
    ran = int(s["ticks_run"])
    word = _classify_signals(int(s["ticks_planned"]), ran, 1 if ends else 0, trip is not None,
                             run.signals, u_name, v_target, tol_pct)
    from ..outcome import judge
    outcome = cell_word(judge(s)["status"], word)
    return Cell(outcome, trip["cause"] if trip else "", trip["time_s"] if trip else None,
                ends[0]["event"] if ends else "", ends[0]["time_s"] if ends else None)


def tasks_for(scenario_text: str, scenario_name: str, controllers: Iterable[str], grid: Grid,
              tol_pct: float = 2.0, t_step: float | None = None,
              v_start: float | None = None, series: str = "", axis: str = "") -> list[Task]:
    return [Task(scenario_text, scenario_name, c, v, grid.p, tol_pct, t_step, v_start,
                 series, axis)
            for c in controllers for v in grid.v]


def run_envelope(tasks: list[Task], *, cluster: str | None = None, workers: int | None = None,
                 progress: Callable[[int, int], None] | None = None) -> list[list[Cell]]:
    """Run every task (grid row) and return their cells, in task order. ``progress(done,
    total)`` counts operating points, after each finished row."""
    if cluster:
        return _run_dask(tasks, cluster, progress)
    return _run_pool(tasks, workers, progress)


def warm_up(tasks: list[Task]) -> None:
    """Compile (or load) every map's loop in this process; forked workers inherit it."""
    for key in dict.fromkeys((t.scenario_text, t.controller) for t in tasks):
        _base(next(t for t in tasks if (t.scenario_text, t.controller) == key))


def _run_pool(tasks, workers, progress):
    from .pool import run_rows
    warm_up(tasks)
    return run_rows(run_row, tasks, workers or os.cpu_count() or 1, progress)


def _run_dask(tasks, address, progress):
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise ValueError("--cluster needs Dask: pip install 'hilrig[cluster]' "
                         "(dask[distributed])") from None
    client = Client(address) if isinstance(address, str) else Client(address)
    try:
        futures = client.map(run_row, tasks, pure=False)
        index = {f.key: i for i, f in enumerate(futures)}
        results: list[list[Cell] | None] = [None] * len(tasks)
        total = sum(len(t.p) for t in tasks)
        done = 0
        for fut in as_completed(futures):
            results[index[fut.key]] = fut.result()
            done += len(tasks[index[fut.key]].p)
            if progress:
                progress(done, total)
        return results
    finally:
        client.close()


#: envelope.csv's columns
CSV_COLUMNS = ("controller", "v_ref_V", "p_load_W", "outcome", "first_cause", "first_cause_time_s",
               "end_event", "end_event_time_s", "axis")


def table(tasks: list[Task], results: list[list[Cell]]) -> list[dict[str, Any]]:
    """Rows (controller, v_ref_V, p_load_W, and the cell's fields) in grid order."""
    rows = []
    for t, cells in zip(tasks, results):
        for p, c in zip(t.p, cells):
            rows.append({"controller": t.series or t.controller, "v_ref_V": t.v, "p_load_W": p,
                         **dataclasses.asdict(c), "axis": t.axis})
    return rows


def counts(rows: list[dict[str, Any]]) -> dict[str, dict[str, int]]:
    out: dict[str, dict[str, int]] = {}
    for r in rows:
        c = out.setdefault(r["controller"], {o: 0 for o in OUTCOMES})
        c[r["outcome"]] += 1
    return out


def cause_counts(rows: list[dict[str, Any]]) -> dict[str, dict[str, int]]:
    """{controller: {first trip cause: cells}} (cells that trip), most frequent first."""
    out: dict[str, dict[str, int]] = {}
    for r in rows:
        c = out.setdefault(r["controller"], {})
        if r["outcome"] == "trips":
            c[r["first_cause"]] = c.get(r["first_cause"], 0) + 1
    return {k: dict(sorted(v.items(), key=lambda kv: (-kv[1], kv[0]))) for k, v in out.items()}


def causes(rows: list[dict[str, Any]]) -> list[str]:
    """The distinct first trip causes of a map, most frequent first (then by text): the order
    of the letters and hatches that tell them apart."""
    n: dict[str, int] = {}
    for r in rows:
        if r["outcome"] == "trips":
            n[r["first_cause"]] = n.get(r["first_cause"], 0) + 1
    return sorted(n, key=lambda c: (-n[c], c))


def worst_cell(rows: list[dict[str, Any]], controller: str) -> dict[str, Any] | None:
    """A controller's worst cell: the most severe outcome (collapses, trips, saturates,
    oscillates); among equals the one with the largest load conductance P/V^2 (a constant-power
    load's destabilising incremental conductance; common practice, no source); None if every
    cell tracks."""
    bad = [r for r in rows if r["controller"] == controller and r["outcome"] != "tracks"]
    if not bad:
        return None
    return min(bad, key=lambda r: (SEVERITY.index(r["outcome"]),
                                   -r["p_load_W"] / r["v_ref_V"] ** 2))


def write_csv(rows: list[dict[str, Any]], dest: Path) -> Path:
    import csv

    def num(x):
        return "" if x is None else repr(x)
    with open(dest, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(CSV_COLUMNS))
        w.writeheader()
        for r in rows:
            w.writerow({**r, "v_ref_V": num(r["v_ref_V"]), "p_load_W": num(r["p_load_W"]),
                        "first_cause_time_s": num(r["first_cause_time_s"]),
                        "end_event_time_s": num(r["end_event_time_s"])})
    return dest


def _letters(order: list[str]) -> dict[str, str]:
    return {c: CAUSE_LETTERS[i] if i < len(CAUSE_LETTERS) else SYMBOLS["trips"]
            for i, c in enumerate(order)}


def text_map(rows: list[dict[str, Any]], controller: str,
             cause_order: list[str] | None = None) -> list[str]:
    """Lines of a compact terminal map: voltage rows (highest first), one character per power;
    a cell that trips shows its first cause's letter (:func:`cause_key`)."""
    letters = _letters(cause_order if cause_order is not None else causes(rows))
    sel = [r for r in rows if r["controller"] == controller]
    vs = sorted({r["v_ref_V"] for r in sel}, reverse=True)
    ps = sorted({r["p_load_W"] for r in sel})
    cell = {(r["v_ref_V"], r["p_load_W"]): r for r in sel}

    def sym(r):
        if r["outcome"] == "trips":
            return letters.get(r["first_cause"], SYMBOLS["trips"])
        return SYMBOLS[r["outcome"]]
    lines = []
    for v in vs:
        lines.append(f"{v:7.1f} V  " + "".join(sym(cell[(v, p)]) for p in ps))
    lines.append(f"{'':10s} P: {ps[0] / 1e3:g} .. {ps[-1] / 1e3:g} kW ->")
    return lines


def cause_key(rows: list[dict[str, Any]]) -> list[str]:
    """The terminal map's key of trip causes: one line per letter."""
    order = causes(rows)
    letters = _letters(order)
    n = {c: sum(r["outcome"] == "trips" and r["first_cause"] == c for r in rows) for c in order}
    return [f"{letters[c]} trips: {c} ({n[c]} cell{'s' if n[c] != 1 else ''})" for c in order]


#: colours of the heat map (our own choice: green good, warm colours worse)
COLOURS = {"tracks": "#3a9a4a", "oscillates": "#e0c040", "saturates": "#e08a30",
           "trips": "#8060c0", "collapses": "#c03030", "integration error": "#303030"}


def legend_label(word: str) -> str:
    """A cell word with the run outcome it stands for, for the legends: "tracks (completed)"."""
    return word if OUTCOME_WORDS[word] == word else f"{word} ({OUTCOME_WORDS[word]})"


def heat_map_figure(rows: list[dict[str, Any]], title: str = ""):
    """The heat map as a matplotlib figure: a panel per controller, a colour per outcome, and
    over each cell that trips the hatch of its first cause, listed in a second legend."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch, Rectangle

    ctrls = list(dict.fromkeys(r["controller"] for r in rows))
    vs = sorted({r["v_ref_V"] for r in rows})
    ps = sorted({r["p_load_W"] for r in rows})
    order = causes(rows)
    hatch = {c: CAUSE_HATCHES[i] for i, c in enumerate(order) if i < len(CAUSE_HATCHES)}
    cmap = ListedColormap([COLOURS[o] for o in OUTCOMES])
    fig, axes = plt.subplots(1, len(ctrls), figsize=(4.2 * len(ctrls) + 2.5, 4.4),
                             squeeze=False, constrained_layout=True)
    dv = (vs[-1] - vs[0]) / max(len(vs) - 1, 1) / 2 or 1.0
    dp = (ps[-1] - ps[0]) / max(len(ps) - 1, 1) / 2 or 1.0
    for ax, c in zip(axes[0], ctrls):
        grid = np.full((len(vs), len(ps)), np.nan)
        for r in rows:
            if r["controller"] == c:
                grid[vs.index(r["v_ref_V"]), ps.index(r["p_load_W"])] = OUTCOMES.index(r["outcome"])
                if r["outcome"] == "trips" and r["first_cause"] in hatch:
                    ax.add_patch(Rectangle(((r["p_load_W"] - dp) / 1e3, r["v_ref_V"] - dv),
                                           2 * dp / 1e3, 2 * dv, facecolor="none",
                                           edgecolor="white", linewidth=0,
                                           hatch=hatch[r["first_cause"]]))
        ax.imshow(grid, origin="lower", aspect="auto", cmap=cmap, vmin=-0.5,
                  vmax=len(OUTCOMES) - 0.5, interpolation="nearest",
                  extent=((ps[0] - dp) / 1e3, (ps[-1] + dp) / 1e3, vs[0] - dv, vs[-1] + dv))
        ax.set_title(c, fontsize=10)
        ax.set_xlabel("constant load power [kW]")
        ax.set_ylabel("target reference voltage [V]")
    fig.legend(handles=[Patch(color=COLOURS[o], label=legend_label(o)) for o in OUTCOMES],
               loc="outside right upper" if hatch else "outside right center", fontsize=8)
    if hatch:
        fig.legend(handles=[Patch(facecolor=COLOURS["trips"], edgecolor="white", hatch=h,
                                  label=c) for c, h in hatch.items()],
                   loc="outside right lower", fontsize=7, title="trips: first cause",
                   title_fontsize=8)
    if title:
        fig.suptitle(title, fontsize=10)
    return fig


def heat_map_png(rows: list[dict[str, Any]], dest: Path, title: str = "") -> Path:
    fig = heat_map_figure(rows, title)  # sets the Agg backend before pyplot is imported here
    import matplotlib.pyplot as plt
    fig.savefig(dest, dpi=90)
    plt.close(fig)
    return dest
