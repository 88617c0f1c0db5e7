"""Running a scenario in SIL: build parameter arrays, compile (or load) the loop, run it chunk
by chunk, record every tick and summarise. Python runs only between chunks.
"""
from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import platform
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np

from hilrig.plugins.base import LOAD_SIGNALS, REFERENCE_SIGNALS, BuildContext
from hilrig.safety.faults import LINK_KINDS, table as fault_table, true_signals
from hilrig.safety.interlocks import (DERIVED, EVENT_NAMES, EVT_RESET_IDLE, EVT_TRIP,
                                      InterlockTable,
                                      new_event_log, new_latch, new_watchdog)

from . import loop as loopgen
from . import sensors
from . import shaping
from .errors import PluginError, ScenarioError
from .trials.metrics import TrackingMetrics, band_check, segment_metrics, withhold_metrics
from .outcome import COLLAPSE, INTEGRATION_ERROR, INTEGRATION_ERRORS, judge, time_text
from .recording import SCENARIO, SUMMARY, RunWriter, SignalSpec, clear_derived, dumps_json
from .scenario import PluginChoice, Scenario
from .version import installed as installed_version


#: set by the command line's Ctrl-C handler; the chunk driver ends the run in order at the next
#: chunk boundary (a KeyboardInterrupt raised wherever Python happens to be, e.g. inside a
#: library callback, can be swallowed there)
INTERRUPTED = threading.Event()


@dataclass
class RunResult:
    folder: Path
    summary: dict[str, Any]


@dataclass
class Prepared:
    """Everything the compiled loop needs, allocated once."""

    sc: Scenario
    args: dict[str, Any]
    signals: list[SignalSpec]
    table: InterlockTable
    y_names: list[str]
    u_names: list[str]
    v0: float
    #: the start offset applied to the plant's v_out state [V] (0: an exact equilibrium start)
    v_out_offset: float = 0.0
    #: the controller's design from the plant (runtime/analysis/design.py), for the run record;
    #: None when the controller has no design hook
    design: dict[str, Any] | None = None
    #: the build context the parameter arrays were made with (for a design or tuning that
    #: packs the controller again)
    ctx: Any = None
    #: the reference shaping derived from the plant ("auto" keys of [shaping]), for the record
    shaping: dict[str, Any] | None = None


def process_age_s() -> float | None:
    """Seconds since this process started (Linux /proc; None elsewhere). 10 ms resolution."""
    try:
        import os
        with open(f"/proc/{os.getpid()}/stat") as fh:
            start_ticks = int(fh.read().rsplit(")", 1)[1].split()[19])
        with open("/proc/uptime") as fh:
            uptime = float(fh.read().split()[0])
        return uptime - start_ticks / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return None


def versions() -> dict[str, str]:
    import h5py
    import numba
    return {"hilrig": installed_version(), "numba": numba.__version__, "numpy": np.__version__,
            "h5py": h5py.__version__, "python": platform.python_version()}


def _resolve_reads(choice: PluginChoice, outputs: list[str]) -> np.ndarray:
    decl = choice.plugin.declaration
    fallbacks = getattr(choice.plugin.module, "READ_FALLBACKS", {})
    idx = []
    for name in decl.reads:
        if name in outputs:
            idx.append(outputs.index(name))
        elif name in fallbacks and fallbacks[name] in outputs:
            idx.append(outputs.index(fallbacks[name]))
        else:
            raise ScenarioError(
                f"{decl.kind} {decl.name!r} reads {name!r}, which plant outputs do not include "
                f"(plant signals: {', '.join(outputs)}); choose a plant that measures it")
    return np.array(idx, dtype=np.int64)


def _initial_v_out(sc: Scenario, pp, pr, iyr, n_xr, outputs) -> float:
    """Fixed point of v = reference(t=0, plant at equilibrium v): the run starts settled."""
    plant = sc.plant.plugin
    ref = sc.reference.plugin.module
    d0 = sc.load_v[:, 0].copy()
    y = np.zeros(len(outputs))
    u = np.zeros(len(plant.declaration.inputs) or 1)
    w = np.zeros(1)
    v = 400.0 if sc.v_out0 is None else sc.v_out0
    if sc.v_out0 is not None:
        return v
    for _ in range(60):
        x = plant.declaration.equilibrium(sc.plant.values, v, d0)
        plant.module.outputs(0.0, pp, x, u, d0, y)
        xr = np.zeros(max(n_xr, 1))
        ref.init(pr, xr, y[iyr])
        ref.step(0.0, sc.Ts, pr, xr, y[iyr], w)
        if not np.isfinite(w[0]) or w[0] <= 0.0:
            raise ScenarioError(f"{Path(sc.path).name or 'scenario'}: the reference at t = 0 is "
                                f"{w[0]:g} V; set [initial] v_out or fix the reference")
        if abs(w[0] - v) < 1e-9:
            break
        v = float(w[0])
    return float(w[0])


def build_context(sc: Scenario) -> BuildContext:
    """What the plugins' build hooks see of the scenario (the design range is set later)."""
    pdecl = sc.plant.plugin.declaration
    return BuildContext(Ts=sc.Ts, plant=dict(sc.plant.values), plant_name=pdecl.name,
                        plant_outputs=tuple(s.name for s in pdecl.outputs),
                        plant_states=tuple(s.name for s in pdecl.states),
                        plant_module=sc.plant.plugin.module, actuation_delay=sc.actuation_delay)


def start_voltage(sc: Scenario) -> float:
    """The run's start voltage [V] (``[initial] v_out``, or the reference at t = 0 with the
    plant settled on it), without preparing the controller."""
    if sc.v_out0 is not None:
        return float(sc.v_out0)
    pdecl = sc.plant.plugin.declaration
    ctx = build_context(sc)
    outputs = [s.name for s in pdecl.outputs]
    try:
        pp = pdecl.pack(sc.plant.values, ctx)
        pr = sc.reference.plugin.declaration.pack(sc.reference.values, ctx)
    except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
        raise ScenarioError(f"{Path(sc.path).name or 'scenario'}: {exc}") from None
    iyr = _resolve_reads(sc.reference, outputs)
    n_xr = max(sc.reference.plugin.declaration.state_count(sc.reference.values), 1)
    return _initial_v_out(sc, pp, pr, iyr, n_xr, outputs)


