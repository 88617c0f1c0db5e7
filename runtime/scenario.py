"""Scenario files (TOML): what to run, validated into SI values with one clear message per error.

A scenario names the plant, controller and reference plugins with their parameters, the load
profile, the shaping filter, interlocks, timing, mode and seed. See docs/scenarios.md.

Every value may be a number (SI) or a quantity string such as ``"200 uH"``. A mistake raises
:class:`~hilrig.runtime.errors.ScenarioError` whose message names the file, the key, the value with
its unit, what was expected and, for unknown names, the closest known ones.
"""
from __future__ import annotations

import difflib
import json
import math
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from hilrig.plugins.base import ChoiceParam, Param, TableParam
from hilrig.safety import faults as fault_kinds
from hilrig.safety.faults import Fault
from hilrig.runtime.sensors import Sensor
from hilrig.safety.interlocks import (SIDE_ABOVE, SIDE_BELOW, SIDE_CROSS, SIDE_FROZEN, SIDE_MAGNITUDE,
                                      Interlock)

from . import registry, waveforms
from .errors import PluginError, ScenarioError, UnitError
from .units import parse_quantity

MODES = ("sil", "paced")
#: bridge modes are chosen on the command line (hilrig run --bridge ADDRESS --mode ...)
PLANNED_MODES = ("lockstep", "free-running")

TOP_KEYS = {"title", "description", "demo_data", "mode", "seed", "timing", "plant", "controller",
            "reference", "shaping", "load", "limits", "interlocks", "initial", "recording",
            "faults", "resets", "watchdogs", "paced", "safe_state", "sensors", "design", "units",
            "bridge"}
#: ``[design] defaults``: designed from the plant, or the plugin's declared numbers
DESIGN_DEFAULTS = ("plant", "declared")
DESIGN_DEFAULT = {"v_range": None, "p_range": None, "defaults": "plant"}
TIMING = {"Ts": ("s", 50e-6, (1e-7, 1.0)), "substeps": ("-", 4, (1, 1000)),
          "duration": ("s", 1.0, (1e-6, 1e6))}
#: sample-to-actuation delay in control periods (docs/design-notes.md, "Digital-control delay")
ACTUATION_DELAYS = (0.0, 0.5, 1.0, 1.5, 2.0)
DEFAULT_ACTUATION_DELAY = 0.0
#: the trip's safe actions (safety/interlocks.py SAFE_ACTIONS) and the default
SAFE_ACTION_NAMES = ("gate_block", "zero_voltage")
DEFAULT_SAFE_ACTION = "gate_block"
#: "adaptive": RK4 sub-steps refined where the plant is stiff (runtime/loop.py); "fixed": the
#: given substeps only, for comparison (a stiff run may then end in a plant integration error)
TIMING_CHOICES = {"integration": ("adaptive", "fixed")}
SHAPING = {"order": ("-", 5, (4, 12)), "pole": ("rad/s", 7500.0, (1.0, 1e7)),
           "slew_rate": ("V/s", 2e5, (1e-3, 1e9))}
#: [shaping] keys that default to "auto" (derived from the plant; the numbers above are the
#: fallback where the plant or the loop gives nothing to derive them from)
SHAPING_AUTO = ("pole", "slew_rate")
LIMITS = {"v_collapse": ("V", 25.0, (0.0, 1e5)), "safe_u": ("V", 0.0, (-1e5, 1e5))}
RECORDING = {"chunk": ("s", 1.0, (1e-4, 3600.0))}
RECORDING_CHOICES = {"compression": ("none", "gzip")}
LOAD_COLUMNS = {"P": "W", "R": "ohm", "I": "A"}
INTERLOCK_KEYS = {"signal", "above", "below", "magnitude_above", "frozen", "cross_check", "band",
                  "drop", "debounce", "action"}
DROP_KEYS = {"current", "R", "L"}
INTERLOCK_SIDES = ("above", "below", "magnitude_above", "frozen", "cross_check")
#: watchdogs: overrun budget 0 = off; stale limit 0 = automatic (20 periods, at least 50 ms)
WATCHDOGS = {"overrun_budget": ("s", 0.0, (0.0, 10.0)), "overrun_ticks": ("-", 1, (1, 1_000_000)),
             "stale_limit": ("s", 0.0, (0.0, 60.0)), "max_gap": ("-", 10, (1, 1_000_000)),
             "peer_timeout": ("s", 1.0, (1e-3, 600.0))}
#: paced runs: the timing limits a run is judged by (docs/scenarios.md says why these defaults)
#: and the real-time requests to the operating system (SCHED_FIFO priority; see runtime/live/paced.py)
PACED = {"miss_share_max": ("-", 0.01, (0.0, 1.0)), "max_lateness": ("s", 1e-3, (0.0, 10.0)),
         "realtime_priority": ("-", 49, (1, 99))}
PACED_FLAGS = {"realtime": True}
#: excitation: the plant's v_out state starts this far from its equilibrium (below: toward
#: collapse, the dangerous direction for a constant-power load), so that an unstable
#: equilibrium cannot pass as tracking; ``[initial] v_out_offset`` changes it, "0 V" = off
V_OUT_OFFSET_DEFAULT_TEXT = "-0.25 %"
V_OUT_OFFSET_DEFAULT = (-0.25, "%")
#: the largest offset a scenario may ask for: in percent of the start voltage, and in volts
#: (prepare() also refuses a voltage beyond V_OUT_OFFSET_MAX_PCT of the start voltage)
V_OUT_OFFSET_MAX_PCT = 10.0
V_OUT_OFFSET_MAX_V = 1e4
MAX_TICKS = 2_000_000_000
#: the deepest nesting of arrays and tables a scenario may have (its own tables need 4:
#: [[faults]] entries with a table of rows); deeper input is refused with a clear message
MAX_NESTING = 8


@dataclass
class PluginChoice:
    plugin: registry.Plugin
    values: dict[str, Any]
    #: the parameters the scenario (or an override) gives; the others are the plugin's defaults,
    #: which a controller's design may replace (runtime/analysis/design.py)
    given: frozenset = frozenset()


@dataclass
class Scenario:
    """A validated scenario: SI values only."""

    path: str
    text: str
    title: str
    description: str
    demo_data: bool
    mode: str
    seed: int
    Ts: float
    substeps: int
    duration: float
    plant: PluginChoice
    controller: PluginChoice
    reference: PluginChoice
    shaping: dict[str, float]
    load_t: np.ndarray
    load_v: np.ndarray  # (3, m): P [W], G [S], I [A]
    v_collapse: float
    safe_u: float
    interlocks: list[Interlock]
    v_out0: float | None
    #: start offset of the plant's v_out state from its equilibrium: (value, "%") in percent of
    #: the start voltage or (value, "V"); see V_OUT_OFFSET_DEFAULT and offset_volts()
    v_out_offset: tuple[float, str] = V_OUT_OFFSET_DEFAULT
    recording: dict[str, Any] = field(default_factory=dict)
    faults: list[Fault] = field(default_factory=list)
    #: times [s] at which a reset of a latched trip is requested (an operator's intended reset)
    resets: list[float] = field(default_factory=list)
    #: watchdog settings (WATCHDOGS keys, SI units)
    watchdogs: dict[str, float] = field(default_factory=lambda: {
        k: float(v[1]) for k, v in WATCHDOGS.items()})
    #: paced settings (PACED and PACED_FLAGS keys, SI units): timing limits, real-time requests
    paced: dict[str, Any] = field(default_factory=lambda: {
        **{k: v[1] for k, v in PACED.items()}, **PACED_FLAGS})
    #: "adaptive" (stiffness-aware RK4 sub-steps) or "fixed" (timing.integration)
    integration: str = "adaptive"
    #: sample-to-actuation delay [control periods] (timing.actuation_delay)
    actuation_delay: float = DEFAULT_ACTUATION_DELAY
    #: the trip's safe state: {"action": "gate_block" | "zero_voltage", "contactor_delay_s":
    #: seconds after the trip at which the output contactor opens, or None (never)}
    safe_state: dict[str, Any] = field(default_factory=lambda: {
        "action": DEFAULT_SAFE_ACTION, "contactor_delay_s": None})
    #: the overrides this run took and those it did not (a candidate of compare or envelope
    #: that lacks a controller parameter): {"applied": [{"key", "value"}], "not_applied":
    #: [{"key", "value", "reason"}]}, values in TOML's notation; summary.json keeps it
    overrides: dict[str, list] = field(default_factory=lambda: {"applied": [], "not_applied": []})
    #: the sensor chain per measured signal (``[[sensors]]``; none: exact measurements)
    sensors: list[Sensor] = field(default_factory=list)
    #: ``[design]``: the operating range a controller's defaults are designed for,
    #: {"v_range": (lo, hi) V or None, "p_range": (lo, hi) W or None, "defaults": "plant" |
    #: "declared"}; None ranges are derived from the scenario (runtime/analysis/design.py)
    design: dict[str, Any] = field(default_factory=lambda: dict(DESIGN_DEFAULT))
    #: ``[units]``: paralleled units on one bus (runtime/multi/spec.py UnitsSpec), or None
    units: Any = None

    @property
    def stale_limit_s(self) -> float:
        """The bridge staleness limit: as set, or 20 periods and at least 50 ms."""
        set_ = self.watchdogs.get("stale_limit", 0.0)
        return set_ if set_ > 0 else max(20 * self.Ts, 0.05)

    def offset_volts(self, v_start: float) -> float:
        """The start offset of v_out [V] for the start voltage ``v_start``."""
        value, unit = self.v_out_offset
        return value / 100.0 * v_start if unit == "%" else value

    @property
    def n_ticks(self) -> int:
        return int(round(self.duration / self.Ts))


