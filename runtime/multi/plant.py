"""The bus plant of N paralleled units: generated as a plant plugin module per unit plugin,
number of units, bus topology and the units' parameter-array lengths.

States, in order: each unit's states (its plant plugin's, for unit 1, 2, ...), then

- ``cabled`` topology: each unit's cable current ``unit<k>_i_cable`` [A] and the bus voltage
  ``v_bus`` [V] on the bus capacitance C_bus (the device under test's input capacitance):

  .. math::

      L_{c,k} \\frac{di_{c,k}}{dt} = v_k - R_{c,k} i_{c,k} - v_{bus}, \\qquad
      C_{bus} \\frac{dv_{bus}}{dt} = \\sum_k i_{c,k} - i_{load}(v_{bus})

  where v_k is unit k's output-capacitor voltage (the unit plant's ``OUTPUT_NODE`` state) and
  unit k's own load is its cable current (its load vector ``(0, 0, i_c,k)``);
- ``merged`` topology (every cable of zero impedance): the units' output capacitors and C_bus
  form one node. Each unit is evaluated with no load, giving its output node's rate
  f_k = dv_k/dt; the node's common rate is

  .. math::

      a = \\frac{\\sum_k C_k f_k - i_{load}(v)}{C_{bus} + \\sum_k C_k}

  and each output state takes it (so they stay equal); unit k's output current is
  C_k (f_k - a). No state of its own.

A unit whose enable input ``unit<k>_enable`` is not above 0.5 has its gates blocked (its command
reaches its plant as NaN: the plant's diode model, ``GATE_BLOCK_CURRENTS``); the runtime's trip
blocks every unit (every input NaN).

With N identical units, equal states and commands and the merged topology, every unit's state
is the same to the last bit, and the bus is one unit with N times each capacitance, 1/N of each
inductance and resistance (the scaling the tests check; docs/scenarios.md).
"""
from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from hilrig.plugins.base import Declaration, Signal
from hilrig.runtime.loop import source_key, tuple_text

TOPOLOGIES = ("cabled", "merged")
#: up to this many units the loop inlines the bus plant's kernels like any plant's (a call per
#: RK4 sub-step costs more than a small plant's rates); above, it calls them (compile time)
INLINE_UNITS = 2


def unit_signal(k: int, name: str) -> str:
    """The recorded name of unit k's (1-based) signal ``name``."""
    return f"unit{k}_{name}"


def _offsets(spec: dict) -> dict:
    """Index layout of the generated module (literals in its text)."""
    n, nx = spec["n"], spec["n_x"]
    p_off, o = [], 0
    for ln in spec["p_len"]:
        p_off.append(o)
        o += ln
    cab = o  # per unit: R_c, 1/L_c; then 1/C_node, v_load_min, C_k per unit
    bus = cab + 2 * n
    ncap = bus + 2
    x_cable = n * nx
    x_bus = n * nx + n
    return dict(p_off=p_off, cab=cab, bus=bus, ncap=ncap, icap=ncap + n, p_total=ncap + 2 * n,
                x_cable=x_cable,
                x_bus=x_bus, nx_total=n * nx + (n + 1 if spec["topology"] == "cabled" else 0))