def integration_plan(sc: Scenario) -> dict[str, Any]:
    """How the embedded plant is integrated (runtime/loop.py; docs/design-notes.md).

    Adaptive (the default): the substeps per period are the scenario's, raised if needed so
    that Ts / substeps times the plant's ``linear_rate`` bound stays within Z_LINEAR; each
    substep is refined where the plant's ``fast_rate`` asks for it. Fixed: the scenario's
    substeps, never refined. A plant without ``linear_rate`` / ``fast_rate`` keeps its
    substeps / is never refined."""
    mod = sc.plant.plugin.module
    asked = int(sc.substeps)
    adaptive = sc.integration == "adaptive"
    lin = getattr(mod, "linear_rate", None)
    rate = float(lin(dict(sc.plant.values))) if lin is not None else None
    n = asked
    if adaptive and rate is not None and math.isfinite(rate) and rate > 0:
        n = max(asked, int(math.ceil(sc.Ts * rate / loopgen.Z_LINEAR - 1e-9)))
    refine = adaptive and loopgen.has_fast_rate(sc.plant.plugin)
    if loopgen.has_advance_period(sc.plant.plugin):
        # the plant integrates each period itself (its own instants and step rule): the loop's
        # substeps and refinement do not apply; the energy check still does
        return {"method": "the plant's own (advance_period)", "rule": "plant",
                "substeps_asked": asked, "substeps": asked, "linear_rate_per_s": rate,
                "z_linear": None, "refines_stiff_steps": False, "z_fast": math.inf,
                "energy_check": loopgen.has_energy_check(sc.plant.plugin)}
    return {"method": "RK4", "rule": "adaptive" if adaptive else "fixed",
            "substeps_asked": asked, "substeps": n, "linear_rate_per_s": rate,
            "z_linear": loopgen.Z_LINEAR if adaptive else None,
            "refines_stiff_steps": refine, "z_fast": loopgen.Z_FAST if refine else math.inf,
            "energy_check": loopgen.has_energy_check(sc.plant.plugin)}


def safe_action_applied(sc: Scenario) -> str:
    """The safe action a trip applies to this scenario's plant: gate_block needs a plant that
    models blocked gates (``GATE_BLOCK_CURRENTS``); any other gets safe_u (zero voltage)."""
    if sc.safe_state["action"] == "gate_block" and not loopgen.gate_block_currents(sc.plant.plugin):
        return "zero_voltage (the plant does not model blocked gates)"
    return sc.safe_state["action"]


def integration_error(ev: np.ndarray, kk: int, ts: float) -> dict[str, Any]:
    """The details of a plant integration error (loop event slots, runtime/loop.py)."""
    why = int(ev[loopgen.EV_REASON])
    reason = loopgen.INTEGRATION_REASONS.get(why, "the plant state is not finite")
    out: dict[str, Any] = {"reason": reason}
    if why == loopgen.WHY_ENERGY:
        e0, e1, lim = (float(ev[loopgen.EV_E_BEFORE]), float(ev[loopgen.EV_E_AFTER]),
                       float(ev[loopgen.EV_E_LIMIT]))
        out.update(energy_before_J=e0, energy_after_J=e1, energy_limit_J=lim)
        reason += f" ({e0:.4g} J -> {e1:.4g} J, at most {lim:.4g} J)"
    elif why == loopgen.WHY_SUBSTEPS:
        reason += f" ({loopgen.MAX_REFINE:,})"
    out["detail"] = f"tick {kk} (t = {kk * ts:.6g} s): {reason}"
    return out


def integration_summary(a: dict) -> dict[str, Any] | None:
    """The run's integration plan and what it did: how many refined sub-steps, first where."""
    plan = a.get("_integration")
    if plan is None:
        return None
    ev = a["ev"]
    first = int(ev[loopgen.EV_FIRST_REFINED]) - 1
    return {**plan, "z_fast": plan["z_fast"] if math.isfinite(plan["z_fast"]) else None,
            "refined_steps": int(ev[loopgen.EV_REFINED]),
            "first_refined_tick": first if first >= 0 else None}