class _Ctx:
    """Carries the file name for messages."""

    def __init__(self, name: str, base: Path = Path(".")):
        self.name = name
        self.base = base
        #: the keys an override gave (a plugin key unknown there is refused naming it)
        self.overridden: set[str] = set()

    def fail(self, key: str, msg: str) -> ScenarioError:
        return ScenarioError(f"{self.name}: {key}{msg}")

    def unknown(self, key: str, name: str, known) -> ScenarioError:
        known = sorted(known)
        where = f"{key}.{name}" if key else name
        return ScenarioError(f"{self.name}: unknown key {where!r}{_hint(str(name), known)} "
                             f"(allowed: {', '.join(known)})")


def _hint(name: str, known) -> str:
    """``"; did you mean 'L1'?"`` for the closest known names, or ``""`` when none is close.

    Names that differ only in case come first: difflib scores a short name such as 'l1' against
    'L1' at 0.5, below its cut-off, so it alone would suggest nothing.
    """
    known = list(known)
    same = [k for k in known if k.lower() == name.lower()]
    close = same + [c for c in difflib.get_close_matches(name, known, n=3) if c not in same]
    return f"; did you mean {', '.join(repr(c) for c in close[:3])}?" if close else ""


def load_scenario(path: str | Path, overrides: dict[str, Any] | None = None,
                  not_applied: list[dict[str, str]] | None = None) -> Scenario:
    """Read and validate a scenario file (``not_applied``: see :func:`parse_scenario`)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ScenarioError(f"scenario file {str(path)!r} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ScenarioError(f"{path}: cannot read: {exc}") from None
    return parse_scenario(text, name=path.name, path=str(path), overrides=overrides,
                          not_applied=not_applied)


def parse_scenario(text: str, name: str = "scenario.toml", path: str = "",
                   overrides: dict[str, Any] | None = None,
                   not_applied: list[dict[str, str]] | None = None) -> Scenario:
    """Validate scenario text; ``overrides`` replaces top-level sections' keys (dotted names).

    With overrides, the returned scenario's ``text`` is the scenario that runs (the file with
    them applied, headed by a comment listing them), so that a run folder records it.
    ``not_applied`` lists overrides given to the command that this scenario does not take
    (``{"key", "value", "reason"}``, from :func:`plan_candidates`): the header lists them
    apart, as not applied, and ``Scenario.overrides`` keeps both lists.
    """
    cx = _Ctx(name, Path(path).parent if path else Path("."))
    cx.overridden = set(overrides or ())
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"{name}: not valid TOML: {exc}") from None
    except RecursionError:
        # the TOML reader recurses once per nesting level of arrays and inline tables
        raise ScenarioError(f"{name}: arrays or inline tables are nested too deeply to read "
                            f"(a scenario nests at most {MAX_NESTING} levels; a table's rows "
                            f"are two, e.g. points = [[0, 400], [\"1 s\", 400]])") from None
    if not raw:
        # an empty file (or one of comments only) would run every default: an 800 V DC link
        # for 1 s with no interlocks. More likely a wrong or truncated file than a wish.
        raise ScenarioError(f"{name}: the scenario is empty (no keys). It would run the "
                            f"defaults: plant.V_dc = 800 V for 1 s with no interlocks. Write what "
                            f"to run (runtime/data/demo.toml is an example); to run the defaults "
                            f"on purpose, give the file at least a title, e.g. title = \"defaults\"")
    for dotted, value in (overrides or {}).items():
        _set_dotted(cx, raw, dotted, value)
    _check_shape(cx, raw)
    if overrides or not_applied:
        # what runs is the file with the overrides: the run folder's scenario.toml and the
        # recording's scenario_text hold that, so running them again repeats this run
        text = _effective_text(cx, raw, overrides or {}, not_applied or [])
    for k in raw:
        if k not in TOP_KEYS:
            raise cx.unknown("", k, TOP_KEYS)

    title = _str(cx, raw, "title", "")
    description = _str(cx, raw, "description", "")
    demo = raw.get("demo_data", False)
    if not isinstance(demo, bool):
        raise cx.fail("demo_data", f" = {demo!r} is not true or false")
    mode = _str(cx, raw, "mode", "sil")
    if mode not in MODES:
        if mode in PLANNED_MODES:
            raise cx.fail("mode", f" = {mode!r} is a bridge mode: run with --bridge ADDRESS "
                          f"--mode {mode} (the scenario's mode is 'sil' or 'paced')")
        close = difflib.get_close_matches(mode, MODES + PLANNED_MODES, n=2)
        hint = f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""
        raise cx.fail("mode", f" = {mode!r} is not a mode{hint} (modes: {', '.join(MODES)})")
    seed = raw.get("seed", 0)
    if isinstance(seed, bool) or not isinstance(seed, int) or not (0 <= seed < 2**63):
        raise cx.fail("seed", f" = {seed!r} is not a whole number in [0, 2^63)")

    tim = dict(_table(cx, raw, "timing"))
    delay = _actuation_delay(cx, tim.pop("actuation_delay", DEFAULT_ACTUATION_DELAY))
    timing = _section(cx, {"timing": tim}, "timing", TIMING, choices=TIMING_CHOICES)
    Ts, substeps, duration = timing["Ts"], int(timing["substeps"]), timing["duration"]
    integration = timing.get("integration", "adaptive")
    if duration / Ts > MAX_TICKS:
        raise cx.fail("timing.duration", f" = {duration:g} s is {duration / Ts:.3g} ticks at Ts = "
                      f"{Ts:g} s; at most {MAX_TICKS:g} ticks: shorten the run or lengthen Ts")
    if abs(duration / Ts - round(duration / Ts)) > 1e-6 * max(1.0, duration / Ts):
        raise cx.fail("timing.duration", f" = {duration:g} s is not a whole number of control "
                      f"periods Ts = {Ts:g} s")

    if isinstance(raw.get("plant"), dict) and "fmu" in raw["plant"]:
        # an FMU as the plant: a generated plugin calling it (runtime/fmu)
        from .fmu import spec as fmu_spec
        from .loop import cache_dir
        plant = fmu_spec.build(cx, raw, cache_dir(), lambda k, v, u, b: _quantity(cx, k, v, u, b))
    else:
        plant = _plugin(cx, raw, "plant", "two_stage_lc")
    controller = _plugin(cx, raw, "controller", "cascaded_pi")
    reference = _plugin(cx, raw, "reference", "profile")
    shaping = _shaping(cx, raw)
    if shaping["pole"] * Ts > 1.0:
        raise cx.fail("shaping.pole", f" = {shaping['pole']:g} rad/s is too fast for Ts = {Ts:g} s "
                      f"(pole * Ts = {shaping['pole'] * Ts:.2f} > 1); use at most {1.0 / Ts:g} rad/s")
    load_t, load_v = _load(cx, raw)
    limits = _section(cx, raw, "limits", LIMITS)
    units = None
    if "units" in raw:
        # paralleled units: [plant] and [controller] describe each unit; the runtime runs
        # the generated bus plant and units' controller (runtime/multi)
        from .loop import cache_dir
        from .multi import spec as units_spec
        defaults = {"plant": "two_stage_lc", "controller": "cascaded_pi"}
        plant, controller, units = units_spec.build(
            cx, raw, plant, controller, Ts, duration, seed, limits["safe_u"],
            quantity=lambda k, v, u, b, integer=False: _quantity(cx, k, v, u, b, integer=integer),
            plugin_parse=lambda r, kind, key: _plugin(cx, r, kind, defaults[kind]),
            folder=cache_dir())
    interlocks = _interlocks(cx, raw, plant, controller)
    v_out0, v_out_offset = _initial(cx, raw)
    faults = _faults(cx, raw, plant, duration, Ts)
    if integration == "fixed" or getattr(plant.plugin.module, "fast_rate", None) is None:
        _check_short_circuits(cx, faults, plant, Ts, substeps)
    resets = _resets(cx, raw, Ts, duration)
    recording = _section(cx, raw, "recording", RECORDING, choices=RECORDING_CHOICES)
    recording.setdefault("compression", "none")
    watchdogs = _section(cx, raw, "watchdogs", WATCHDOGS)
    safe_state = _safe_state(cx, raw)
    paced = _paced(cx, raw)
    sensors = _sensors(cx, raw, plant, Ts, interlocks)
    design = _design(cx, raw)
    _bridge(cx, raw, plant)
    return Scenario(path=path, text=text, title=title, description=description, demo_data=demo,
                    mode=mode, seed=seed, Ts=Ts, substeps=substeps, duration=duration,
                    plant=plant, controller=controller, reference=reference, shaping=shaping,
                    load_t=load_t, load_v=load_v, v_collapse=limits["v_collapse"],
                    safe_u=limits["safe_u"], interlocks=interlocks, v_out0=v_out0,
                    v_out_offset=v_out_offset,
                    recording=recording, faults=faults, resets=resets, watchdogs=watchdogs,
                    paced=paced, integration=integration, actuation_delay=delay,
                    safe_state=safe_state, sensors=sensors, design=design, units=units,
                    overrides={"applied": [{"key": k, "value": _inline(v)}
                                           for k, v in (overrides or {}).items()],
                               "not_applied": [dict(d) for d in not_applied or []]})


def _bridge(cx, raw: dict, plant) -> None:
    """``[bridge]``: only ``layout`` (fixed-layout datagrams, hilrig.bridge.datagram), checked
    here against the plant's signals; a run reads it from the scenario's text when asked to."""
    table = raw.get("bridge")
    if table is None:
        return
    if not isinstance(table, dict):
        raise cx.fail("bridge", f" = {table!r} is not a table")
    for k in table:
        if k != "layout":
            raise cx.unknown("bridge", k, ["layout"])
    if "layout" in table:
        from hilrig.bridge.datagram import layout_from_table, plant_names
        layout_from_table(table["layout"], *plant_names(plant), f"{cx.name}: bridge.layout")


def _check_shape(cx, raw: dict) -> None:
    """No deeper nesting than MAX_NESTING levels, and no control characters in strings (a title
    with terminal escape codes would reach the terminal raw): one clear error naming the key.
    Iterative, so that any depth the TOML reader returned is checked without recursion."""
    todo: list[tuple[str, Any, int]] = [(k, v, 1) for k, v in raw.items()]
    while todo:
        key, v, depth = todo.pop()
        if depth > MAX_NESTING:
            raise cx.fail(_printable(key), f" nests arrays or tables {depth} levels deep; a "
                          f"scenario nests at most {MAX_NESTING}")
        if isinstance(v, dict):
            for k, w in v.items():
                bad = _control_char(k)
                if bad is not None:
                    raise cx.fail(_printable(f"{key}.{k}"), f": the key holds {bad}; remove it")
                todo.append((f"{key}.{k}", w, depth + 1))
        elif isinstance(v, list):
            todo.extend((f"{key}[{i}]", w, depth + 1) for i, w in enumerate(v))
        elif isinstance(v, str):
            bad = _control_char(v)
            if bad is not None:
                raise cx.fail(_printable(key), f" holds {bad}: control characters (such as "
                              f"terminal escape codes) are not allowed in a scenario's text; "
                              f"remove it")


def _control_char(text: str) -> str | None:
    """The first control character of ``text`` (tab and newline allowed), described."""
    for i, ch in enumerate(text):
        if ch not in "\t\n" and unicodedata.category(ch) == "Cc":
            return f"the control character U+{ord(ch):04X} at position {i}"
    return None


def _printable(text: str) -> str:
    """``text`` with control characters shown as escapes (for messages)."""
    return "".join(repr(ch)[1:-1] if unicodedata.category(ch) == "Cc" else ch for ch in text)


def _effective_text(cx, raw: dict, overrides: dict[str, Any],
                    not_applied: list[dict[str, str]] = ()) -> str:
    """The scenario with overrides applied, as TOML text that parses to ``raw``.

    The file's comments and layout are not kept (the text is written from the parsed values);
    a header names the file and the overrides, and apart from them those given to the command
    that this scenario did not take, each with its reason.
    """
    import tomli_w
    try:
        body = tomli_w.dumps(raw)
        given = "\n".join(f"#   {k} = {_inline(v)}" for k, v in overrides.items()) or "#   (none)"
    except (TypeError, ValueError) as exc:
        raise ScenarioError(f"{cx.name}: an override cannot be written as TOML: {exc}") from None
    skipped = "".join(f"\n#   {d['key']} = {d['value']}: {d['reason']}" for d in not_applied)
    if skipped:
        skipped = "\n# and these overrides NOT applied (given to the command, not taken here):" + skipped
    return (f"# {cx.name} with these overrides applied (the scenario that ran; written by "
            f"hilrig from the\n# parsed values, so the file's comments and layout are not "
            f"kept):\n{given}{skipped}\n\n{body}")


def toml_literal(text: str):
    """A command-line value read as a TOML value (``2`` an integer, ``"150 uH"`` a string,
    ``[1, 2]`` an array), or the text itself when it is not one (``--set``, ``--axis``)."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def _inline(v: Any) -> str:
    """A value on one line in TOML's notation (for the header of an overridden scenario)."""
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {_inline(x)}" for k, x in v.items()) + "}"
    if isinstance(v, list):
        return "[" + ", ".join(_inline(x) for x in v) + "]"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return json.dumps(v)
    return repr(v)