def _split_text(spec: dict, lay: dict) -> list[str]:
    """``_rates``, ``derivs`` and ``rk4_step`` for a unit plant with ``node_current``.

    The bus node's rate is e (n - P/v) with e = 1/C_node, n the current into the node from the
    units (merged) or the cables (cabled) less the load's G v + I, and P/v the load's
    constant-power part. A stage of the RK4 step forms the node's next value as
    (v0 + c e n) - (c e P)/v, c e P known before v, so that only the division and one
    subtraction wait for the previous stage's v (the unit plant's own rk4_step does the same);
    the units' node currents come from ``node_current`` (no division on that path: a unit's
    derivs with no load would divide 0 by its voltage). The same method as the generic stages
    in exact arithmetic; in floating point they differ by rounding."""
    n, nx, nin = spec["n"], spec["n_x"], spec["n_in"]
    node = spec["out_node"]
    cabled = spec["topology"] == "cabled"
    body = []
    for k in range(n):
        o, e = lay["p_off"][k], lay["p_off"][k] + spec["p_len"][k]
        xs = ", ".join(f"x[{k * nx + j}]" for j in range(nx))
        us = ", ".join(f"u[{k * nin + j}]" for j in range(nin))
        nan = ", ".join("np.nan" for _ in range(nin))
        body.append(f"    u{k} = ({us},) if u[{n * nin + k}] > 0.5 else ({nan},)")
        # the unit's rates with no load: all but its node's, which is unused (and dropped by
        # the compiler)
        body.append(f"    f{k} = unit_derivs(t, p[{o}:{e}], ({xs},), u{k}, (0.0, 0.0, 0.0))")
        body.append(f"    c{k} = unit_node_current(p[{o}:{e}], ({xs},))")
    vm = f"p[{lay['bus'] + 1}]"
    items = []
    if cabled:
        split = [lay["x_bus"]]
        body.append(f"    vb = x[{lay['x_bus']}]")
        for k in range(n):
            ic = f"x[{lay['x_cable'] + k}]"
            items += [f"(c{k} - {ic}) * p[{lay['icap'] + k}]" if j == node else f"f{k}[{j}]"
                      for j in range(nx)]
        for k in range(n):
            ic = f"x[{lay['x_cable'] + k}]"
            items.append(f"(x[{k * nx + node}] - p[{lay['cab'] + 2 * k}] * {ic} - vb) * "
                         f"p[{lay['cab'] + 2 * k + 1}]")
        isum = " + ".join(f"x[{lay['x_cable'] + k}]" for k in range(n))
        items.append("nn")
    else:
        split = [k * nx + node for k in range(n)]
        body.append(f"    vb = x[{node}]")
        for k in range(n):
            items += ["nn" if j == node else f"f{k}[{j}]" for j in range(nx)]
        isum = " + ".join(f"c{k}" for k in range(n))
    # n: the units' (cables') current into the node less G v + I: not waiting for a division
    body.append(f"    nn = ({isum}) - (d[1] * vb + d[2])")
    lines = []
    lines.append('@njit(inline="always", error_model="numpy")\ndef _stage(t, p, x, u, d, he):\n'
                 '    """The rates with the bus node\'s split: its entry is n [A] (times\n'
                 '    1/C_node: its rate without the constant-power part); the last entry is\n'
                 '    he P / v (he = c / C_node of the stage)."""\n'
                 + "\n".join(body) + "\n"
                 f"    q = power_current_scaled(he, vb, d, {vm})\n"
                 "    return " + tuple_text(items + ["q"]))
    nt = lay["nx_total"]
    rates = [f"(k[{i}] * e - k[{nt}])" if i in split else f"k[{i}]" for i in range(nt)]
    lines.append('@njit(inline="always", error_model="numpy")\ndef _rates(t, p, x, u, d):\n'
                 '    """The bus plant\'s rates (runtime/multi/plant.py)."""\n'
                 f"    e = p[{lay['bus']}]\n"
                 "    k = _stage(t, p, x, u, d, e)\n"
                 "    return " + tuple_text(rates))
    lines.append('@njit(cache=True, error_model="numpy")\ndef derivs(t, p, x, u, d):\n'
                 '    """The bus plant\'s rates."""\n    return _rates(t, p, x, u, d)')
    if spec.get("own_step"):
        r = range(nt)

        def move(c, k):
            return tuple_text([f"(s[{i}] + ({c} * e) * {k}[{i}]) - {k}[{nt}]" if i in split
                               else f"s[{i}] + {c} * {k}[{i}]" for i in r])
        last = tuple_text([
            f"((s[{i}] + (w * e) * (k1[{i}] + 2.0 * k2[{i}] + 2.0 * k3[{i}] + k4[{i}])) - q123)"
            f" - k4[{nt}]" if i in split else
            f"s[{i}] + w * (k1[{i}] + 2.0 * k2[{i}] + 2.0 * k3[{i}] + k4[{i}])" for i in r])
        rk = ["    e = p[%d]" % lay["bus"],
              "    k1 = _stage(0.0, p, s, u, d, h * e)",
              f"    k2 = _stage(0.0, p, {move('h', 'k1')}, u, d, h * e)",
              f"    k3 = _stage(0.0, p, {move('h', 'k2')}, u, d, dt * e)",
              f"    k4 = _stage(0.0, p, {move('dt', 'k3')}, u, d, w * e)",
              # the constant-power parts of stages 1-3 were scaled by h, h, dt; their RK4
              # weights dt/6, dt/3, dt/3 are 1/3, 2/3, 1/3 of those
              f"    q123 = (k1[{nt}] + 2.0 * k2[{nt}] + k3[{nt}]) / 3.0",
              "    return " + last]
        lines.append('@njit(cache=True, error_model="numpy")\ndef rk4_step(dt, p, s, u, d):\n'
                     '    """One classic RK4 step of length dt (the runtime\'s method), the bus\n'
                     '    node split as in _split_text\'s docstring."""\n'
                     '    h = 0.5 * dt\n    w = dt / 6.0\n' + "\n".join(rk))
    return lines