def prepare(sc: Scenario) -> Prepared:
    units_design = units_shaping = None
    if sc.units is not None:
        # paralleled units: each unit's controller designed for its own plant and share, the
        # shaping from the units (runtime/multi/design.py)
        from .multi import design as mdes
        sc, units_design, units_shaping = mdes.design_units(sc)
    plant, ctrl, ref = sc.plant, sc.controller, sc.reference
    pdecl = plant.plugin.declaration
    outputs = [s.name for s in pdecl.outputs]
    ctx = build_context(sc)
    where = Path(sc.path).name if sc.path else "scenario"

    def pack(key, choice):
        try:
            return choice.plugin.declaration.pack(choice.values, ctx)
        except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
            # a design step that fails (a pole count, an unstabilisable operating point) is a
            # scenario mistake: name the file and the section
            raise ScenarioError(f"{where}: [{key}] {choice.plugin.name}: {exc}") from None

    pp = pack("plant", plant)
    pr = pack("reference", ref)
    iyc = _resolve_reads(ctrl, outputs)
    iyr = _resolve_reads(ref, outputs)
    n_xr = max(ref.plugin.declaration.state_count(ref.values), 1)
    nu = max(len(pdecl.inputs), 1)
    u_names = [s.name for s in pdecl.inputs] or ["u"]
    v0 = _initial_v_out(sc, pp, pr, iyr, n_xr, outputs)
    # the controller: its defaults designed for this plant over the design range, unless the
    # scenario says [design] defaults = "declared" (runtime/analysis/design.py)
    from .analysis import design as dmod
    rng, rng_from = dmod.scenario_range(sc, v0)
    ctx.design_range = rng
    if sc.design["defaults"] == "plant":
        cands, designed = dmod.candidates(ctrl, ctx)
    else:
        cands, designed = [dict(ctrl.values)], []
    pc, first_error = None, None
    for i, cand in enumerate(cands):
        try:
            pc = pack("controller", PluginChoice(plugin=ctrl.plugin, values=cand, given=ctrl.given))
            cands = cands[i:]
            break
        except ScenarioError as exc:
            first_error = first_error or exc
    if pc is None:
        raise first_error
    if cands[0] != ctrl.values:
        ctrl = PluginChoice(plugin=ctrl.plugin, values=cands[0], given=ctrl.given)
    n_xc = max(ctrl.plugin.declaration.state_count(ctrl.values), 1)
    x0 = np.ascontiguousarray(pdecl.equilibrium(plant.values, v0, sc.load_v[:, 0].copy()), dtype=np.float64)
    nx = x0.shape[0]
    if nx != len(pdecl.states):
        raise ScenarioError(f"plant {pdecl.name!r}: equilibrium gave {nx} states, declared {len(pdecl.states)}")
    x_offset = _start_offset(sc, pdecl, v0, x0, where)
    ad, g1, g2, cr, dr = shaping.design(sc.shaping["order"], sc.shaping["pole"], sc.Ts)
    integ = integration_plan(sc)
    table = InterlockTable.build(sc.interlocks, outputs + u_names + [d[0] for d in DERIVED])
    ny = len(outputs)
    out_units = {s.name: (s.unit, s.description) for s in pdecl.outputs}
    signals = [SignalSpec(n, out_units[n][0], out_units[n][1]) for n in outputs]
    signals += [SignalSpec(s.name, s.unit, s.description) for s in pdecl.inputs] or [SignalSpec("u", "V")]
    signals += [SignalSpec(n, u, "shaped reference" if n == "v_ref" else "derivative of the shaped reference")
                for n, u in REFERENCE_SIGNALS]
    signals.append(SignalSpec("v_ref_raw", "V", "reference before shaping"))
    signals += [SignalSpec(n, u, "load profile") for n, u in LOAD_SIGNALS]
    # the plant's true value of each signal a sensor fault hits, before injection (none without
    # sensor faults; faults.keep_true writes them, before the word and the code)
    true_names = true_signals(sc.faults)
    signals += [SignalSpec(f"true_{n}", out_units[n][0],
                           f"{out_units[n][1]}, true plant value before sensor faults")
                for n in true_names]
    # and of each signal with a sensor chain that no sensor fault hits (runtime/sensors.py)
    chain_names = sensors.true_signals(sc.sensors, true_names)
    signals += [SignalSpec(f"true_{n}", out_units[n][0],
                           f"{out_units[n][1]}, true plant value before the sensor chain")
                for n in chain_names]
    signals.append(SignalSpec("interlock_word", "-", "bit j: interlock j beyond its limit; bits 40-46 watchdogs overrun, stale, sequence gap, peer lost, stop requested, protocol error, sequence error; bit 48 non-finite; bit 49 controller fault; bit 50 latched; bit 51 reset requested; bit 52 reset refused"))
    signals.append(SignalSpec("ctrl_code", "-", "controller return code (0 ok)"))
    if "v_out" not in outputs:
        raise ScenarioError(f"plant {pdecl.name!r} has no v_out output; the runtime needs it")
    args = dict(
        ts=sc.Ts, nsub=integ["substeps"], zf=integ["z_fast"], v_collapse=sc.v_collapse,
        i_vout=outputs.index("v_out"),
        pp=pp, x=x0, load_t=sc.load_t, load_v=sc.load_v, lcur=np.zeros(1, dtype=np.int64),
        pc=pc, xc=np.zeros(n_xc), iyc=iyc, yc=np.zeros(max(len(iyc), 1)), u=np.zeros(nu),
        safe_u=_safe_u(sc, u_names),
        pr=pr, xr=np.zeros(n_xr), iyr=iyr, yr=np.zeros(max(len(iyr), 1)), w=np.zeros(1),
        ad=ad, g1=g1, g2=g2, cr=cr, dr=dr, slew=sc.shaping["slew_rate"],
        z=np.zeros(ad.shape[0]), s=np.zeros(1), zt=np.zeros(ad.shape[0]), r=np.zeros(5),
        dix=np.array([outputs.index(n) if n in outputs else -1
                      for n in ("v_out", "i_out", "v_dc")], dtype=np.int64),
        lim_sig=table.sig, lim_side=table.side, lim_thr=table.thr, lim_deb=table.deb,
        lim_cnt=np.zeros(len(table.rows), dtype=np.int64), latch=_latch(table),
        pv=np.zeros(2 * (ny + nu + len(DERIVED))), y=np.zeros(ny), d=np.zeros(3),
        wd=new_watchdog(sc.watchdogs["overrun_budget"], int(sc.watchdogs["overrun_ticks"]),
                        safe_action=sc.safe_state["action"],
                        contactor_s=sc.safe_state["contactor_delay_s"],
                        delay_halves=int(round(2 * sc.actuation_delay))),
        # the command in force on the plant (row 0) and the commands of the last 3 ticks (rows
        # 1-3, NaN until the first tick fills them): the actuation delay's queue
        uq=np.full((4, nu), np.nan),
        ev=np.zeros(loopgen.EV_SIZE), seed=np.int64(sc.seed % (2**32)),
        reset_t=np.array(sorted(sc.resets), dtype=np.float64), reset_i=np.zeros(1, dtype=np.int64),
        evlog=new_event_log()[0], evn=new_event_log()[1],
        **fault_table(sc.faults, outputs),
        s_tab=sensors.table(sc.sensors, outputs, sc.Ts, len(true_names), true_names),
        s_x=np.zeros((len(sc.sensors), 2)),
    )
    args["_integration"] = integ
    # what bind() checks the arrays against (kept beside them, never passed to the loop)
    args["_expect"] = dict(
        plugins=loopgen.plugin_ids(plant.plugin, ctrl.plugin, ref.plugin),
        names={"plant": pdecl.name, "controller": ctrl.plugin.name, "reference": ref.plugin.name},
        nx=len(pdecl.states), ny=ny, nu=nu, n_xc=n_xc, n_xr=n_xr,
        n_iyc=len(ctrl.plugin.declaration.reads), n_iyr=len(ref.plugin.declaration.reads),
        n_sig=ny + nu + len(DERIVED), n_rows=len(table.rows), n_thr=len(table.thr), n_faults=len(
            [f for f in sc.faults if f.kind not in LINK_KINDS]), n_true=len(true_names),
        n_sensors=len(sc.sensors), n_true_chain=len(chain_names),
        rec_cols=len(signals))
    if ctrl is not sc.controller:
        sc = dataclasses.replace(sc, controller=ctrl)
    prep = Prepared(sc=sc, args=args, signals=signals, table=table, y_names=outputs,
                    u_names=u_names, v0=v0, v_out_offset=x_offset, ctx=ctx)
    if designed:
        values, prep.design = dmod.design(prep, ctx, cands, designed, rng, rng_from)
        ctrl = PluginChoice(plugin=ctrl.plugin, values=values, given=ctrl.given)
        args["pc"] = pack("controller", ctrl)
        prep.sc = dataclasses.replace(sc, controller=ctrl)
    elif sc.controller.plugin.declaration.design is not None:
        prep.design = dict(controller=ctrl.plugin.name, defaults=sc.design["defaults"],
                           designed=[], given=sorted(ctrl.given),
                           note="every designed parameter is given" if sc.design["defaults"]
                           == "plant" else "[design] defaults = \"declared\": the plugin's numbers")
    if units_design is not None:
        prep.design = units_design
    if units_shaping is not None:
        _set_shaping(prep, units_shaping)
    elif prep.shaping is None and prep.sc.shaping.get("from_plant"):
        _shape_from_plant(prep, rng)
    return prep


def _shape_from_plant(prep: Prepared, rng) -> None:
    """The reference shaping's "auto" values from the plant and the designed loop
    (runtime/analysis/design.py shaping_from_plant), into the arrays the loop runs with."""
    from .analysis import design as dmod
    _set_shaping(prep, dmod.shaping_from_plant(prep, rng))


def _set_shaping(prep: Prepared, rec: dict[str, Any]) -> None:
    """The shaping record's pole and slew rate into the arrays the loop runs with."""
    sc = prep.sc
    sh = dict(sc.shaping, pole=rec["pole_rad_s"], slew_rate=rec["slew_rate_V_s"])
    ad, g1, g2, cr, dr = shaping.design(sh["order"], sh["pole"], sc.Ts)
    prep.args.update(ad=ad, g1=g1, g2=g2, cr=cr, dr=dr, slew=sh["slew_rate"])
    prep.sc = dataclasses.replace(sc, shaping=sh)
    prep.shaping = rec