def _set_dotted(cx, raw: dict, dotted: str, value: Any) -> None:
    parts = dotted.split(".")
    node = raw
    for i, p in enumerate(parts[:-1]):
        node = node.setdefault(p, {})
        if not isinstance(node, dict):
            # e.g. an override plant.L1.x = 1: plant.L1 holds a value, not a table
            raise ScenarioError(f"{cx.name}: override {dotted!r}: {'.'.join(parts[:i + 1])} is a "
                                f"{type(node).__name__}, not a table, so it has no key {parts[i + 1]!r}")
    node[parts[-1]] = value


@dataclass
class CandidatePlan:
    """How one candidate controller of ``compare`` or ``envelope`` takes the command's
    overrides: the scenario it runs, the overrides that made it (its own controller table when
    it is not the scenario's, then every override it can take) and those it cannot take."""

    scenario: Scenario
    overrides: dict[str, Any]
    not_applied: list[dict[str, str]]
    #: what else the command should tell (paralleled units: a unit's own controller table
    #: that the candidate replaces)
    notes: list[str] = field(default_factory=list)


def plan_candidates(path: str | Path, overrides: dict[str, Any] | None,
                    candidates: list[str]) -> tuple[Scenario, dict[str, CandidatePlan]]:
    """The scenario with the overrides every candidate shares, and each candidate's plan.

    Only the controller differs between candidates, so only ``controller.<param>`` overrides
    can fit some and not others: each goes to the candidates that declare ``<param>`` and is
    listed as not applied, with the reason, for the others (their scenario.toml header and
    ``Scenario.overrides``). One that no candidate takes is refused, naming the candidates'
    parameters; so is an override of ``controller`` or ``controller.plugin`` (the candidates
    are the command's to choose). Every other override is checked here with run's messages.
    Nothing runs; a mistake raises :class:`ScenarioError`.
    """
    name = Path(path).name
    overrides = dict(overrides or {})
    for k in overrides:
        if k in ("controller", "controller.plugin"):
            raise ScenarioError(
                f"{name}: override {k!r}: the candidate controllers are chosen with "
                f"--controllers, so an override cannot name one; set a controller parameter "
                f"on its own, e.g. --set controller.NAME=VALUE (it reaches the candidates "
                f"that have it)")
    params = {k: v for k, v in overrides.items() if k.startswith("controller.")}
    shared = {k: v for k, v in overrides.items() if k not in params}
    base = load_scenario(path, overrides=shared)
    own = base.controller.plugin
    first: dict[str, tuple[dict[str, Any], list[str]]] = {}
    notes: dict[str, list[str]] = {c: [] for c in candidates}
    for cand in candidates:
        ov = dict(shared)
        if base.units is not None:
            # paralleled units: [controller] is every unit's controller (the runtime's is the
            # generated units' controller), so the candidate replaces it for every unit
            ov, known = _units_candidate(path, base, cand, ov, notes[cand])
            first[cand] = (ov, known)
            continue
        if cand not in (own.name, own.origin[1]):
            # the scenario's controller parameters belong to its own controller: others run
            # with their defaults and the overrides they take
            ov["controller"] = {"plugin": cand}
        sc = load_scenario(path, overrides=ov)
        first[cand] = (ov, [p.name for p in sc.controller.plugin.declaration.params])
    for k in params:
        p = k.split(".")[1]
        if not any(p in known for _, known in first.values()):
            have = "; ".join(f"{c} has {', '.join(known) or 'no parameters'}"
                             for c, (_, known) in first.items())
            every = sorted({q for _, known in first.values() for q in known})
            raise ScenarioError(
                f"{name}: unknown key {k!r} (an override): no candidate controller has a "
                f"parameter {p!r}{_hint(p, every)} ({have}); fix the key, or leave the "
                f"override out")
    plans = {}
    for cand, (ov, known) in first.items():
        taken = {k: v for k, v in params.items() if k.split(".")[1] in known}
        skipped = [{"key": k, "value": _inline(v),
                    "reason": f"controller {cand} has no parameter {k.split('.')[1]!r}"}
                   for k, v in params.items() if k not in taken]
        ov = {**ov, **taken}
        plans[cand] = CandidatePlan(load_scenario(path, overrides=ov, not_applied=skipped),
                                    ov, skipped, notes[cand])
    return base, plans