def module_text(spec: dict, unit_import: str) -> str:
    """The generated module's text (``unit_import`` binds the unit plant module as ``_unit``)."""
    n, nx, nin = spec["n"], spec["n_x"], spec["n_in"]
    lay = _offsets(spec)
    node = spec["out_node"]
    ny_unit = spec["n_y"]
    cabled = spec["topology"] == "cabled"
    lines = []
    if spec.get("node_current"):
        lines += _split_text(spec, lay)
    else:
        # derivs
        body = []
        for k in range(n):
            o, e = lay["p_off"][k], lay["p_off"][k] + spec["p_len"][k]
            xs = ", ".join(f"x[{k * nx + j}]" for j in range(nx))
            us = ", ".join(f"u[{k * nin + j}]" for j in range(nin))
            nan = ", ".join("np.nan" for _ in range(nin))
            en = n * nin + k
            body.append(f"    u{k} = ({us},) if u[{en}] > 0.5 else ({nan},)")
            load = f"(0.0, 0.0, x[{lay['x_cable'] + k}])" if cabled else "(0.0, 0.0, 0.0)"
            body.append(f"    f{k} = unit_derivs(t, p[{o}:{e}], ({xs},), u{k}, {load})")
        if cabled:
            vb = f"x[{lay['x_bus']}]"
            body.append(f"    vb = {vb}")
            body.append(f"    il = load_current(vb, d, p[{lay['bus'] + 1}])")
            items = []
            for k in range(n):
                items += [f"f{k}[{j}]" for j in range(nx)]
            for k in range(n):
                ic = f"x[{lay['x_cable'] + k}]"
                items.append(f"(x[{k * nx + node}] - p[{lay['cab'] + 2 * k}] * {ic} - vb) * "
                             f"p[{lay['cab'] + 2 * k + 1}]")
            ssum = " + ".join(f"x[{lay['x_cable'] + k}]" for k in range(n))
            items.append(f"(({ssum}) - il) * p[{lay['bus']}]")
        else:
            body.append(f"    vb = x[{node}]")
            body.append(f"    il = load_current(vb, d, p[{lay['bus'] + 1}])")
            csum = " + ".join(f"p[{lay['ncap'] + k}] * f{k}[{node}]" for k in range(n))
            body.append(f"    a = (({csum}) - il) * p[{lay['bus']}]")
            items = []
            for k in range(n):
                items += ["a" if j == node else f"f{k}[{j}]" for j in range(nx)]
        body.append("    return " + tuple_text(items))
        lines.append('@njit(inline="always", error_model="numpy")\ndef _rates(t, p, x, u, d):\n'
                     '    """The bus plant\'s rates (runtime/multi/plant.py)."""\n' + "\n".join(body))
        lines.append('@njit(cache=True, error_model="numpy")\ndef derivs(t, p, x, u, d):\n'
                     '    """The bus plant\'s rates."""\n    return _rates(t, p, x, u, d)')
        if spec.get("own_step"):
            # one classic RK4 step, the rates inlined into it: the loop calls it once per sub-step
            # (its generic stages would call derivs four times); the unit plant's equations do
            # not depend on t explicitly (it brings its own rk4_step)
            nt = _offsets(spec)["nx_total"]
            r = range(nt)
            rk = ["    k1 = _rates(0.0, p, s, u, d)",
                  f"    k2 = _rates(0.0, p, {tuple_text([f's[{i}] + h * k1[{i}]' for i in r])}, u, d)",
                  f"    k3 = _rates(0.0, p, {tuple_text([f's[{i}] + h * k2[{i}]' for i in r])}, u, d)",
                  f"    k4 = _rates(0.0, p, {tuple_text([f's[{i}] + dt * k3[{i}]' for i in r])}, u, d)",
                  "    return " + tuple_text([f"s[{i}] + w * (k1[{i}] + 2.0 * k2[{i}] + 2.0 * k3[{i}]"
                                             f" + k4[{i}])" for i in r])]
            lines.append('@njit(cache=True, error_model="numpy")\ndef rk4_step(dt, p, s, u, d):\n'
                         '    """One classic RK4 step of length dt (the runtime\'s method)."""\n'
                         '    h = 0.5 * dt\n    w = dt / 6.0\n' + "\n".join(rk))
    # outputs: bus v_out, i_out; then per unit the unit plant's outputs
    ob = []
    if cabled:
        ob.append(f"    vb = x[{lay['x_bus']}]")
    else:
        ob.append(f"    vb = x[{node}]")
    ob.append(f"    il = load_current(vb, d, p[{lay['bus'] + 1}])")
    ob.append("    y[0] = vb")
    ob.append("    y[1] = il")
    nc = spec.get("node_current")
    if not cabled and nc:
        # each unit's current into the node, then the node's rate without a unit's derivs
        for k in range(n):
            o, e = lay["p_off"][k], lay["p_off"][k] + spec["p_len"][k]
            xs = ", ".join(f"x[{k * nx + j}]" for j in range(nx))
            ob.append(f"    c{k} = unit_node_current(p[{o}:{e}], ({xs},))")
        csum = " + ".join(f"c{k}" for k in range(n))
        ob.append(f"    a = (({csum}) - il) * p[{lay['bus']}]")
    elif not cabled:
        for k in range(n):
            o, e = lay["p_off"][k], lay["p_off"][k] + spec["p_len"][k]
            xs = ", ".join(f"x[{k * nx + j}]" for j in range(nx))
            us = ", ".join(f"u[{k * nin + j}]" for j in range(nin))
            nan = ", ".join("np.nan" for _ in range(nin))
            ob.append(f"    u{k} = ({us},) if u[{n * nin + k}] > 0.5 else ({nan},)")
            ob.append(f"    f{k} = unit_derivs(t, p[{o}:{e}], ({xs},), u{k}, (0.0, 0.0, 0.0))")
        csum = " + ".join(f"p[{lay['ncap'] + k}] * f{k}[{node}]" for k in range(n))
        ob.append(f"    a = (({csum}) - il) * p[{lay['bus']}]")
    for k in range(n):
        o, e = lay["p_off"][k], lay["p_off"][k] + spec["p_len"][k]
        us = ", ".join(f"u[{k * nin + j}]" for j in range(nin))
        nan = ", ".join("np.nan" for _ in range(nin))
        if cabled:
            ic = f"x[{lay['x_cable'] + k}]"
        elif nc:
            ic = f"c{k} - p[{lay['ncap'] + k}] * a"
        else:
            ic = f"p[{lay['ncap'] + k}] * (f{k}[{node}] - a)"
        y0 = 2 + k * ny_unit
        ob.append(f"    v{k} = ({us},) if u[{n * nin + k}] > 0.5 else ({nan},)")
        ob.append(f"    unit_outputs(t, p[{o}:{e}], x[{k * nx}:{(k + 1) * nx}], v{k}, "
                  f"(0.0, 0.0, {ic}), y[{y0}:{y0 + ny_unit}])")
    lines.append('@njit(cache=True, error_model="numpy")\ndef outputs(t, p, x, u, d, y):\n'
                 '    """Bus voltage and load current, then each unit\'s outputs."""\n'
                 + "\n".join(ob))
    # fast_rate: the load's incremental conductance over the bus node's capacitance
    lines.append(f'''@njit(cache=True, error_model="numpy")
def fast_rate(p, s, d):
    """|g| / C_node: the load's incremental conductance at the bus voltage over the bus
    node's capacitance (C_bus; merged: C_bus plus the units' output capacitances)."""
    v = s[{lay['x_bus'] if cabled else node}]
    vm = p[{lay['bus'] + 1}]
    if v >= vm:
        g = d[1] - d[0] / (v * v)
    else:
        g = d[1] + d[0] / (vm * vm)
    return abs(g) * p[{lay['bus']}]''')
    currents = [k * nx + c for k in range(n) for c in spec["gate_currents"]]
    node_import = ("unit_node_current = _inline(_unit.node_current)\n"
                   "from hilrig.plugins.plants.loads import power_current_scaled\n"
                   if spec.get("node_current") else "")
    not_inlined = () if n <= INLINE_UNITS else ("derivs", "outputs", "rk4_step")
    enables = [n * nin + k for k in range(n) for _ in spec["gate_currents"]]
    vstates = [lay["x_bus"]] if cabled else [k * nx + node for k in range(n)]
    head = f'''"""Generated by hilrig: the bus plant of {n} paralleled units of {spec["unit_name"]!r}
({spec["topology"]}). Do not edit: the file name is the hash of its text.
unit plugin source sha256: {spec["unit_sha"]}; hilrig sources: {source_key()}"""
import numpy as np
from numba import njit
from hilrig.plugins.plants.loads import load_current
from hilrig.runtime.multi import plant as _mp
{unit_import}
from hilrig.runtime.loop import inline as _inline
unit_derivs = _inline(_unit.derivs)
unit_outputs = _inline(_unit.outputs)
{node_import}#: the kernels the loop calls rather than inlines (they inline each unit's: inlined again
#: into every chunk function they would multiply the compile time); fast_rate is inlined
NOT_INLINED = {not_inlined!r}

SPEC = {spec!r}
DECLARATION = _mp.declaration(SPEC, _unit)
#: each unit's switch currents, with the enable input that blocks them (runtime/loop.py)
GATE_BLOCK_CURRENTS = {tuple(currents)!r}
GATE_BLOCK_ENABLE = {tuple(enables)!r}
#: the states the start offset moves (the bus node)
V_OUT_STATES = {tuple(vstates)!r}


def linear_rate(values):
    return _mp.linear_rate(SPEC, _unit, values, derivs)


'''
    return head + "\n\n\n".join(lines) + "\n"