def _start_offset(sc: Scenario, pdecl, v0: float, x0: np.ndarray, where: str) -> float:
    """Excite the start: move the plant's state named ``v_out`` by ``[initial] v_out_offset``
    from its equilibrium (every other state stays there), so that an unstable equilibrium
    cannot pass as tracking. Returns the offset applied [V]: 0 when switched off, or when the
    plant declares no state named ``v_out`` (it then starts exactly at its equilibrium)."""
    off = float(sc.offset_volts(v0))
    names = [s.name for s in pdecl.states]
    # the states of the output node (paralleled units: the bus, or every unit's output
    # capacitor where they form one node)
    moved = getattr(sc.plant.plugin.module, "V_OUT_STATES", None)
    if moved is None:
        moved = (names.index("v_out"),) if "v_out" in names else ()
    if off == 0.0 or not moved:
        return 0.0
    from .scenario import V_OUT_OFFSET_MAX_PCT
    if not abs(off) <= V_OUT_OFFSET_MAX_PCT / 100.0 * abs(v0):
        raise ScenarioError(f"{where}: initial.v_out_offset = {off:g} V is more than "
                            f"{V_OUT_OFFSET_MAX_PCT:g} % of the start voltage {v0:g} V; the "
                            f"excitation is a small offset: use a smaller one, or set "
                            f"initial.v_out to start elsewhere")
    for i in moved:
        x0[i] += off
    return off


def _safe_u(sc: Scenario, u_names: list[str]) -> np.ndarray:
    """The command a trip writes (``limits.safe_u`` on every input); for paralleled units only
    on the units' commands: their enables 0 with the safe action gate_block (what reaches the
    plant is NaN either way), 1 with zero_voltage (the converters command the safe voltage);
    their trip and correction columns NaN: kept as the units' controller wrote them."""
    safe = np.full(len(u_names), sc.safe_u)
    if sc.units is not None:
        n = sc.units.count
        nin = len(u_names) - 3 * n
        # the enables as the record should read them: 0 while a trip blocks the gates
        safe[nin:nin + n] = 1.0 if sc.safe_state["action"] == "zero_voltage" else 0.0
        # the trip causes and corrections are kept as the units' controller wrote them
        # (protect leaves a NaN entry alone): which unit tripped stays in the record
        safe[nin + n:] = np.nan
    return safe


def _latch(table: InterlockTable) -> np.ndarray:
    from hilrig.safety.interlocks import L_WARN_MASK
    latch = new_latch()
    latch[L_WARN_MASK] = float(table.warn_mask())
    return latch


def compile_loop(sc: Scenario, notice: Callable[[str], None] | None = None):
    """Return (run_chunk, seconds spent compiling or loading, whether it was compiled anew)."""
    path, _ = loopgen.generate(sc.plant.plugin, sc.controller.plugin, sc.reference.plugin)
    cached = loopgen.compiled_is_cached(path)
    checked = " bounds-checked" if loopgen.checked_build() else ""
    if not cached and notice:
        notice(f"Compiling the{checked} loop for {sc.plant.plugin.name} + "
               f"{sc.controller.plugin.name} + {sc.reference.plugin.name} (first run of this "
               f"combination; cached afterwards) ...")
    t = time.perf_counter()
    module = loopgen.load_module(path)
    return module.run_chunk, time.perf_counter() - t, not cached


def first_call(sc: Scenario, call: Callable[[], Any]) -> Any:
    """Run the loop's first call (where numba compiles it); a plugin that numba cannot compile
    becomes one PluginError naming the line and what numba could not type, in place of
    numba's long report."""
    from numba.core.errors import NumbaError
    try:
        return call()
    except NumbaError as exc:
        raise PluginError(compile_error_text(sc, str(exc))) from None


def compile_error_text(sc: Scenario, report: str) -> str:
    """The essentials of numba's typing report: what it could not type, and where."""
    import re
    lines = [ln.rstrip() for ln in report.splitlines()]
    body = [ln.strip() for ln in lines[1:] if ln.strip()] if lines and lines[0].startswith(
        "Failed in") else [ln.strip() for ln in lines if ln.strip()]
    what = body[0] if body else report.strip()[:200]
    sig = next((ln for ln in body if ln.startswith(">>>")), "")
    if sig and sig not in what:
        what = f"{what} {sig}"
    where = ""
    for i, ln in enumerate(lines):
        m = re.match(r'File "(.+)", line (\d+):', ln.strip())
        if m:
            after = lines[i + 1:i + 12]
            # numba marks the line it could not type with a caret on the line below it
            caret = next((j for j, c in enumerate(after) if c.strip() == "^"), None)
            src = after[caret - 1].strip() if caret else ""
            where = f"{m.group(1)}, line {m.group(2)}" + (f": {src}" if src else "")
    names = (f"{sc.plant.plugin.name} + {sc.controller.plugin.name} + "
             f"{sc.reference.plugin.name}")
    hint = ""
    if ("none" in sig.lower() or "optional" in sig.lower()) and "interlocks.py" in where:
        # the status code reaches the protect stage first: None there is a missing return
        hint = (" The controller's step seems to return nothing on some path: a step kernel "
                "returns an int status on every path (0 when all is well).")
    return (f"numba could not compile the loop for {names}: {what}"
            + (f" (at {where})." if where else ".") + hint
            + " Run with NUMBA_DISABLE_JIT=1 for a plain-Python traceback of the plugin.")


def chunk_args(a: dict) -> tuple:
    """The arguments of ``run_chunk`` between ``n`` and ``rec``, in order."""
    return (a["ts"], a["nsub"], a["zf"], a["v_collapse"], a["i_vout"],
            a["pp"], a["x"], a["load_t"], a["load_v"], a["lcur"],
            a["pc"], a["xc"], a["iyc"], a["yc"], a["u"], a["safe_u"],
            a["pr"], a["xr"], a["iyr"], a["yr"], a["w"],
            a["ad"], a["g1"], a["g2"], a["cr"], a["dr"], a["slew"], a["z"], a["s"], a["zt"], a["r"],
            a["dix"], a["lim_sig"], a["lim_side"], a["lim_thr"], a["lim_deb"], a["lim_cnt"],
            a["latch"], a["pv"],
            *fault_args(a), *supervision_args(a), a["uq"], a["s_tab"], a["s_x"], a["y"], a["d"])


def _call(fn, k0, n, rec, a):
    if a.get("_bound") is not fn:
        bind(fn, a, rec.shape[1])
    if not (0 <= n <= rec.shape[0] and k0 >= 0):
        raise ValueError(f"loop call for ticks {k0} .. {k0 + n - 1} into a buffer of "
                         f"{rec.shape[0]} rows")
    try:
        return fn(k0, n, *chunk_args(a), rec, a["ev"])
    except IndexError:
        raise PluginError(index_error_text(a)) from None


def index_error_text(a: dict) -> str:
    """One line for an IndexError of the bounds-checked loop: which kernel, which tick."""
    names = a["_expect"]["names"]
    where = loopgen.stage_text(a["ev"], names["plant"], names["controller"], names["reference"])
    return (f"index out of range in {where}: the bounds-checked loop stopped there (an index "
            f"beyond an array's size; in the normal build it would read or write memory that "
            f"is not the array's). Run the kernel as plain Python with NUMBA_DISABLE_JIT=1 "
            f"to see the line.")