def _units_candidate(path, base: Scenario, cand: str, ov: dict[str, Any],
                     notes: list[str]) -> tuple[dict[str, Any], list[str]]:
    """A candidate controller on a scenario of paralleled units: (its overrides, its
    parameter names). Every unit runs the candidate: the scenario's [controller] table (every
    unit's values) stays when the candidate is that controller, else the candidate runs with
    its defaults; a unit's own table [units.unitK.controller] stays when it is for the
    candidate (no plugin of its own and the candidate is [controller]'s, or the candidate's
    plugin named), else it is emptied for this candidate and ``notes`` says so."""
    raw = tomllib.loads(base.text)
    name = Path(path).name
    folder = Path(path).parent

    def ident(ref: str):
        if ref.startswith("~"):
            ref = str(Path(ref).expanduser())
        if (ref.endswith((".py", ".c")) or "/" in ref) and not Path(ref).is_absolute():
            ref = str(folder / ref)
        try:
            pl = registry.load("controller", ref)
        except PluginError as exc:
            raise ScenarioError(f"{name}: controller {ref!r}: {exc}") from None
        return pl, (pl.origin[0], str(Path(pl.origin[1]).resolve()) if pl.origin[0] == "file"
                    else pl.origin[1])

    ctab = raw.get("controller", {})
    own_ref = ctab.get("plugin", "cascaded_pi") if isinstance(ctab, dict) else "cascaded_pi"
    plugin, who = ident(cand)
    is_own = who == ident(own_ref)[1]
    if not is_own:
        ov["controller"] = {"plugin": cand}
    utab = raw.get("units", {})
    for k in range(1, base.units.count + 1):
        c_own = utab.get(f"unit{k}", {}).get("controller") if isinstance(
            utab.get(f"unit{k}"), dict) else None
        if not isinstance(c_own, dict) or not c_own:
            continue
        if "plugin" in c_own:
            keep = ident(str(c_own["plugin"]))[1] == who
        else:
            keep = is_own
        if not keep:
            ov[f"units.unit{k}.controller"] = {}
            whose = (f"its own controller {c_own['plugin']}" if "plugin" in c_own
                     else f"values for {own_ref}")
            notes.append(f"notice: candidate {cand} runs on every unit: units.unit{k}.controller "
                         f"({whose}) is left out of its run")
    return ov, [p.name for p in plugin.declaration.params]


def not_applied_lines(plans: dict[str, CandidatePlan]) -> list[str]:
    """One notice per override that some candidates do not take: which, and why."""
    keys = dict.fromkeys(d["key"] for p in plans.values() for d in p.not_applied)
    lines = []
    for k in keys:
        without = [(c, d["reason"]) for c, p in plans.items() for d in p.not_applied if d["key"] == k]
        took = [c for c in plans if c not in dict(without)]
        lines.append(f"notice: override {k} is not applied to {', '.join(c for c, _ in without)} "
                     f"({'; '.join(r for _, r in without)}); applied to {', '.join(took)}")
    return lines + [n for p in plans.values() for n in p.notes]


def _str(cx, raw, key, default):
    v = raw.get(key, default)
    if not isinstance(v, str):
        raise cx.fail(key, f" = {v!r} is not a string")
    return v


def _table(cx, raw, key) -> dict:
    v = raw.get(key, {})
    if not isinstance(v, dict):
        raise cx.fail(key, f" is a {type(v).__name__}; expected a table [{key}]")
    return v


def _quantity(cx, key, value, unit, bounds, integer=False, lower_open=False):
    try:
        q = parse_quantity(value, unit, where=key)
    except UnitError as exc:
        raise ScenarioError(f"{cx.name}: {exc}") from None
    lo, hi = bounds
    unit_txt = "" if unit == "-" else f" {unit}"
    br = "(" if lower_open else "["
    if integer and q != int(q):
        raise cx.fail(key, f" = {value!r} is not a whole number in {br}{lo:g}, {hi:g}]{unit_txt}")
    low_ok = q > lo if lower_open else q >= lo
    if not (low_ok and q <= hi):
        raise cx.fail(key, f" = {q:g}{unit_txt} is outside {br}{lo:g}, {hi:g}]{unit_txt}")
    return q


def _section(cx, raw, key, spec, choices=None) -> dict:
    tab = _table(cx, raw, key)
    choices = choices or {}
    out = {}
    for k in tab:
        if k not in spec and k not in choices:
            raise cx.unknown(key, k, list(spec) + list(choices))
    for k, (unit, default, bounds) in spec.items():
        integer = unit == "-" and isinstance(default, int)
        out[k] = _quantity(cx, f"{key}.{k}", tab.get(k, default), unit, bounds, integer=integer)
    for k, allowed in choices.items():
        if k in tab:
            if tab[k] not in allowed:
                raise cx.fail(f"{key}.{k}", f" = {tab[k]!r} is not one of {', '.join(map(repr, allowed))}")
            out[k] = tab[k]
    return out


def _paced(cx, raw) -> dict[str, Any]:
    """The ``[paced]`` table: numbers through :func:`_section`, the switches strictly true or
    false (TOML's 1 is not a yes)."""
    tab = _table(cx, raw, "paced")
    for k in tab:
        if k not in PACED and k not in PACED_FLAGS:
            raise cx.unknown("paced", k, list(PACED) + list(PACED_FLAGS))
    share = tab.get("miss_share_max")
    if isinstance(share, str) and share.strip().endswith("%"):
        raise cx.fail("paced.miss_share_max", f" = {share!r} is a percentage; write the "
                      f"fraction of ticks, e.g. 0.01 for 1 %")
    out = _section(cx, {"paced": {k: v for k, v in tab.items() if k in PACED}}, "paced", PACED)
    out["realtime_priority"] = int(out["realtime_priority"])
    for k, default in PACED_FLAGS.items():
        v = tab.get(k, default)
        if not isinstance(v, bool):
            raise cx.fail(f"paced.{k}", f" = {v!r} is not true or false")
        out[k] = v
    return out