def generate(spec: dict, unit_plugin, folder: Path) -> Path:
    """Write (if absent) the bus plant module for ``spec``; return its path."""
    return write_module(folder, "units_plant", module_text(spec, import_text(unit_plugin, "_unit")))


def import_text(plugin, alias: str) -> str:
    """The lines of a generated module that bind ``plugin``'s module as ``alias``."""
    how, where = plugin.origin
    if how == "module":
        return f"import {where} as {alias}"
    return (f"from hilrig.runtime.registry import load_file as _load_file\n"
            f"{alias} = _load_file({where!r})")


def write_module(folder: Path, prefix: str, text: str) -> Path:
    """Write (if absent) a generated module named by the hash of its text; its path."""
    path = folder / f"{prefix}_{hashlib.sha256(text.encode()).hexdigest()[:20]}.py"
    if not path.exists():
        _write(path, text)
    return path


def _write(path: Path, text: str) -> None:
    """Write then rename: a concurrent worker never imports a half-written file."""
    import os
    import tempfile
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, suffix=".tmp")
    with os.fdopen(fd, "w") as fh:
        fh.write(text)
    os.replace(tmp, path)


def declaration(spec: dict, unit) -> Declaration:
    """The generated module's DECLARATION (called at its import)."""
    n = spec["n"]
    udecl = unit.DECLARATION
    cabled = spec["topology"] == "cabled"
    states = []
    for k in range(1, n + 1):
        states += [Signal(unit_signal(k, s.name), s.unit, f"unit {k}: {s.description}")
                   for s in udecl.states]
    if cabled:
        states += [Signal(unit_signal(k, "i_cable"), "A", f"unit {k}: cable current")
                   for k in range(1, n + 1)]
        states.append(Signal("v_bus", "V", "bus voltage (on C_bus)"))
    outputs = [Signal("v_out", "V", "bus voltage"), Signal("i_out", "A", "load current")]
    for k in range(1, n + 1):
        outputs += [Signal(unit_signal(k, s.name), s.unit,
                           f"unit {k}: {s.description}" + (" (its output current)"
                                                             if s.name == "i_out" else ""))
                    for s in udecl.outputs]
    inputs = []
    for k in range(1, n + 1):
        inputs += [Signal(unit_signal(k, s.name), s.unit, f"unit {k}: {s.description}")
                   for s in udecl.inputs]
    inputs += [Signal(unit_signal(k, "enable"), "-", f"unit {k}: 1 runs, 0 gates blocked")
               for k in range(1, n + 1)]
    # written by the units' controller for the record; the plant does not use them
    inputs += [Signal(unit_signal(k, "trip"), "-", f"unit {k}: trip cause bits (1 over-current, "
                      f"2 over-voltage, 4 controller, 8 lost, 16 forced, 32 reset refused)")
               for k in range(1, n + 1)]
    inputs += [Signal(unit_signal(k, "correction"), "V",
                      f"unit {k}: sharing correction of its reference") for k in range(1, n + 1)]
    lay = _offsets(spec)

    def build(values, ctx):
        return pack(spec, unit, values, ctx, lay)

    def equilibrium(values, v_out, d):
        return steady_state(spec, unit, values, v_out, d)

    return Declaration(
        kind="plant", name=f"{n}x {spec['unit_name']}",
        summary=f"{n} paralleled units of {spec['unit_name']} on one DC bus ({spec['topology']})",
        params=(), states=tuple(states), outputs=tuple(outputs), inputs=tuple(inputs),
        source="hilrig paralleled units (runtime/multi/plant.py); units: " + udecl.source,
        build=build, equilibrium=equilibrium)