def bind(fn, a: dict, rec_cols: int) -> None:
    """Check, once per run, that the arrays of ``a`` are what the compiled loop ``fn`` indexes
    (the same plugins it was generated for; every array size, dtype and index table), so that
    no index of the generated loop can leave an array; raise PluginError naming the plugin and
    the array otherwise. Kernels' own indices into their parameter and state arrays are the
    plugin's business: the bounds-checked build (``--checked``) tests those."""
    import sys
    e = a["_expect"]
    module = sys.modules.get(getattr(getattr(fn, "py_func", fn), "__module__", ""), None)
    have = getattr(module, "PLUGINS", None)
    if have is not None and tuple(have) != tuple(e["plugins"]):
        def names(ids):
            return " + ".join(f"{k} {n!r}" for k, n, _ in ids)
        raise PluginError(f"the compiled loop was generated for {names(have)}, but the run's "
                          f"arrays were prepared for {names(e['plugins'])}: refused (its kernels "
                          f"would index arrays of another plugin)")
    nm = e["names"]
    problems = []

    def need(key, owner, shape, dtype=np.float64):
        arr = a[key]
        if not isinstance(arr, np.ndarray):
            problems.append(f"{owner}: array {key} is a {type(arr).__name__}, not an array")
            return
        if arr.dtype != dtype:
            problems.append(f"{owner}: array {key} has dtype {arr.dtype}, the loop needs {np.dtype(dtype)}")
        if not arr.flags.c_contiguous:
            problems.append(f"{owner}: array {key} is not contiguous")
        if len(shape) != arr.ndim:
            problems.append(f"{owner}: array {key} has {arr.ndim} dimensions, the loop needs {len(shape)}")
            return
        for got, want in zip(arr.shape, shape):
            if isinstance(want, tuple):  # (min, max) inclusive, max None: open
                lo, hi = want
                if got < lo or (hi is not None and got > hi):
                    problems.append(f"{owner}: array {key} has {got} elements, the loop needs "
                                    f"{lo} or more" if hi is None else
                                    f"{owner}: array {key} has {got} elements, the loop needs "
                                    f"{lo} .. {hi}")
            elif got != want:
                problems.append(f"{owner}: array {key} has shape {arr.shape}, the loop needs "
                                f"{tuple(s if not isinstance(s, tuple) else s[0] for s in shape)}")
                return

    def index_table(key, owner, lo, hi):
        arr = a[key]
        if arr.size and not (int(arr.min()) >= lo and int(arr.max()) < hi):
            problems.append(f"{owner}: index table {key} holds {arr.tolist()}, outside "
                            f"[{lo}, {hi})")

    plant = f"plant {nm['plant']!r}"
    ctrl = f"controller {nm['controller']!r}"
    ref = f"reference {nm['reference']!r}"
    ny, nu = e["ny"], e["nu"]
    # parameters: non-empty vectors (their content is the plugin's)
    need("pp", plant, ((1, None),))
    need("pc", ctrl, ((1, None),))
    need("pr", ref, ((1, None),))
    # states
    need("x", plant, (e["nx"],))
    need("xc", ctrl, ((e["n_xc"], None),))
    need("xr", ref, ((e["n_xr"], None),))
    # signals and the reads of each plugin
    need("y", plant, (ny,))
    need("u", plant, (nu,))
    need("safe_u", plant, (nu,))
    need("iyc", ctrl, (e["n_iyc"],), np.int64)
    need("yc", ctrl, ((max(e["n_iyc"], 1), None),))
    need("iyr", ref, (e["n_iyr"],), np.int64)
    need("yr", ref, ((max(e["n_iyr"], 1), None),))
    index_table("iyc", ctrl, 0, ny)
    index_table("iyr", ref, 0, ny)
    need("w", ref, ((1, None),))
    need("d", plant, (3,))
    need("uq", "hilrig (actuation queue)", (4, nu))
    need("dix", "hilrig (derived signals)", (3,), np.int64)
    index_table("dix", "hilrig (derived signals)", -1, ny)
    # the load profile
    nl = a["load_t"].shape[0] if isinstance(a["load_t"], np.ndarray) else 0
    need("load_t", "scenario [load]", ((1, None),))
    need("load_v", "scenario [load]", (3, nl))
    need("lcur", "scenario [load]", (1,), np.int64)
    # the shaping filter
    m = a["ad"].shape[0] if isinstance(a["ad"], np.ndarray) and a["ad"].ndim == 2 else 0
    need("ad", "hilrig (shaping filter)", (m, m))
    for key in ("g1", "g2", "z", "zt"):
        need(key, "hilrig (shaping filter)", (m,))
    need("cr", "hilrig (shaping filter)", (5, m))
    need("dr", "hilrig (shaping filter)", (5,))
    need("s", "hilrig (shaping filter)", ((1, None),))
    need("r", "hilrig (shaping filter)", (5,))
    # interlocks, latch, watchdogs, event log
    from hilrig.safety.interlocks import EVENT_LOG_SIZE, LATCH_SIZE, WD_SIZE
    nr = e["n_rows"]
    need("lim_sig", "scenario [[interlocks]]", (nr,), np.int64)
    index_table("lim_sig", "scenario [[interlocks]]", 0, e["n_sig"])
    for key, dt in (("lim_side", np.int64), ("lim_deb", np.int64), ("lim_cnt", np.int64)):
        need(key, "scenario [[interlocks]]", (nr,), dt)
    # thresholds, and with a cross-check row XC_SIZE numbers per row after them (its partner
    # and drop current index the protect vector)
    from hilrig.safety.interlocks import SIDE_CROSS, SIDE_WARN, XC_SIZE
    n_thr = e.get("n_thr", nr)
    need("lim_thr", "scenario [[interlocks]]", (n_thr,))
    side_ok = isinstance(a["lim_side"], np.ndarray) and a["lim_side"].shape == (nr,)
    thr_ok = isinstance(a["lim_thr"], np.ndarray) and a["lim_thr"].shape == (n_thr,)
    if side_ok and thr_ok:
        cross = [k for k in range(nr) if int(a["lim_side"][k]) % SIDE_WARN == SIDE_CROSS]
        if cross and n_thr != nr * (1 + XC_SIZE):
            problems.append(f"scenario [[interlocks]]: a cross-check needs {nr * (1 + XC_SIZE)} "
                            f"threshold entries, lim_thr has {n_thr}")
        for k in cross if n_thr == nr * (1 + XC_SIZE) else ():
            p_, c_ = a["lim_thr"][nr + XC_SIZE * k], a["lim_thr"][nr + XC_SIZE * k + 1]
            if not (0 <= p_ < e["n_sig"] and -1 <= c_ < e["n_sig"] and p_ == int(p_)
                    and c_ == int(c_)):
                problems.append(f"scenario [[interlocks]]: cross-check row {k} indexes "
                                f"{p_:g}, {c_:g} outside the {e['n_sig']} signals")
    need("latch", "hilrig (trip latch)", (LATCH_SIZE,))
    need("pv", "hilrig (interlocks)", (2 * e["n_sig"],))
    need("wd", "hilrig (watchdogs)", (WD_SIZE,))
    need("evlog", "hilrig (event log)", (EVENT_LOG_SIZE, 4))
    need("evn", "hilrig (event log)", (1,), np.int64)
    need("ev", "hilrig (run events)", (loopgen.EV_SIZE,))
    need("reset_t", "scenario resets", ((0, None),))
    need("reset_i", "scenario resets", (1,), np.int64)
    # faults
    nf = e["n_faults"]
    for key, dt in (("f_stage", np.int64), ("f_kind", np.int64), ("f_sig", np.int64),
                    ("f_t0", np.float64), ("f_t1", np.float64), ("f_val", np.float64),
                    ("f_hold", np.float64)):
        need(key, "scenario [[faults]]", (nf,), dt)
    index_table("f_sig", "scenario [[faults]]", -1, ny)
    from hilrig.safety.faults import C_TRUE, COND_COLS
    need("f_cond", "scenario [[faults]]", (max(nf, 1), COND_COLS))
    if isinstance(a["f_cond"], np.ndarray) and a["f_cond"].shape[1:] == (COND_COLS,):
        j = a["f_cond"][:nf, 0]
        if nf and not (np.all(j >= -1) and np.all(j < ny)):
            problems.append(f"scenario [[faults]]: condition signals {j.tolist()} outside [-1, {ny})")
        # the true-value columns: each of 0 .. n_true-1 once, on a sensor fault's row (the
        # loop writes column c0 + q of its row and skips one column per q)
        q = a["f_cond"][:, C_TRUE]
        kept = sorted(int(v) for v in q if v >= 0)
        fsig = a["f_sig"] if isinstance(a["f_sig"], np.ndarray) else np.zeros(0, np.int64)
        bad_row = any(v >= 0 and (r >= min(nf, fsig.shape[0]) or fsig[r] < 0)
                      for r, v in enumerate(q))
        if kept != list(range(e["n_true"])) or bad_row:
            problems.append(f"hilrig (recording): true-value columns {q.tolist()} are not "
                            f"0 .. {e['n_true'] - 1} once each")
    # the sensor chain: a signal index and a true-value column per row (the loop writes column
    # c0 + q and the record stage skips one column per q >= 0)
    from hilrig.runtime.sensors import S_COLS, S_SIG, S_TRUE
    ns = e.get("n_sensors", 0)
    need("s_tab", "scenario [[sensors]]", (ns, S_COLS))
    need("s_x", "scenario [[sensors]]", (ns, 2))
    if isinstance(a["s_tab"], np.ndarray) and a["s_tab"].shape == (ns, S_COLS):
        sig = a["s_tab"][:, S_SIG]
        if not (np.all(sig >= 0) and np.all(sig < ny) and np.all(sig == np.floor(sig))):
            problems.append(f"scenario [[sensors]]: signals {sig.tolist()} outside [0, {ny})")
        q = sorted(int(v) for v in a["s_tab"][:, S_TRUE] if v >= 0)
        first = e["n_true"]
        if q != list(range(first, first + e.get("n_true_chain", 0))):
            problems.append(f"hilrig (recording): the sensor chain's true-value columns {q} "
                            f"are not {first} .. {first + e.get('n_true_chain', 0) - 1} once each")
    # the recording buffer: at least the recorded columns
    if rec_cols < e["rec_cols"]:
        problems.append(f"hilrig (recording): the buffer has {rec_cols} columns, the loop "
                        f"writes {e['rec_cols']}")
    if problems:
        raise PluginError("the run's arrays do not fit the compiled loop, refused before the "
                          "first tick: " + "; ".join(problems))
    a["_bound"] = fn