def _plugin(cx, raw, key, default_name) -> PluginChoice:
    tab = dict(_table(cx, raw, key))
    ref = tab.pop("plugin", default_name)
    if not isinstance(ref, str):
        raise cx.fail(f"{key}.plugin", f" = {ref!r} is not a plugin name or a path")
    if ref.startswith("~"):
        ref = str(Path(ref).expanduser())
    if (ref.endswith((".py", ".c")) or "/" in ref) and not Path(ref).is_absolute():
        ref = str(cx.base / ref)
    try:
        plugin = registry.load(key, ref)
    except PluginError as exc:
        raise ScenarioError(f"{cx.name}: {key}.plugin: {exc}") from None
    decl = plugin.declaration
    if key == "reference" and "file" in tab:
        # a waveform file gives the profile's points (docs/scenarios.md, "Waveforms from files")
        tab = waveforms.reference_from_file(cx, tab, decl)
    known = [p.name for p in decl.params]
    values = decl.defaults()
    for k, v in tab.items():
        if k not in known:
            if f"{key}.{k}" in cx.overridden or key in cx.overridden:
                raise ScenarioError(
                    f"{cx.name}: unknown key '{key}.{k}' (an override): {key} {decl.name} has "
                    f"no parameter {k!r}{_hint(str(k), known)} (its parameters: "
                    f"{', '.join(known) or 'none'}); fix the key, or leave the override out")
            raise cx.unknown(key, k, known + ["plugin"])
        q = decl.param(k)
        where = f"{key}.{k}"
        if isinstance(q, Param):
            values[k] = _quantity(cx, where, v, q.unit, q.bounds, lower_open=q.lower_open)
        elif isinstance(q, ChoiceParam):
            if v not in q.choices:
                close = difflib.get_close_matches(str(v), q.choices, n=2)
                hint = f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""
                raise cx.fail(where, f" = {v!r} is not one of {', '.join(repr(c) for c in q.choices)}{hint}")
            values[k] = v
        else:
            values[k] = _table_param(cx, where, v, q)
    return PluginChoice(plugin=plugin, values=values, given=frozenset(tab))


def _table_param(cx, where, rows, q: TableParam):
    if not isinstance(rows, list) or not all(isinstance(r, list) for r in rows):
        raise cx.fail(where, f" = {rows!r} is not a list of rows [{', '.join(c for c, _ in q.columns)}]")
    if len(rows) < q.min_rows:
        raise cx.fail(where, f" has {len(rows)} rows; at least {q.min_rows} needed")
    out = []
    for i, row in enumerate(rows):
        if len(row) != len(q.columns):
            cols = ", ".join(f"{c} [{u}]" for c, u in q.columns)
            raise cx.fail(f"{where}[{i}]", f" = {row!r} has {len(row)} values; expected {len(q.columns)}: {cols}")
        vals = []
        bounds = q.column_bounds or (None,) * len(q.columns)
        for (col, unit), v, b in zip(q.columns, row, bounds):
            key = f"{where}[{i}].{col}"
            if b is None:
                try:
                    vals.append(parse_quantity(v, unit, where=key))
                except UnitError as exc:
                    raise ScenarioError(f"{cx.name}: {exc}") from None
            else:
                vals.append(_quantity(cx, key, v, unit, (b[0], b[1]), lower_open=b[2]))
        out.append(tuple(vals))
    if q.increasing_first:
        for i in range(1, len(out)):
            prev, cur = out[i - 1][0], out[i][0]
            bad = cur < prev if q.allow_equal_first else cur <= prev
            if bad:
                need = "non-decreasing" if q.allow_equal_first else "strictly increasing"
                raise cx.fail(f"{where}[{i}]", f": {q.columns[0][0]} = {cur:g} after {prev:g}; "
                              f"the {q.columns[0][0]} column must be {need}")
    return tuple(out)


def _load(cx, raw):
    tab = _table(cx, raw, "load")
    keys = ("interpolation", "points") + (waveforms.LOAD_KEYS if "file" in tab else ())
    for k in tab:
        if k not in keys:
            raise cx.unknown("load", k, keys if "file" in tab else keys + ("file",))
    interp = tab.get("interpolation", "step")
    if interp not in ("step", "linear"):
        raise cx.fail("load.interpolation", f" = {interp!r} is not 'step' or 'linear'")
    if "file" in tab:
        # a waveform file gives the points (docs/scenarios.md, "Waveforms from files")
        tab = {"points": waveforms.load_points(cx, tab, interp)}
    points = tab.get("points", [{"t": 0.0, "P": 0.0}])
    if not isinstance(points, list) or not points or not all(isinstance(p, dict) for p in points):
        raise cx.fail("load.points", " must be a non-empty array of tables [[load.points]] "
                      "with t [s] and any of P [W], R [ohm], I [A]")
    times, rows = [], []
    cur = {"P": 0.0, "G": 0.0, "I": 0.0}
    for i, pt in enumerate(points):
        where = f"load.points[{i}]"
        for k in pt:
            if k != "t" and k not in LOAD_COLUMNS:
                raise cx.unknown(where, k, ["t"] + list(LOAD_COLUMNS))
        if "t" not in pt:
            raise cx.fail(where, " has no time t [s]")
        t = _quantity(cx, f"{where}.t", pt["t"], "s", (0.0, 1e9))
        if times and t <= times[-1]:
            raise cx.fail(f"{where}.t", f" = {t:g} s is not after the previous point ({times[-1]:g} s)")
        if "P" in pt:
            cur["P"] = _quantity(cx, f"{where}.P", pt["P"], "W", (-1e8, 1e8))
        if "I" in pt:
            cur["I"] = _quantity(cx, f"{where}.I", pt["I"], "A", (-1e6, 1e6))
        if "R" in pt:
            if isinstance(pt["R"], str) and pt["R"].strip().lower() in ("inf", "open", "none"):
                cur["G"] = 0.0
            else:
                r = _quantity(cx, f"{where}.R", pt["R"], "ohm", (0.0, 1e12), lower_open=True)
                cur["G"] = 1.0 / r
        times.append(t)
        rows.append((cur["P"], cur["G"], cur["I"]))
    if times[0] > 0.0:
        # before the first point there is no load (the columns' start values), as documented;
        # the table's first row would otherwise be held back to t = 0
        times.insert(0, 0.0)
        rows.insert(0, (0.0, 0.0, 0.0))
    if interp == "step":
        # a step at t_j: hold the previous row up to t_j, then the new one (equal breakpoints)
        tt, vv = [times[0]], [rows[0]]
        for t, row in zip(times[1:], rows[1:]):
            tt += [t, t]
            vv += [vv[-1], row]
    else:
        tt, vv = times, rows
    return np.array(tt, dtype=np.float64), np.ascontiguousarray(np.array(vv, dtype=np.float64).T)


