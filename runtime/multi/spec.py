"""A scenario's ``[units]`` table: N paralleled units on one bus (docs/scenarios.md).

``[plant]`` and ``[controller]`` then describe every unit (the unit's plant plugin and the
values all units share); ``[units]`` gives their number, the cables, the bus, the sharing and
the per-unit interlocks, and ``[units.unit<k>]`` a unit's own values (its tolerances, cable,
share, or another controller). :func:`build` turns them into the bus plant and the units'
controller, generated plugin modules (:mod:`.plant`, :mod:`.control`) that the runtime runs as
it runs any plant and controller.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from hilrig.runtime import registry
from hilrig.runtime.errors import ScenarioError

from . import control as mc
from . import plant as mp

MAX_UNITS = 16
#: [units] keys: (unit, default, (low, high)); the per-unit ones may be given per unit too
UNIT_KEYS = {"cable_R": ("ohm", 0.0, (0.0, 10.0)), "cable_L": ("H", 0.0, (0.0, 1.0)),
             "droop_R": ("ohm", 0.0, (0.0, 100.0)), "weight": ("-", 1.0, (1e-6, 1e6)),
             "I_trip": ("A", 0.0, (0.0, 1e6)), "V_trip": ("V", 0.0, (0.0, 1e5))}
BUS_KEYS = {"C_bus": ("F", 0.0, (0.0, 1.0)), "trip_ticks": ("-", 2, (1, 100000))}
EXCHANGE_KEYS = {"period": ("s", 1e-3, (1e-7, 10.0)), "delay": ("s", 0.0, (0.0, 10.0)),
                 "loss": ("-", 0.0, (0.0, 1.0)), "share_bw": ("rad/s", 60.0, (0.0, 1e5)),
                 "restore_bw": ("rad/s", 60.0, (0.0, 1e5)), "stale": ("s", 0.0, (0.0, 100.0)),
                 "correction_max": ("V", 50.0, (0.0, 1e5))}
TOP = {"count", "sharing", "load_current", "exchange", "resets", "faults", *UNIT_KEYS, *BUS_KEYS}
#: the largest ring of messages in flight per unit (delay / period + 2)
MAX_RING = 4096


@dataclass
class UnitsSpec:
    """What the rest of hilrig needs to know of a multi-unit scenario."""

    count: int
    topology: str
    sharing: str
    #: each unit's share of the load current (weights normalised)
    shares: list[float]
    unit_plant: str
    unit_controllers: list[str]
    #: per unit: the recorded names of its output current, terminal voltage, converter current
    i_out: list[str] = field(default_factory=list)
    v_out: list[str] = field(default_factory=list)
    i_conv: list[str] = field(default_factory=list)
    #: per unit: its current rating for the report (I_trip, or 0 when none is set)
    i_trip: list[float] = field(default_factory=list)
    #: per unit: its plant and controller as single-unit plugin choices (for the designs)
    plants: list = field(default_factory=list, repr=False)
    controllers: list = field(default_factory=list, repr=False)

    def describe(self) -> dict[str, Any]:
        return dict(count=self.count, topology=self.topology, sharing=self.sharing,
                    shares=self.shares, unit_plant=self.unit_plant,
                    unit_controllers=self.unit_controllers, i_out=self.i_out,
                    v_out=self.v_out, i_conv=self.i_conv, i_trip=self.i_trip)


def _sha(pl) -> str:
    return hashlib.sha256(Path(pl.source_file).read_bytes()).hexdigest()[:16]


def build(cx, raw: dict, plant, controller, Ts: float, duration: float, seed: int,
          safe_u: float, quantity, plugin_parse, folder: Path):
    """Read ``raw["units"]``; return (bus plant choice, units' controller choice, UnitsSpec).

    ``quantity(key, value, unit, bounds, integer=False)`` and ``plugin_parse(raw, kind, key)``
    are the scenario reader's own checks (one message per mistake, naming the key)."""
    from hilrig.runtime.scenario import PluginChoice
    tab = raw["units"]
    if not isinstance(tab, dict):
        raise cx.fail("units", " is not a table")
    n_raw = tab.get("count")
    if n_raw is None:
        raise cx.fail("units.count", " is missing: how many units run in parallel (1 to "
                      f"{MAX_UNITS})")
    if isinstance(n_raw, bool) or not isinstance(n_raw, int) or not 1 <= n_raw <= MAX_UNITS:
        shown = str(n_raw).lower() if isinstance(n_raw, bool) else repr(n_raw)
        raise cx.fail("units.count", f" = {shown} is not a whole number from 1 to {MAX_UNITS}")
    n = int(n_raw)
    per_unit_names = {f"unit{k}" for k in range(1, n + 1)}
    count_overridden = "units.count" in cx.overridden or "units" in cx.overridden
    for k in tab:
        if k not in TOP and k not in per_unit_names:
            if k.startswith("unit") and k[4:].isdigit() and count_overridden and int(k[4:]) > n:
                # an override (an envelope's axis) set fewer units than the file describes:
                # the tables of the units beyond them do not apply
                continue
            if k.startswith("unit") and k[4:].isdigit():
                raise cx.fail(f"units.{k}", f": there is no unit {k[4:]} (units.count = {n})")
            raise cx.unknown("units", k, sorted(TOP) + [f"unit1 .. unit{n}"])
    sharing = tab.get("sharing", "none")
    if sharing not in mc.SHARING:
        raise cx.fail("units.sharing", f" = {sharing!r} is not one of "
                      f"{', '.join(repr(s) for s in mc.SHARING)}")
    ff = tab.get("load_current", "share")
    if ff not in mc.FEEDFORWARD:
        raise cx.fail("units.load_current", f" = {ff!r} is not one of "
                      f"{', '.join(repr(s) for s in mc.FEEDFORWARD)}")
    base = {k: quantity(f"units.{k}", tab.get(k, d), u, b) for k, (u, d, b) in UNIT_KEYS.items()}
    bus = {k: quantity(f"units.{k}", tab.get(k, d), u, b, integer=(k == "trip_ticks"))
           for k, (u, d, b) in BUS_KEYS.items()}
    ex = tab.get("exchange", {})
    if not isinstance(ex, dict):
        raise cx.fail("units.exchange", " is not a table")
    for k in ex:
        if k not in EXCHANGE_KEYS:
            raise cx.unknown("units.exchange", k, EXCHANGE_KEYS)
    exch = {k: quantity(f"units.exchange.{k}", ex.get(k, d), u, b)
            for k, (u, d, b) in EXCHANGE_KEYS.items()}
    # per-unit values
    plant_raw = dict(raw.get("plant", {}))
    ctrl_raw = dict(raw.get("controller", {}))
    units_plant, units_ctrl, units_vals = [], [], []
    for k in range(1, n + 1):
        own = tab.get(f"unit{k}", {})
        if not isinstance(own, dict):
            raise cx.fail(f"units.unit{k}", " is not a table")
        vals = dict(base)
        pkeys = {}
        allowed = sorted(UNIT_KEYS) + ["controller"] + [q.name for q in plant.plugin.declaration.params]
        for key, v in own.items():
            if key == "plugin":
                raise cx.fail(f"units.unit{k}.plugin", ": every unit has the plant plugin of "
                              "[plant] (a unit's own values differ, not its model)")
            if key not in allowed:
                raise cx.unknown(f"units.unit{k}", key, allowed)
            if key in UNIT_KEYS:
                u, _, b = UNIT_KEYS[key]
                vals[key] = quantity(f"units.unit{k}.{key}", v, u, b)
            elif key == "controller":
                continue
            else:
                pkeys[key] = v
        try:
            pch = plugin_parse({"plant": {**plant_raw, **pkeys}}, "plant", "plant")
        except ScenarioError as exc:
            raise ScenarioError(f"{exc} (in units.unit{k})") from None
        c_own = own.get("controller", {})
        if not isinstance(c_own, dict):
            raise cx.fail(f"units.unit{k}.controller", " is not a table")
        if "plugin" in c_own and c_own["plugin"] != ctrl_raw.get("plugin", "cascaded_pi"):
            craw = dict(c_own)
        else:
            craw = {**ctrl_raw, **c_own}
        try:
            cch = plugin_parse({"controller": craw}, "controller", "controller")
        except ScenarioError as exc:
            raise ScenarioError(f"{exc} (in units.unit{k}.controller)") from None
        if pch.plugin.origin != plant.plugin.origin:
            raise cx.fail(f"units.unit{k}.plugin", ": every unit has the plant plugin of [plant]")
        units_plant.append(pch)
        units_ctrl.append(cch)
        units_vals.append(vals)
    uplug = plant.plugin
    umod = uplug.module
    node = getattr(umod, "OUTPUT_NODE", None)
    if node is None or getattr(umod, "advance_period", None) is not None:
        raise cx.fail("plant.plugin", f" = {uplug.name!r} cannot be a paralleled unit: it "
                      f"declares no OUTPUT_NODE (its output capacitor's state and capacitance) "
                      f"or integrates its own periods; two_stage_lc and single_lc can")
    if "i_out" not in [s.name for s in uplug.declaration.outputs] or "v_out" not in [
            s.name for s in uplug.declaration.outputs]:
        raise cx.fail("plant.plugin", f" = {uplug.name!r}: a unit needs the outputs v_out and i_out")
    # topology
    zero = [vals["cable_R"] == 0.0 and vals["cable_L"] == 0.0 for vals in units_vals]
    if all(zero):
        topology = "merged"
    else:
        topology = "cabled"
        for k, vals in enumerate(units_vals, 1):
            if not vals["cable_L"] > 0.0:
                raise cx.fail(f"units.unit{k}.cable_L", " = 0 H while another cable has an "
                              "impedance: give every cable an inductance (e.g. \"1 uH\"), or "
                              "every cable zero impedance (one node)")
        if not bus["C_bus"] > 0.0:
            raise cx.fail("units.C_bus", " = 0 F with cables of inductance: the bus needs a "
                          "capacitance (the device under test's input capacitance)")
    if sharing == "exchange":
        for k, vals in enumerate(units_vals, 1):
            if not vals["droop_R"] > 0.0:
                raise cx.fail(f"units.unit{k}.droop_R", " = 0 ohm: the exchange's sharing "
                              "builds on droop; give droop_R > 0")
    if sharing == "none" and any(v["droop_R"] > 0.0 for v in units_vals):
        raise cx.fail("units.droop_R", " is set but units.sharing = \"none\"; set "
                      "units.sharing = \"droop\" (or \"exchange\")")
    period_ticks = max(1, int(round(exch["period"] / Ts)))
    if abs(exch["period"] / Ts - period_ticks) > 1e-6 * period_ticks and sharing == "exchange":
        raise cx.fail("units.exchange.period", f" = {exch['period']:g} s is not a whole number "
                      f"of control periods Ts = {Ts:g} s")
    delay_ticks = int(round(exch["delay"] / Ts))
    ring = delay_ticks // period_ticks + 2
    if ring > MAX_RING:
        raise cx.fail("units.exchange.delay", f" = {exch['delay']:g} s is more than "
                      f"{MAX_RING - 2} exchange periods")
    stale = exch["stale"] if exch["stale"] > 0.0 else 10.0 * period_ticks * Ts + exch["delay"]
    # resets and faults of units
    for what in ("resets", "faults"):
        if not isinstance(tab.get(what, []), list):
            raise cx.fail(f"units.{what}", f" is not an array of tables; write [[units.{what}]] "
                          f"tables with unit and at" + (" and kind" if what == "faults" else ""))
    resets = []
    for i, r in enumerate(tab.get("resets", []) or []):
        if not isinstance(r, dict) or set(r) - {"unit", "at"} or {"unit", "at"} - set(r):
            raise cx.fail(f"units.resets[{i}]", " needs exactly unit = K and at = TIME")
        if count_overridden and isinstance(r["unit"], int) and r["unit"] > n:
            continue
        k = _unit_index(cx, f"units.resets[{i}].unit", r["unit"], n)
        at = quantity(f"units.resets[{i}].at", r["at"], "s", (0.0, duration))
        resets.append((at, k - 1))
    faults = []
    for i, f in enumerate(tab.get("faults", []) or []):
        if not isinstance(f, dict) or set(f) - {"unit", "at", "kind"} or {"unit", "at", "kind"} - set(f):
            raise cx.fail(f"units.faults[{i}]", " needs exactly unit = K, kind = \"lost\" or "
                          "\"trip\" and at = TIME")
        if count_overridden and isinstance(f["unit"], int) and f["unit"] > n:
            continue
        k = _unit_index(cx, f"units.faults[{i}].unit", f["unit"], n)
        if f["kind"] not in mc.FAULT_KINDS:
            raise cx.fail(f"units.faults[{i}].kind", f" = {f['kind']!r} is not one of "
                          f"{', '.join(repr(s) for s in mc.FAULT_KINDS)}")
        at = quantity(f"units.faults[{i}].at", f["at"], "s", (0.0, duration))
        faults.append((at, k - 1, f["kind"]))
    # the composite plant
    from hilrig.plugins.base import BuildContext
    udecl = uplug.declaration
    ctx = BuildContext(Ts=Ts)
    p_len = []
    for pch in units_plant:
        try:
            p_len.append(int(udecl.pack(pch.values, mp.unit_context(ctx, umod, pch.values)).shape[0]))
        except (ValueError, ArithmeticError) as exc:
            raise ScenarioError(f"{cx.name}: [plant] {udecl.name}: {exc}") from None
    outs = [s.name for s in udecl.outputs]
    spec = dict(n=n, topology=topology, unit_name=udecl.name, unit_sha=_sha(uplug),
                n_x=len(udecl.states), n_in=max(len(udecl.inputs), 1), n_y=len(outs),
                out_node=int(node[0]), out_node_param=str(node[1]), p_len=p_len,
                gate_currents=[int(i) for i in getattr(umod, "GATE_BLOCK_CURRENTS", ())],
                # the unit plant brings its own RK4 step: its equations do not depend on t
                # explicitly, and the bus plant gets one too (runtime/multi/plant.py)
                own_step=getattr(umod, "rk4_step", None) is not None,
                node_current=getattr(umod, "node_current", None) is not None)
    ppath = mp.generate(spec, uplug, folder)
    pmod = registry.load_file(str(ppath))
    pdecl = pmod.DECLARATION
    bus_plugin = registry.Plugin(kind="plant", name=pdecl.name, module=pmod, declaration=pdecl,
                                 origin=("file", str(ppath)))
    plant_values = dict(count=n, topology=topology, C_bus=bus["C_bus"],
                        v_load_min=float(units_plant[0].values.get("v_load_min", 10.0)),
                        units=[dict(pch.values) for pch in units_plant],
                        cable_R=[v["cable_R"] for v in units_vals],
                        cable_L=[v["cable_L"] for v in units_vals],
                        weight=[v["weight"] for v in units_vals],
                        # for the start state (the droop's steady state): not plant parameters
                        droop_R=[v["droop_R"] for v in units_vals], sharing=sharing)
    bus_choice = PluginChoice(plugin=bus_plugin, values=plant_values,
                              given=frozenset(plant.given))
    # the composite controller
    youts = [s.name for s in pdecl.outputs]
    conv = "i_L1" if "i_L1" in outs else ("i_L" if "i_L" in outs else "i_out")
    read_idx, iy_cur, iy_v, iy_i, c_plen, c_xlen = [], [], [], [], [], []
    uplugs, uref = [], []
    for k, cch in enumerate(units_ctrl, 1):
        cdecl = cch.plugin.declaration
        fb = getattr(cch.plugin.module, "READ_FALLBACKS", {})
        idx = []
        for name in cdecl.reads:
            nm = name if name in outs else fb.get(name)
            if nm not in outs:
                raise cx.fail(f"units.unit{k}.controller", f": {cdecl.name!r} reads {name!r}, "
                              f"which the unit plant {udecl.name!r} does not measure")
            idx.append(youts.index(mp.unit_signal(k, nm)))
        read_idx.append(idx)
        iy_cur.append(youts.index(mp.unit_signal(k, conv)))
        iy_v.append(youts.index(mp.unit_signal(k, "v_out")))
        iy_i.append(youts.index(mp.unit_signal(k, "i_out")))
        uctx = mp.unit_context(ctx, umod, units_plant[k - 1].values)
        try:
            c_plen.append(int(cdecl.pack(cch.values, uctx).shape[0]))
        except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
            raise ScenarioError(f"{cx.name}: units.unit{k}.controller {cdecl.name}: {exc}") from None
        c_xlen.append(max(cdecl.state_count(cch.values), 1))
        if cch.plugin.origin not in uref:
            uref.append(cch.plugin.origin)
            uplugs.append(cch.plugin)
    unit_ctrl = [uref.index(c.plugin.origin) for c in units_ctrl]
    lay = mc.layout(n, c_plen, c_xlen, [len(i) for i in read_idx])
    cspec = dict(n=n, layout=lay, n_in=spec["n_in"], p_len=c_plen, x_len=c_xlen,
                 read_idx=read_idx, iy_cur=iy_cur, iy_v=iy_v, iy_i=iy_i, reads=youts,
                 unit_ctrl=unit_ctrl, unit_names=[c.plugin.name for c in units_ctrl],
                 unit_sha=[_sha(p) for p in uplugs], unit_plant=_ref(uplug),
                 )
    cpath = mc.generate(cspec, uplugs, folder)
    cmod = registry.load_file(str(cpath))
    cplugin = registry.Plugin(kind="controller", name=cmod.DECLARATION.name, module=cmod,
                              declaration=cmod.DECLARATION, origin=("file", str(cpath)))
    cvalues = dict(
        units=[dict(plugin=_ref(c.plugin), values=dict(c.values), droop_R=v["droop_R"],
                    I_trip=v["I_trip"], V_trip=v["V_trip"])
               for c, v in zip(units_ctrl, units_vals)],
        weight=[v["weight"] for v in units_vals],
        sharing=dict(mode=sharing, loss=exch["loss"], share_bw=exch["share_bw"],
                     restore_bw=exch["restore_bw"], stale_ticks=stale / Ts,
                     correction_max=exch["correction_max"], period=exch["period"],
                     delay=exch["delay"], period_ticks=period_ticks, delay_ticks=delay_ticks,
                     ring=ring),
        load_current=ff, seed=int(seed % (2**31)), resets=resets, faults=faults, trip_ticks=bus["trip_ticks"],
        safe_u=safe_u)
    ctrl_choice = PluginChoice(plugin=cplugin, values=cvalues, given=frozenset())
    w = np.asarray([v["weight"] for v in units_vals], dtype=np.float64)
    us = UnitsSpec(count=n, topology=topology, sharing=sharing, shares=list(w / w.sum()),
                   unit_plant=udecl.name, unit_controllers=[c.plugin.name for c in units_ctrl],
                   i_out=[mp.unit_signal(k, "i_out") for k in range(1, n + 1)],
                   v_out=[mp.unit_signal(k, "v_out") for k in range(1, n + 1)],
                   i_conv=[mp.unit_signal(k, conv) for k in range(1, n + 1)],
                   i_trip=[v["I_trip"] for v in units_vals], plants=units_plant,
                   controllers=units_ctrl)
    return bus_choice, ctrl_choice, us


def _ref(pl) -> str:
    how, where = pl.origin
    return pl.name if how == "module" else where


def _unit_index(cx, key, v, n) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or not 1 <= v <= n:
        raise cx.fail(key, f" = {v!r} is not a unit number from 1 to {n}")
    return int(v)