def unit_context(ctx, unit, values: dict):
    """The build context a unit's plugins see: the unit's own plant."""
    from hilrig.plugins.base import BuildContext
    udecl = unit.DECLARATION
    return BuildContext(Ts=ctx.Ts, plant=dict(values), plant_name=udecl.name,
                        plant_outputs=tuple(s.name for s in udecl.outputs),
                        plant_states=tuple(s.name for s in udecl.states),
                        plant_module=unit, actuation_delay=ctx.actuation_delay,
                        design_range=ctx.design_range)


def pack(spec, unit, values, ctx, lay) -> np.ndarray:
    n = spec["n"]
    parts = []
    for k in range(n):
        uv = values["units"][k]
        pk = unit.DECLARATION.pack(uv, unit_context(ctx, unit, uv))
        if pk.shape[0] != spec["p_len"][k]:
            raise ValueError(f"unit {k + 1}: its plant's parameter array has {pk.shape[0]} "
                             f"entries, the bus plant was generated for {spec['p_len'][k]}")
        parts.append(pk)
    cab = []
    for k in range(n):
        lc = float(values["cable_L"][k])
        cab += [float(values["cable_R"][k]), 1.0 / lc if lc > 0.0 else 0.0]
    caps = [float(values["units"][k][spec["out_node_param"]]) for k in range(n)]
    c_node = float(values["C_bus"]) + (0.0 if spec["topology"] == "cabled" else sum(caps))
    bus = [1.0 / c_node, float(values["v_load_min"])]
    icaps = [1.0 / c for c in caps]
    return np.concatenate(parts + [np.array(cab + bus + caps + icaps, dtype=np.float64)])