def _interlocks(cx, raw, plant: PluginChoice, controller: PluginChoice) -> list[Interlock]:
    items = raw.get("interlocks", [])
    if not isinstance(items, list) or not all(isinstance(x, dict) for x in items):
        raise cx.fail("interlocks", " must be an array of tables [[interlocks]]")
    signals = {s.name: s.unit for s in plant.plugin.declaration.outputs}
    measured = set(signals)
    signals.update({s.name: s.unit for s in controller.plugin.declaration.outputs})
    # the plant's inputs are the commands the controller writes (paralleled units: each
    # unit's command, enable, trip and correction columns)
    signals.update({s.name: s.unit for s in plant.plugin.declaration.inputs})
    # derived signals (safety/interlocks.py DERIVED) where the plant measures what they need
    if "v_out" in measured:
        if "i_out" in measured:
            signals["p_out"] = "W"
        signals["dv_out_dt"] = "V/s"
    out = []
    for i, it in enumerate(items):
        where = f"interlocks[{i}]"
        for k in it:
            if k not in INTERLOCK_KEYS:
                raise cx.unknown(where, k, INTERLOCK_KEYS)
        sig = it.get("signal")
        # a TOML array or table here is unhashable: test the type before the dict look-up
        if not isinstance(sig, str) or sig not in signals:
            hint = _hint(str(sig), signals)
            raise cx.fail(f"{where}.signal", f" = {sig!r} is not a signal of this plant or "
                          f"controller{hint} (signals: {', '.join(signals)})")
        sides = [k for k in INTERLOCK_SIDES if k in it]
        if len(sides) != 1:
            raise cx.fail(where, " needs exactly one of 'above', 'below', 'magnitude_above', "
                          "'frozen' or 'cross_check'")
        side = sides[0]
        unit = signals[sig]
        action = it.get("action", "trip")
        if action not in ("trip", "warn"):
            raise cx.fail(f"{where}.action", f" = {action!r}; write \"trip\" (latch and force the "
                          f"safe output, the default) or \"warn\" (log, never trip)")
        for k in ("band", "drop"):
            if k in it and side != "cross_check":
                raise cx.fail(f"{where}.{k}", " belongs to a cross-check; remove it or add "
                              "'cross_check' = the signal that must agree")
        if side == "frozen":
            if "debounce" in it:
                raise cx.fail(where, ": 'frozen' is itself the tick count; remove 'debounce'")
            if sig not in measured:
                raise cx.fail(f"{where}.signal", f" = {sig!r}: only a measured signal can be "
                              f"frozen (measured: {', '.join(sorted(measured))})")
            n = it["frozen"]
            if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= 1_000_000:
                raise cx.fail(f"{where}.frozen", f" = {n!r} is not a whole number of ticks in "
                              f"[1, 1000000]")
            out.append(Interlock(signal=sig, threshold=0.0, debounce=n, unit=unit,
                                 side=SIDE_FROZEN, action=action))
            continue
        if side == "cross_check":
            other = it["cross_check"]
            if not isinstance(other, str) or other not in signals or other == sig:
                hint = _hint(str(other), signals)
                raise cx.fail(f"{where}.cross_check", f" = {other!r} is not another signal of "
                              f"this plant or controller{hint} (signals: {', '.join(signals)})")
            if signals[other] != unit:
                raise cx.fail(f"{where}.cross_check", f" = {other!r} is in {signals[other]}, "
                              f"{sig} in {unit}: a cross-check compares signals of one unit")
            if "band" not in it:
                raise cx.fail(where, f": a cross-check needs 'band', the largest |{sig} - "
                              f"{other}| in {unit} that is still plausible, e.g. band = \"50 {unit}\"")
            band = _quantity(cx, f"{where}.band", it["band"], unit, (0.0, 1e9))
            drop = it.get("drop", {})
            if not isinstance(drop, dict):
                raise cx.fail(f"{where}.drop", " must be a table: drop = { current = \"i_L2\", "
                              "R = \"3 mohm\", L = \"100 uH\" }")
            for k in drop:
                if k not in DROP_KEYS:
                    raise cx.unknown(f"{where}.drop", k, DROP_KEYS)
            cur = drop.get("current", "")
            if drop and (not isinstance(cur, str) or cur not in measured
                         or signals[cur] != "A"):
                amps = sorted(n for n in measured if signals[n] == "A")
                raise cx.fail(f"{where}.drop.current", f" = {cur!r} is not a measured current "
                              f"(measured currents: {', '.join(amps) or 'none'})")
            r_ = _quantity(cx, f"{where}.drop.R", drop["R"], "ohm", (0.0, 1e6)) if "R" in drop else 0.0
            l_ = _quantity(cx, f"{where}.drop.L", drop["L"], "H", (0.0, 1e3)) if "L" in drop else 0.0
            deb = it.get("debounce", 1)
            if isinstance(deb, bool) or not isinstance(deb, int) or not 1 <= deb <= 1_000_000:
                raise cx.fail(f"{where}.debounce", f" = {deb!r} is not a whole number of ticks in [1, 1000000]")
            if drop and unit != "V":
                raise cx.fail(f"{where}.drop", f": a drop (R i + L di/dt, in V) needs voltages; "
                              f"{sig} is in {unit}")
            out.append(Interlock(signal=sig, threshold=band, debounce=deb, unit=unit,
                                 side=SIDE_CROSS, action=action, partner=other,
                                 drop_current=cur if drop else "", drop_R=r_, drop_L=l_))
            continue
        lo = 0.0 if side == "magnitude_above" else -1e9
        thr = _quantity(cx, f"{where}.{side}", it[side], unit, (lo, 1e9))
        deb = it.get("debounce", 1)
        if isinstance(deb, bool) or not isinstance(deb, int) or not 1 <= deb <= 1_000_000:
            raise cx.fail(f"{where}.debounce", f" = {deb!r} is not a whole number of ticks in [1, 1000000]")
        code = {"above": SIDE_ABOVE, "below": SIDE_BELOW, "magnitude_above": SIDE_MAGNITUDE}[side]
        out.append(Interlock(signal=sig, threshold=thr, above=side != "below", debounce=deb,
                             unit=unit, side=code, action=action))
    return out


FAULT_KEYS = {"kind", "signal", "start", "end", "value", "when", "duration"}
WHEN_KEYS = {"signal", "above", "below"}


def _check_in_run(cx, key: str, t: float, Ts: float, duration: float, what: str) -> None:
    """Refuse a fault's or a reset's time that no tick of the run reaches: the loop's ticks
    are at t = k Ts for k = 0 .. n - 1 (n = duration / Ts), and a fault or reset acts on the
    first tick at or after its time, so one after the last tick would never act, while the
    run's summary would still list the fault with its start (common practice, no source: a
    run used as proof that an interlock did or did not trip must not carry a fault that never
    happened). The stand-in simulator rounds a link fault's time to the nearest tick; the same
    rule refuses one in the last half period too. Profile and load points beyond the end stay
    allowed: they are a curve the run is a part of."""
    n = int(round(duration / Ts))
    last = (n - 1) * Ts  # the same product the loop computes for its last tick
    if not t <= last:
        raise cx.fail(key, f" = {t:g} s is after the run's last tick at {last:g} s "
                      f"(timing.duration = {duration:g} s at Ts = {Ts:g} s): {what}; move it into "
                      f"the run or lengthen timing.duration")


def _first_tick_at_or_after(t: float, Ts: float) -> int:
    """The smallest k with k * Ts >= t, computed with the loop's own product k * Ts."""
    k = max(0, int(math.ceil(t / Ts)))
    while k > 0 and (k - 1) * Ts >= t:
        k -= 1
    while k * Ts < t:
        k += 1
    return k


def _check_window(cx, where: str, start: float, end: float, Ts: float) -> None:
    """Refuse a timed fault whose window [start, end) holds no tick: the loop applies a fault
    on the ticks with start <= k Ts < end, so a window inside one period never acts, while the
    summary would list the fault (the rule of :func:`_check_in_run`; common practice, no
    source). The stand-in simulator times link faults by rounding, so those are not checked."""
    k = _first_tick_at_or_after(start, Ts)
    if not k * Ts < end:
        raise cx.fail(f"{where}.end", f" = {end:g} s: the fault's window from {start:g} s holds "
                      f"no tick (ticks at k Ts, Ts = {Ts:g} s; the first at or after the start "
                      f"is at {k * Ts:g} s), so the fault would never act; widen it to at "
                      f"least one tick")


def _resets(cx, raw, Ts: float, duration: float) -> list[float]:
    """The requested reset times [s], sorted; each one inside the run."""
    resets_raw = raw.get("resets", [])
    if not isinstance(resets_raw, list):
        raise cx.fail("resets", f" = {resets_raw!r} is not a list of times, e.g. [\"0.3 s\"]")
    out = []
    for i, v in enumerate(resets_raw):
        t = _quantity(cx, f"resets[{i}]", v, "s", (0.0, 1e9))
        _check_in_run(cx, f"resets[{i}]", t, Ts, duration, "the reset would never be requested")
        out.append(t)
    return sorted(out)