def fault_args(a: dict) -> tuple:
    """The fault-injection arrays, in the kernels' argument order."""
    return (a["seed"], a["f_stage"], a["f_kind"], a["f_sig"], a["f_t0"], a["f_t1"], a["f_val"],
            a["f_hold"], a["f_cond"])


def supervision_args(a: dict) -> tuple:
    """The reset schedule, the event log and the watchdog array, in the kernels' argument
    order."""
    return (a["reset_t"], a["reset_i"], a["evlog"], a["evn"], a["wd"])


def _fault_times(sc: Scenario, a: dict) -> list[dict[str, Any]]:
    """Each fault with the times it was active (a conditional one: from its trigger; None if
    its condition never held)."""
    from hilrig.safety.faults import LINK_KINDS
    out = []
    i = -1
    for f in sc.faults:
        if f.kind in LINK_KINDS:
            out.append({"kind": f.kind, "applies_to": "the stand-in simulator (bridge runs)",
                        "active_from_s": f.start,
                        "active_to_s": f.end if f.end != float("inf") else None})
            continue
        i += 1
        t0, t1 = float(a["f_t0"][i]), float(a["f_t1"][i])
        e: dict[str, Any] = {"kind": f.kind}
        if f.signal:
            e["signal"] = f.signal
        if f.conditional:
            e["when"] = f"{f.when_signal} {f.when_side} {f.when_threshold:g}"
        e["active_from_s"] = t0 if t0 != float("inf") else None
        e["active_to_s"] = t1 if t1 != float("inf") else None
        out.append(e)
    return out


def default_folder(sc: Scenario, base: Path = Path("runs")) -> Path:
    stamp = _dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    stem = Path(sc.path).stem if sc.path else "scenario"
    folder = base / f"{stamp}-{stem}"
    i = 1
    while folder.exists():
        i += 1
        folder = base / f"{stamp}-{stem}-{i}"
    return folder


def check_folder(folder: Path, overwrite: bool) -> None:
    if (folder / "recording.h5").exists() and not overwrite:
        raise FileExistsError(f"{folder} already holds a recording; choose another --out "
                              f"folder, or pass --overwrite to replace it (nothing was overwritten)")


def run_scenario(sc: Scenario, folder: Path | None = None, *, overwrite: bool = False,
                 progress: Callable[[int, int], None] | None = None,
                 notice: Callable[[str], None] | None = None,
                 telemetry: str | None = None, allow_remote: bool = False) -> RunResult:
    """Run a validated scenario in SIL and write its run folder; return the summary."""
    folder = Path(folder) if folder is not None else default_folder(sc)
    check_folder(folder, overwrite)
    prep = prepare(sc)
    fn, t_compile, compiled = compile_loop(sc, notice)
    a = prep.args
    # first call with zero ticks: compiles (or loads from the cache) outside the timed loop
    t = time.perf_counter()
    first_call(sc, lambda: _call(fn, 0, 0, np.zeros((1, len(prep.signals))), a))
    t_compile += time.perf_counter() - t
    if not telemetry:
        return execute(sc, prep, folder, lambda k0, n, rec: _call(fn, k0, n, rec, a),
                       timing={"compile_or_load_s": t_compile, "compiled_now": compiled},
                       progress=progress)
    from .live.telemetry import Telemetry, telemetry_config
    tel = Telemetry(**telemetry_config(sc, prep, telemetry, allow_remote))
    live = LiveControl(tel, sc, a)
    try:
        res = execute(sc, prep, folder, live.wrap(lambda k0, n, rec: _call(fn, k0, n, rec, a)),
                      timing={"compile_or_load_s": t_compile, "compiled_now": compiled},
                      progress=progress, after_chunk=live.after_chunk)
        live.finish(res.summary)
        return res
    finally:
        tel.close()