def shares(values: dict) -> np.ndarray:
    """Each unit's share of the load current: its weight over the sum of the weights."""
    w = np.asarray(values["weight"], dtype=np.float64)
    return w / w.sum()


def droop_bus(values, v_set: float, d) -> tuple[float, np.ndarray] | None:
    """The droop's steady state for the units' set voltage v_set [V] and load d: each unit
    holds its terminal voltage at v_set - R_d,k i_k, the bus is v_k - R_c,k i_k, so
    i_k = (v_set - v_bus) / (R_d,k + R_c,k) and their sum is the load's current at v_bus.
    Newton's method from v_set on that one equation; (v_bus, currents), or None when it has
    no solution near v_set (a load beyond what the droop can hold)."""
    from hilrig.plugins.plants.loads import load_current
    rd = np.asarray(values.get("droop_R", [0.0] * values["count"]), dtype=np.float64)
    rc = np.asarray(values["cable_R"], dtype=np.float64) if values["topology"] == "cabled" \
        else np.zeros(values["count"])
    if values.get("sharing", "none") == "none" or not np.all(rd + rc > 0.0):
        return None
    g = float(np.sum(1.0 / (rd + rc)))
    d = np.asarray(d, dtype=np.float64)
    vmin = float(values["v_load_min"])

    def f(vb):
        return g * (v_set - vb) - float(load_current(vb, d, vmin))

    vb = float(v_set)
    for _ in range(50):
        h = 1e-6 * max(1.0, abs(vb))
        df = (f(vb + h) - f(vb - h)) / (2 * h)
        if not (df != 0.0 and np.isfinite(df)):
            return None
        step = f(vb) / df
        vb -= step
        if not (np.isfinite(vb) and 0.0 < vb <= 2.0 * v_set):
            return None
        if abs(step) < 1e-12 * max(1.0, abs(vb)):
            return vb, (v_set - vb) / (rd + rc)
    return None