def _faults(cx, raw, plant: PluginChoice, duration: float, Ts: float) -> list[Fault]:
    items = raw.get("faults", [])
    if not isinstance(items, list) or not all(isinstance(x, dict) for x in items):
        raise cx.fail("faults", " must be an array of tables [[faults]]")
    signals = {sg.name: sg.unit for sg in plant.plugin.declaration.outputs}
    out = []
    for i, it in enumerate(items):
        where = f"faults[{i}]"
        for k in it:
            if k not in FAULT_KEYS:
                raise cx.unknown(where, k, FAULT_KEYS)
        kind = it.get("kind")
        if kind not in fault_kinds.KINDS:
            close = difflib.get_close_matches(str(kind), fault_kinds.KINDS, n=2)
            hint = f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""
            raise cx.fail(f"{where}.kind", f" = {kind!r} is not a fault kind{hint} "
                          f"(kinds: {', '.join(fault_kinds.KINDS)})")
        when = it.get("when")
        if when is not None and kind in fault_kinds.LINK_KINDS:
            raise cx.fail(f"{where}.when", f": a {kind} fault acts on the link to the simulator "
                          f"on a schedule; give start (and end), not a condition")
        if when is not None and not isinstance(when, dict):
            raise cx.fail(f"{where}.when", f" = {when!r} is not a table such as "
                          f"{{ signal = \"v_out\", above = \"450 V\" }}")
        if "start" not in it and when is None:
            raise cx.fail(where, " has no start time [s] (or a 'when' condition)")
        start = _quantity(cx, f"{where}.start", it.get("start", 0.0), "s", (0.0, 1e9))
        _check_in_run(cx, f"{where}.start", start, Ts, duration,
                      "the fault would never act" if when is None
                      else "the fault's condition would never be watched")
        end = math.inf
        cond = {}
        if when is not None:
            for k in when:
                if k not in WHEN_KEYS:
                    raise cx.unknown(f"{where}.when", k, WHEN_KEYS)
            wsig = when.get("signal")
            if not isinstance(wsig, str) or wsig not in signals:
                raise cx.fail(f"{where}.when.signal", f" = {wsig!r} is not a measured signal of "
                              f"this plant{_hint(str(wsig), signals)} (signals: {', '.join(signals)})")
            if ("above" in when) == ("below" in when):
                raise cx.fail(f"{where}.when", " needs exactly one of 'above' or 'below'")
            wside = "above" if "above" in when else "below"
            cond = dict(when_signal=wsig, when_side=wside,
                        when_threshold=_quantity(cx, f"{where}.when.{wside}", when[wside],
                                                 signals[wsig], (-1e9, 1e9)))
            if "end" in it:
                raise cx.fail(f"{where}.end", ": a conditional fault has no fixed end; give its "
                              "'duration' instead")
            if "duration" in it:
                cond["duration"] = _quantity(cx, f"{where}.duration", it["duration"], "s",
                                             (0.0, 1e9), lower_open=True)
        elif "duration" in it:
            raise cx.fail(f"{where}.duration", ": only a conditional fault (with 'when') takes "
                          "a duration; a timed one has 'end'")
        if "end" in it:
            end = _quantity(cx, f"{where}.end", it["end"], "s", (0.0, 1e9))
            if not end > start:
                raise cx.fail(f"{where}.end", f" = {end:g} s is not after start = {start:g} s")
            if kind not in fault_kinds.LINK_KINDS:
                _check_window(cx, where, start, end, Ts)
        signal = it.get("signal", "")
        if kind in fault_kinds.SENSOR_KINDS:
            if signal not in signals:
                close = difflib.get_close_matches(str(signal), list(signals), n=3)
                hint = f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""
                raise cx.fail(f"{where}.signal", f" = {signal!r} is not a measured signal of this "
                              f"plant{hint} (signals: {', '.join(signals)})")
        elif "signal" in it:
            target = ("load" if kind in fault_kinds.LOAD_KINDS else "link to the simulator"
                      if kind in fault_kinds.LINK_KINDS else "controller output")
            raise cx.fail(f"{where}.signal", f": a {kind} fault acts on the {target}, "
                          f"not on a signal; remove the key")
        unit = fault_kinds.VALUE_UNITS[kind]
        value = 0.0
        if unit is None:
            if "value" in it:
                raise cx.fail(f"{where}.value", f": a {kind} fault takes no value; remove the key")
        else:
            if "value" not in it:
                raise cx.fail(where, f" ({kind}) needs a value")
            unit = unit or signals[signal]
            lo, lower_open = ((0.0, True) if kind in ("short_circuit", "noise", "overrun",
                                                      "link_loss")
                              else (0.0, False) if kind == "link_delay" else (-1e9, False))
            value = _quantity(cx, f"{where}.value", it["value"], unit,
                              (lo, 0.999 if kind == "link_loss" else 10.0 if kind == "link_delay"
                               else 1e9), lower_open=lower_open)
        out.append(Fault(kind=kind, start=start, end=end, signal=signal, value=value, **cond))
    return out


def _actuation_delay(cx, v) -> float:
    """``timing.actuation_delay``: a number of control periods, one of ACTUATION_DELAYS."""
    if isinstance(v, str) and v.strip().lower() == "none":
        return 0.0
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise cx.fail("timing.actuation_delay", f" = {v!r} is not a number of control periods "
                      f"(one of {', '.join(f'{d:g}' for d in ACTUATION_DELAYS)}, e.g. 1 for one "
                      f"period, 0.5 for the PWM update at mid-period)")
    if float(v) not in ACTUATION_DELAYS:
        raise cx.fail("timing.actuation_delay", f" = {v!r} periods is not one of "
                      f"{', '.join(f'{d:g}' for d in ACTUATION_DELAYS)} (half periods up to two)")
    return float(v)


def _safe_state(cx, raw) -> dict[str, Any]:
    """The ``[safe_state]`` table: what a trip does to the converter (``action``) and whether an
    output contactor opens after it (``contactor_delay``, a time; absent or "never": never)."""
    tab = _table(cx, raw, "safe_state")
    for k in tab:
        if k not in ("action", "contactor_delay"):
            raise cx.unknown("safe_state", k, ["action", "contactor_delay"])
    action = tab.get("action", DEFAULT_SAFE_ACTION)
    if action not in SAFE_ACTION_NAMES:
        close = difflib.get_close_matches(str(action), SAFE_ACTION_NAMES, n=1)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        raise cx.fail("safe_state.action", f" = {action!r} is not a safe action{hint} "
                      f"(one of {', '.join(map(repr, SAFE_ACTION_NAMES))})")
    cd = tab.get("contactor_delay", "never")
    if isinstance(cd, str) and cd.strip().lower() == "never":
        delay = None
    else:
        delay = _quantity(cx, "safe_state.contactor_delay", cd, "s", (0.0, 3600.0))
    return {"action": action, "contactor_delay_s": delay}


def _check_short_circuits(cx, faults, plant: PluginChoice, Ts: float, substeps: int) -> None:
    """A short circuit across the output capacitance is a fast pole (tau = R C): explicit RK4
    needs substeps no longer than tau / 2, or the integration rings and the recorded voltage
    is an artefact (it can even rise). With fixed sub-steps (timing.integration = "fixed", or a
    plant without the ``fast_rate`` kernel) refuse such a scenario with the fix; the adaptive
    integration shortens its steps by itself."""
    vals = plant.values
    cap = next((vals[k] for k in ("C2", "C") if isinstance(vals.get(k), float)), None)
    if cap is None:
        return
    for i, f in enumerate(faults):
        if f.kind != "short_circuit":
            continue
        tau = f.value * cap
        need = math.ceil(2.0 * Ts / tau)
        if substeps < need:
            raise cx.fail(f"faults[{i}].value", f" = {f.value:g} ohm across the output "
                          f"capacitance ({cap:g} F) has a time constant of {tau * 1e6:.3g} us; "
                          f"the plant's RK4 substeps ({Ts / substeps * 1e6:.3g} us) must not be "
                          f"longer than half of it: set timing.substeps to at least {need}")


def _shaping(cx, raw) -> dict[str, Any]:
    """``[shaping]``: order, pole and slew rate. ``pole`` and ``slew_rate`` may be ``"auto"``
    (their default): derived from the plant and the controller's loop when the scenario is
    prepared (runtime/analysis/design.py ``shaping_from_plant``); until then they hold
    SHAPING's fixed numbers, and ``from_plant`` names the keys to derive."""
    tab = dict(_table(cx, raw, "shaping"))
    auto = [k for k in SHAPING_AUTO if tab.get(k, "auto") == "auto"]
    for k in auto:
        tab.pop(k, None)
    out = _section(cx, {"shaping": tab}, "shaping", SHAPING)
    out["order"] = int(out["order"])
    out["from_plant"] = auto
    return out


def _design(cx, raw) -> dict[str, Any]:
    """``[design]``: the operating range that the controller's defaults are designed for
    (``v_range = ["300 V", "500 V"]``, ``p_range = ["-40 kW", "80 kW"]``, constant load power,
    negative = regeneration) and where the defaults come from: ``defaults = "plant"`` (designed
    from the plant, the control period and the range; the default) or ``"declared"`` (the
    plugin's declared numbers as they are)."""
    tab = _table(cx, raw, "design")
    keys = ["v_range", "p_range", "defaults"]
    for k in tab:
        if k not in keys:
            raise cx.unknown("design", k, keys)
    out = dict(DESIGN_DEFAULT)
    for k, unit, lo_bound in (("v_range", "V", 0.0), ("p_range", "W", -1e9)):
        if k not in tab:
            continue
        v = tab[k]
        if not isinstance(v, list) or len(v) != 2:
            raise cx.fail(f"design.{k}", f" = {v!r} is not a pair [low, high], e.g. "
                          + ('["300 V", "500 V"]' if unit == "V" else '["-40 kW", "80 kW"]'))
        lo = _quantity(cx, f"design.{k}", v[0], unit, (lo_bound, 1e9))
        hi = _quantity(cx, f"design.{k}", v[1], unit, (lo_bound, 1e9))
        if not hi >= lo:
            raise cx.fail(f"design.{k}", f" = {v!r}: the high end is below the low end")
        out[k] = (lo, hi)
    d = tab.get("defaults", out["defaults"])
    if d not in DESIGN_DEFAULTS:
        raise cx.fail("design.defaults", f" = {d!r} is not one of "
                      f"{', '.join(repr(c) for c in DESIGN_DEFAULTS)}")
    out["defaults"] = d
    return out