class LiveControl:
    """Between chunks: publish telemetry, and act on the operator's commands. A stop runs one
    more tick with the stop condition raised (the safe output latched and recorded), then ends
    the run; a reset is requested for the next tick (refused while a condition holds)."""

    def __init__(self, tel, sc: Scenario, a: dict):
        self.tel, self.sc, self.a = tel, sc, a
        self.stop = False

    def take_commands(self) -> None:
        from hilrig.safety.interlocks import L_RESET_NOW
        for c in self.tel.commands():
            if c == "stop":
                self.stop = True
            elif c == "reset":
                self.a["latch"][L_RESET_NOW] = 1.0

    def wrap(self, produce):
        from hilrig.safety.interlocks import HOST_STOP, W_HOST_BITS

        def wrapped(k0: int, n: int, rec: np.ndarray) -> int:
            self.take_commands()
            if not self.stop:
                return produce(k0, n, rec)
            wd, ev = self.a["wd"], self.a["ev"]
            wd[W_HOST_BITS] = HOST_STOP
            ran = produce(k0, 1, rec)
            wd[W_HOST_BITS] = 0.0
            if ev[0] == 0.0:
                ev[0], ev[1] = loopgen.EV_STOPPED, k0
            return ran
        return wrapped

    def after_chunk(self, done: int, rows: np.ndarray) -> None:
        a = self.a
        self.tel.add_rows(done - rows.shape[0], rows, self.sc.Ts)
        self.tel.publish(a["latch"], a["evlog"], a["evn"])

    def finish(self, summary: dict) -> None:
        a = self.a
        self.tel.publish(a["latch"], a["evlog"], a["evn"], force=True, ended=True,
                         end_event=judge(summary)["text"])


def plain_values(values: dict[str, Any]) -> dict[str, Any]:
    """Plugin values as JSON-ready data (tables as lists of rows; the values of paralleled
    units, nested dicts and lists, as the same)."""
    def plain(v):
        if isinstance(v, (str, int, float, bool)) or v is None:
            return v
        if isinstance(v, dict):
            return {str(k): plain(w) for k, w in v.items()}
        if isinstance(v, np.generic):
            return v.item()
        return [plain(w) for w in v]
    return {k: plain(v) for k, v in values.items()}


def stability_record(prep: Prepared) -> dict[str, Any]:
    """The stability check at the run's start (runtime/analysis/check.py) for the run record."""
    from .analysis.check import start_check
    try:
        return start_check(prep)[1]
    except (ValueError, ArithmeticError, np.linalg.LinAlgError, IndexError) as exc:
        return {"status": "not made", "note": f"{type(exc).__name__}: {exc}"}