def steady_state(spec, unit, values, v_out: float, d) -> np.ndarray:
    """A start state for the output voltage v_out [V] with load d. With droop (sharing
    "droop" or "exchange") v_out is the units' set voltage and the state is the droop's steady
    state below it (:func:`droop_bus`); otherwise the bus is at v_out and each unit carries
    its share of the load current (by weight), its output voltage the bus voltage plus its
    cable's drop."""
    from hilrig.plugins.plants.loads import load_current
    n, cabled = spec["n"], spec["topology"] == "cabled"
    d = np.asarray(d, dtype=np.float64)
    droop = droop_bus(values, float(v_out), d)
    if droop is not None:
        v_bus, cur = droop
    else:
        v_bus = float(v_out)
        il = float(load_current(v_bus, d, float(values["v_load_min"])))
        cur = il * shares(values)
    xs, ic = [], []
    for k in range(n):
        i = float(cur[k])
        vk = v_bus + (float(values["cable_R"][k]) * i if cabled else 0.0)
        xs.append(np.asarray(unit.DECLARATION.equilibrium(values["units"][k], vk,
                                                          np.array([0.0, 0.0, i])), dtype=np.float64))
        ic.append(i)
    x = np.concatenate(xs)
    if cabled:
        x = np.concatenate([x, np.array(ic), np.array([float(v_bus)])])
    return x


def linear_rate(spec, unit, values, derivs=None) -> float:
    """A bound [1/s] on the eigenvalues of the bus plant's linear part: the spectral radius of
    its Jacobian (:func:`_spectral_radius`), or else, as each unit plant's ``linear_rate``
    (Gershgorin in energy coordinates): each unit's own bound plus its cable's
    coupling 1/sqrt(L_c C_k); each cable's R_c/L_c plus its couplings to its unit and to the
    bus; the bus row's sum of couplings 1/sqrt(L_c C_bus)."""
    if derivs is not None:
        rate = _spectral_radius(spec, unit, values, derivs)
        if rate is not None:
            return rate
    own = getattr(unit, "linear_rate", None)
    n = spec["n"]
    rates = []
    for k in range(n):
        uv = values["units"][k]
        rates.append(float(own(uv)) if own is not None else 0.0)
    if spec["topology"] != "cabled":
        return max(rates) if own is not None else None
    cb = float(values["C_bus"])
    bus = 0.0
    for k in range(n):
        lc = float(values["cable_L"][k])
        ck = float(values["units"][k][spec["out_node_param"]])
        wk = 1.0 / np.sqrt(lc * ck)
        wb = 1.0 / np.sqrt(lc * cb)
        rates[k] += wk
        rates.append(float(values["cable_R"][k]) / lc + wk + wb)
        bus += wb
    rates.append(bus)
    return float(max(rates))



def _spectral_radius(spec, unit, values, derivs):
    """The largest eigenvalue magnitude [1/s] of the bus plant's Jacobian with no load, at its
    steady state at half of unit 1's DC link, every unit running (central differences: exact
    to rounding for the linear filters and cables, whose rates do not depend on the state);
    None when it is not finite. Gershgorin's bound (the unit plants' own ``linear_rate``)
    overestimates the bus row of several cables a few times, which would cost sub-steps."""
    from hilrig.plugins.base import BuildContext
    v = 0.5 * float(values["units"][0].get("V_dc", 400.0))
    d = np.zeros(3)
    p = pack(spec, unit, values, BuildContext(Ts=1.0), _offsets(spec))
    x0 = steady_state(spec, unit, values, v, d)
    n = spec["n"]
    u = np.concatenate([np.full(spec["n_in"] * n, v), np.ones(n), np.zeros(2 * n)])
    nx = x0.shape[0]
    jac = np.zeros((nx, nx))
    for j in range(nx):
        h = 1e-3 * max(1.0, abs(x0[j]))
        xp, xm = x0.copy(), x0.copy()
        xp[j] += h
        xm[j] -= h
        jac[:, j] = (np.array(derivs(0.0, p, tuple(xp), u, d))
                     - np.array(derivs(0.0, p, tuple(xm), u, d))) / (2 * h)
    if not np.all(np.isfinite(jac)):
        return None
    return float(np.max(np.abs(np.linalg.eigvals(jac))))