def _initial(cx, raw):
    """``[initial]``: the start voltage (None = auto) and the start offset of the plant's v_out
    state from its equilibrium, ``(value, "%")`` in percent of the start voltage or
    ``(value, "V")`` (see :data:`V_OUT_OFFSET_DEFAULT`)."""
    tab = _table(cx, raw, "initial")
    for k in tab:
        if k not in ("v_out", "v_out_offset"):
            raise cx.unknown("initial", k, ["v_out", "v_out_offset"])
    offset = _v_out_offset(cx, tab.get("v_out_offset", V_OUT_OFFSET_DEFAULT_TEXT))
    v = tab.get("v_out", "auto")
    if v == "auto":
        return None, offset
    q = _quantity(cx, "initial.v_out", v, "V", (0.0, 1e5))
    if not math.isfinite(q):
        raise cx.fail("initial.v_out", " is not finite")
    return q, offset


def _v_out_offset(cx, value) -> tuple[float, str]:
    """``initial.v_out_offset``: ``"-0.25 %"`` (percent of the start voltage) or a voltage
    (``"-0.5 V"``, a bare number in volts); 0 switches the excitation off."""
    key = "initial.v_out_offset"
    lim_pct, lim_v = V_OUT_OFFSET_MAX_PCT, V_OUT_OFFSET_MAX_V
    fix = (f"write a percentage of the start voltage such as \"-0.25 %\" (at most "
           f"{lim_pct:g} % either way) or a voltage such as \"-0.5 V\"; \"0 V\" starts "
           f"exactly at the equilibrium")
    if isinstance(value, str) and value.strip().endswith("%"):
        text = value.strip()[:-1].strip()
        try:
            q = parse_quantity(text, "-", where=key)
        except UnitError:
            raise cx.fail(key, f" = {value!r} is not a percentage; {fix}") from None
        if not abs(q) <= lim_pct:
            raise cx.fail(key, f" = {value!r} is outside [-{lim_pct:g}, {lim_pct:g}] % of the "
                          f"start voltage; {fix}")
        return q, "%"
    try:
        q = parse_quantity(value, "V", where=key)
    except UnitError:
        raise cx.fail(key, f" = {value!r} is neither a percentage nor a voltage; {fix}") from None
    if not abs(q) <= lim_v:
        raise cx.fail(key, f" = {q:g} V is outside [-{lim_v:g}, {lim_v:g}] V; {fix}")
    return q, "V"


SENSOR_KEYS = {"signal", "cutoff", "bits", "range", "sample_offset", "offset"}


def _sensors(cx, raw, plant: PluginChoice, Ts: float, interlocks: list[Interlock]) -> list[Sensor]:
    """The ``[[sensors]]`` entries: per measured signal at most one chain of a sample offset
    [s], a first-order anti-alias filter (``cutoff`` [Hz]), a constant ``offset`` and an ideal
    ADC (``bits`` over ``range`` = [lo, hi], the signal's unit); see runtime/sensors.py. An
    interlock limit that the ADC's readings can never pass is refused: it could never trip."""
    items = raw.get("sensors", [])
    if not isinstance(items, list) or not all(isinstance(x, dict) for x in items):
        raise cx.fail("sensors", " must be an array of tables [[sensors]], e.g. [[sensors]] "
                      "signal = \"v_out\" cutoff = \"20 kHz\"")
    signals = {sg.name: sg.unit for sg in plant.plugin.declaration.outputs}
    out: list[Sensor] = []
    for i, it in enumerate(items):
        where = f"sensors[{i}]"
        for k in it:
            if k not in SENSOR_KEYS:
                raise cx.unknown(where, k, SENSOR_KEYS)
        sig = it.get("signal")
        if not isinstance(sig, str) or sig not in signals:
            raise cx.fail(f"{where}.signal", f" = {sig!r} is not a measured signal of this "
                          f"plant{_hint(str(sig), signals)} (signals: {', '.join(signals)})")
        if any(s.signal == sig for s in out):
            first = next(j for j, s in enumerate(out) if s.signal == sig)
            raise cx.fail(f"{where}.signal", f" = {sig!r} already has a chain in "
                          f"sensors[{first}]; a signal has one chain: merge the two entries")
        unit = signals[sig]
        if not (SENSOR_KEYS - {"signal"}) & set(it):
            raise cx.fail(where, f" ({sig}) declares no part of a chain: give cutoff, bits "
                          f"and range, sample_offset or offset, or remove the entry")
        cutoff = (_quantity(cx, f"{where}.cutoff", it["cutoff"], "Hz", (0.0, 1e12),
                            lower_open=True) if "cutoff" in it else 0.0)
        soff = (_quantity(cx, f"{where}.sample_offset", it["sample_offset"], "s", (0.0, Ts))
                if "sample_offset" in it else 0.0)
        offset = (_quantity(cx, f"{where}.offset", it["offset"], unit, (-1e9, 1e9))
                  if "offset" in it else 0.0)
        bits, lo, hi = 0, 0.0, 0.0
        if ("bits" in it) != ("range" in it):
            have, miss = ("bits", "range") if "bits" in it else ("range", "bits")
            raise cx.fail(where, f" ({sig}) has {have!r} but no {miss!r}: an ADC needs both, "
                          f"e.g. bits = 12, range = [\"0 {unit}\", \"1000 {unit}\"]")
        if "bits" in it:
            bits = it["bits"]
            if isinstance(bits, bool) or not isinstance(bits, int) or not 1 <= bits <= 32:
                raise cx.fail(f"{where}.bits", f" = {bits!r} is not a whole number of bits in "
                              f"[1, 32]")
            rng = it["range"]
            if not isinstance(rng, list) or len(rng) != 2:
                raise cx.fail(f"{where}.range", f" = {rng!r} is not [lo, hi], e.g. "
                              f"[\"0 {unit}\", \"1000 {unit}\"]")
            lo = _quantity(cx, f"{where}.range[0]", rng[0], unit, (-1e9, 1e9))
            hi = _quantity(cx, f"{where}.range[1]", rng[1], unit, (-1e9, 1e9))
            if not hi > lo:
                why = ("is empty: the upper end must be above the lower one" if hi == lo else
                       f"is reversed: write the lower end first, [{hi:g} {unit}, {lo:g} {unit}]")
                raise cx.fail(f"{where}.range", f" = [{lo:g}, {hi:g}] {unit} {why}")
        out.append(Sensor(signal=sig, cutoff=cutoff, bits=bits, lo=lo, hi=hi,
                          sample_offset=soff, offset=offset))
    # a limit beyond every reading of the ADC never trips (an out-of-range input reads as the
    # end code): refuse it rather than run an interlock that cannot act
    adc = {s.signal: s for s in out if s.bits}
    for k, il in enumerate(interlocks):
        s = adc.get(il.signal)
        if s is None or il.side not in (SIDE_ABOVE, SIDE_BELOW, SIDE_MAGNITUDE):
            continue
        top = s.hi - s.lsb
        never = (il.threshold >= top if il.side == SIDE_ABOVE
                 else il.threshold <= s.lo if il.side == SIDE_BELOW
                 else il.threshold >= max(abs(s.lo), abs(top)))
        if never:
            j = next(n for n, x in enumerate(out) if x.signal == il.signal)
            raise cx.fail(f"sensors[{j}].range", f" = [{s.lo:g}, {s.hi:g}] {il.unit}: interlock "
                          f"{il.describe()} can never trip, since the ADC reads at most "
                          f"{top:g} {il.unit} and at least {s.lo:g} {il.unit}; widen the range "
                          f"beyond the limit")
    return out