def execute(sc: Scenario, prep: Prepared, folder: Path,
            produce: Callable[[int, int, np.ndarray], int], *, timing: dict[str, Any],
            progress: Callable[[int, int], None] | None = None,
            extra: Callable[[], dict[str, Any]] | None = None,
            end_events: Callable[[], list[dict[str, Any]]] | None = None,
            writer_class=RunWriter, chunk_s: float | None = None,
            after_chunk: Callable[[int, np.ndarray], None] | None = None) -> RunResult:
    """Drive ``produce(k0, n, rec) -> ticks run`` chunk by chunk, record and summarise.

    ``produce`` fills rows of ``rec`` for ticks k0 .. k0+n-1 and returns how many it ran
    (fewer ends the run). It is the compiled SIL loop, or a bridge session's tick loop.
    """
    a = prep.args
    n_total = sc.n_ticks
    check = stability_record(prep)
    chunk = max(1, min(n_total, int(round((chunk_s or sc.recording["chunk"]) / sc.Ts))))
    ncols = len(prep.signals)
    rec = np.zeros((chunk, ncols))
    folder.mkdir(parents=True, exist_ok=True)
    clear_derived(folder)  # a run written over an old one (--overwrite): no stale report
    (folder / SCENARIO).write_text(sc.text)
    vers = versions()
    c_build = getattr(sc.controller.plugin.module, "build_record", None)
    if c_build is not None:  # a controller in C: how its library was compiled (runtime/cplugin.py)
        vers["c_controller"] = c_build()
    from .provenance import record as provenance_record
    prov = provenance_record(prep.sc)  # each plugin: origin, source hashes, version, parameters
    names = [s.name for s in prep.signals]
    i_vout, i_vref, i_u = names.index("v_out"), names.index("v_ref"), names.index(prep.u_names[0])
    i_vdc = names.index("v_dc") if "v_dc" in names else None
    more = {}
    if getattr(writer_class, "computes_metrics", False):
        # a writer in another process also keeps the running metrics (nothing between ticks)
        more = {"metric_cols": (i_vout, i_vref, i_u, -1 if i_vdc is None else i_vdc), "Ts": sc.Ts}
    writer = writer_class(folder, prep.signals, {
        "scenario_text": sc.text, "versions": dumps_json(vers), "seed": sc.seed, "Ts": sc.Ts,
        "title": sc.title, "demo_data": sc.demo_data, "mode": sc.mode,
        "plant": sc.plant.plugin.name, "controller": sc.controller.plugin.name,
        "reference": sc.reference.plugin.name, "provenance": dumps_json(prov),
    }, chunk_rows=chunk, compression=sc.recording["compression"], **more)
    block = getattr(writer, "block", None)
    metrics = TrackingMetrics(sc.Ts)
    t_loop = 0.0
    t_write = 0.0
    done = 0
    ran = 0
    last_row = np.zeros(ncols)
    wall0 = time.perf_counter()
    startup = process_age_s()
    try:
        while done < n_total:
            if INTERRUPTED.is_set():
                raise KeyboardInterrupt
            n = min(chunk, n_total - done)
            t0 = time.perf_counter()
            # a shared-memory writer hands out the rows to fill (no copy afterwards)
            buf = block(n) if block else rec
            try:
                ran = produce(done, n, buf)
            except IndexError:  # the bounds-checked build (paced and bridge ticks)
                raise PluginError(index_error_text(a)) from None
            t1 = time.perf_counter()
            tt = np.arange(done, done + ran, dtype=np.int64) * sc.Ts
            rows = buf[:ran]
            if ran:
                last_row = rows[-1].copy()
            if block:
                writer.commit(tt)
            else:
                writer.append(tt, buf)
            if not more:
                metrics.update(tt, rows[:, i_vout], rows[:, i_vref], rows[:, i_u],
                               rows[:, i_vdc] if i_vdc is not None else None)
            t2 = time.perf_counter()
            t_loop += t1 - t0
            t_write += t2 - t1
            done += ran
            if after_chunk:
                after_chunk(done, rows)
            if progress:
                progress(done, n_total)
            if ran < n or a["ev"][0] != 0.0:
                break  # ended early (a collapse on a chunk's last tick, too, or a stop)
    except BaseException as exc:
        # keep what was flushed; mark the file as not complete and re-raise (e.g. Ctrl-C, or
        # an index out of range in the bounds-checked build)
        end = ({"event": "plugin error", "tick": done, "text": str(exc)}
               if isinstance(exc, PluginError) else {"event": "interrupted", "tick": done})
        writer.close({"events": dumps_json([end])}, complete=False)
        raise
    wall = time.perf_counter() - wall0
    ev = int(a["ev"][0])
    events = []
    if ev:
        kk = int(a["ev"][1])
        e = {"event": loopgen.EVENT_TEXT[ev], "tick": kk, "time_s": kk * sc.Ts,
             "v_out_V": float(last_row[i_vout])}
        if ev == loopgen.EV_INTEGRATION:
            e.update(integration_error(a["ev"], kk, sc.Ts))
        if "true_v_out" in names:
            # a sensor fault or chain on v_out: the event reports the plant's true voltage
            # (the one the collapse check reads), and the measurement beside it
            e["v_out_V"] = float(last_row[names.index("true_v_out")])
            e["v_out_measured_V"] = float(last_row[i_vout])
        events.append(e)
    if end_events:
        events += end_events()
    # trips and resets, in order, from the loop's event log
    log_events = []
    for row in a["evlog"][:min(int(a["evn"][0]), a["evlog"].shape[0])]:
        tick_k, kind, cause, value = int(row[0]), int(row[1]), int(row[2]), float(row[3])
        e = {"event": EVENT_NAMES[kind], "tick": tick_k, "time_s": tick_k * sc.Ts}
        if kind != EVT_RESET_IDLE:
            e["cause"] = prep.table.cause_text(cause, len(prep.y_names))
            e["cause_id"] = prep.table.cause_id(cause)
        if kind == EVT_TRIP:
            e["value"] = value
        log_events.append(e)
    if int(a["evn"][0]) > a["evlog"].shape[0]:
        log_events.append({"event": "event log full", "dropped": int(a["evn"][0]) - a["evlog"].shape[0]})
    trips = [e for e in log_events if e["event"] == "trip"]
    trip = {k: v for k, v in trips[0].items() if k != "event"} if trips else None
    events = log_events + events
    result = writer.metrics_result() if more else metrics.result()
    result["trips"] = len(trips)
    result["warnings"] = sum(e["event"] == "warning" for e in log_events)
    ending = [e for e in events if e["event"] not in set(EVENT_NAMES.values()) | {"event log full"}
              and e.get("ends_run", True)]
    end_event = ending[0]["event"] if ending else None
    summary = {
        "title": sc.title, "demo_data": sc.demo_data, "mode": sc.mode, "seed": sc.seed,
        "plant": sc.plant.plugin.name, "controller": sc.controller.plugin.name,
        "reference": sc.reference.plugin.name,
        "Ts_s": sc.Ts, "substeps": a.get("nsub", sc.substeps),
        "integration": integration_summary(a),
        "actuation_delay_periods": sc.actuation_delay,
        "controller_compensates_delay": bool(sc.controller.plugin.declaration.compensates_delay),
        "safe_state": {**sc.safe_state, "applied": safe_action_applied(sc)},
        "ticks_planned": n_total, "ticks_run": done, "simulated_s": done * sc.Ts,
        "completed": done == n_total and end_event is None,
        "end_event": end_event,
        "events": events, "trip": trip,
        "faults": _fault_times(sc, a),
        "watchdogs": dict(sc.watchdogs),
        "overrides": sc.overrides,
        "v_out_start_V": prep.v0,
        "v_out_start_offset_V": prep.v_out_offset,
        "controller_values": plain_values(prep.sc.controller.values),
        "design": prep.design,
        "shaping": {"order": prep.sc.shaping["order"], "pole_rad_s": prep.sc.shaping["pole"],
                    "slew_rate_V_s": prep.sc.shaping["slew_rate"],
                    "derived": prep.shaping},
        "stability_check": check,
        "metrics": result,
        "segments": [],
        "segmentation": {},
        "timing": {
            **timing,
            "process_start_to_first_tick_s": startup,
            "loop_s": t_loop, "write_s": t_write, "wall_s": wall,
            "loop_ns_per_tick": t_loop / max(done, 1) * 1e9,
            "ticks_per_s": done / t_loop if t_loop > 0 else None,
            "realtime_factor": (done * sc.Ts) / wall if wall > 0 else None,
        },
        "versions": vers,
        "provenance": prov,
        "recording": "recording.h5",
    }
    attrs = {"events": dumps_json(events)}
    if extra:
        more = extra()
        summary.update(more)
        if "bridge" in more:  # link statistics of a bridge run go into the recording too
            attrs["bridge"] = dumps_json(more["bridge"])
    # wall-clock figures of SIL runs stay out of the recording so that it is bit-identical
    writer.close(attrs)
    # per-segment metrics need whole signals: read the two back from the closed recording
    # scored only up to the first trip (the safe output drives the plant after it) or the
    # collapse that ended the run
    import h5py
    cut, cut_reason = None, ""
    if trips:
        cut, cut_reason = trips[0]["tick"], "the first trip"
    if end_event == COLLAPSE:
        k_end = next(e["tick"] for e in events if e["event"] == COLLAPSE)
        if cut is None or k_end < cut:
            cut, cut_reason = k_end, "the voltage collapse"
    with h5py.File(folder / "recording.h5", "r") as f:
        tt, yy, rr = f["time"][()], f["signals/v_out"][()], f["signals/v_ref_raw"][()]
    summary["segments"], summary["segmentation"] = segment_metrics(tt, yy, rr, cut=cut,
                                                                   cut_reason=cut_reason)
    # the tracking band (outcomes "out of band" and "oscillating"), over the same samples
    summary["tracking"] = band_check(tt, yy, rr, cut=cut)
    if sc.units is not None:
        # paralleled units: each unit's share, circulating current (runtime/trials/sharing.py)
        from .trials.sharing import from_recording
        summary["sharing"] = from_recording(folder / "recording.h5", sc.units, cut=cut,
                                            cut_reason=cut_reason)
    if end_event in INTEGRATION_ERRORS:
        # a diverged plant state: no number of this run means anything
        e_int = next((e for e in events if e["event"] == end_event), {})
        withhold_metrics(summary, f"the run ended on a {INTEGRATION_ERROR} at "
                         f"{time_text(e_int.get('time_s'))}"
                         + (f" ({e_int['detail']})" if e_int.get("detail") else "")
                         + ": the recorded plant state is not a solution of the circuit's "
                         "equations, so no metric is computed")
    # the verdict every table, report and comparison shows (completed/end_event stay for
    # the code that reads them)
    summary["outcome"] = judge(summary)
    (folder / SUMMARY).write_text(dumps_json(summary, indent=2) + "\n")
    return RunResult(folder=folder, summary=summary)
