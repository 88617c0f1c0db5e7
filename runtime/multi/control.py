"""The units' controllers on one bus: generated as one controller plugin module that runs each
unit's controller instance (any controller plugin, its own parameters and states), the
per-unit interlocks, the unit faults and resets, and the current sharing.

Per tick, for each unit k (1 .. N), in this order (:func:`begin`, then the unit's kernels, then
:func:`after`):

1. unit faults of this tick (``lost``: the unit's gates block for good, it stops sending its
   messages and is never reset; ``trip``: a forced trip of the unit);
2. per-unit interlocks on its measurements: its converter current's magnitude above ``I_trip``
   and its terminal voltage above ``V_trip`` (or either not finite), each for ``trip_ticks``
   ticks in a row; a trip latches the unit's gate block (its enable 0) while the other units
   carry on; a scheduled reset of the unit is accepted only when no condition holds;
3. message exchange (``sharing = "exchange"``): every ``period`` each unit that runs publishes
   (its output current, its terminal voltage); unit j receives unit k's message published at
   tick k_p = floor((k - D) / P) P, ``delay`` D ticks later, unless it is lost (independently
   per sender, receiver and message, with probability ``loss``, from the scenario's seed); a
   message older than ``stale`` is left out;
4. the unit's voltage reference: v_ref - R_d,k i_k + delta_k, with droop R_d,k (a virtual
   resistance) and delta_k the sharing correction:

   .. math::

       \\dot\\delta_k = \\omega_s R_{d,k} (w_k \\bar n - i_k) + \\omega_r (v_{ref} - \\bar v),
       \\qquad \\bar n = \\operatorname{mean}_j i_j / w_j, \\quad \\bar v = \\operatorname{mean}_j v_j

   over the units heard (and itself): w_k the unit's share, omega_s (``share_bw``) and
   omega_r (``restore_bw``) the bandwidths of current sharing and voltage restoration
   (droop with distributed secondary control by averaging); delta_k is clamped to
   +-``correction_max`` and held while the unit is blocked;
5. the unit's controller ``step`` (its ``init`` first on tick 0 and after an accepted reset);
   a fault code, a non-finite command or state trips the unit (cause 4).

The cause bits, recorded per unit as ``unit<k>_trip``: 1 over-current, 2 over-voltage,
4 controller fault or non-finite, 8 lost, 16 forced trip; 32 a reset was refused (that tick).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
from numba import njit

from hilrig.plugins.base import Declaration, Signal

SHARING = ("none", "droop", "exchange")
#: what a unit's controller reads as its load current ``i_out`` (units.load_current)
FEEDFORWARD = ("share", "none", "own")
FAULT_KINDS = {"lost": 1, "trip": 2}
CAUSES = {1: "over-current", 2: "over-voltage", 4: "controller fault or non-finite", 8: "lost",
          16: "forced trip", 32: "reset refused"}

# header of p
H_N, H_TS, H_MODE, H_PERIOD, H_DELAY, H_LOSS, H_SHARE_BW, H_RESTORE_BW, H_STALE, H_CORR = range(10)
H_SEED, H_NRESET, H_NFAULT, H_RING, H_TRIPTICKS, H_OSTAT, H_ORING, H_OHEARD, H_NIN = range(10, 19)
H_ORST, H_OFLT, H_FF = 19, 20, 21
HSIZE = 24
# per-unit rows of p
U_RD, U_W, U_ITRIP, U_VTRIP, U_IYC, U_IYV, U_IYI, U_SAFE = range(8)
UCOLS = 8
# per-unit status rows of xc
S_LATCH, S_CAUSE, S_CNT_I, S_CNT_V, S_REINIT, S_DELTA, S_LOST, S_REFUSED = range(8)
SCOLS = 8
GSIZE = 4
#: the inputs of the bus plant after the units' commands: enable, trip, correction (each N)
EXTRA_INPUTS = ("enable", "trip", "correction")


def layout(n: int, p_lens, x_lens, read_lens) -> dict:
    """Offsets into p and xc (literals of the generated module). What varies with the
    scenario's settings rather than its plugins (the reset and fault tables at the end of p,
    the message ring at the end of xc) is found through p's header at run time, so that one
    generated module (one compile) serves them all."""
    urow = HSIZE
    p_off, o = [], urow + n * UCOLS
    for ln in p_lens:
        p_off.append(o)
        o += ln
    stat = GSIZE
    heard = stat + n * SCOLS
    o2 = heard + n * n * 3
    y_off, r_off = [], []
    for ln in read_lens:
        y_off.append(o2)
        o2 += max(ln, 1)
        r_off.append(o2)
        o2 += 5
    x_off = []
    for ln in x_lens:
        x_off.append(o2)
        o2 += max(ln, 1)
    return dict(urow=urow, p_off=p_off, p_fixed=o, stat=stat, heard=heard, y_off=y_off,
                r_off=r_off, x_off=x_off, x_fixed=o2)


@njit(cache=True, inline="always", error_model="numpy")
def _uniform(seed, a, b, c):
    """A uniform number in [0, 1) from the seed and three integers (splitmix64 finaliser)."""
    z = np.uint64(seed) ^ (np.uint64(a) * np.uint64(0x9E3779B97F4A7C15))
    z ^= np.uint64(b) * np.uint64(0xBF58476D1CE4E5B9)
    z ^= np.uint64(c) * np.uint64(0x94D049BB133111EB)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    z = z ^ (z >> np.uint64(31))
    return float(z >> np.uint64(11)) * (1.0 / 9007199254740992.0)


@njit(cache=True, error_model="numpy")
def start(p, xc, y):
    """First call (tick 0): every unit runs, no correction, the message buffers hold each
    unit's first measurement as if published at tick 0."""
    n = int(p[H_N])
    ring = int(p[H_RING])
    so, ro, ho = int(p[H_OSTAT]), int(p[H_ORING]), int(p[H_OHEARD])
    for k in range(n):
        b = so + k * SCOLS
        for j in range(SCOLS):
            xc[b + j] = 0.0
        xc[b + S_REINIT] = 1.0
        row = HSIZE + k * UCOLS
        ik, vk = y[int(p[row + U_IYI])], y[int(p[row + U_IYV])]
        for m in range(ring):
            q = ro + (k * ring + m) * 3
            xc[q] = ik
            xc[q + 1] = vk
            xc[q + 2] = -1.0
        for j in range(n):
            q = ho + (j * n + k) * 3
            xc[q] = ik
            xc[q + 1] = vk
            xc[q + 2] = 0.0
    xc[0] = 1.0


@njit(cache=True, inline="always", error_model="numpy")
def begin(t, p, xc, y, r):
    """Stages 1-4 of the docstring for every unit; returns the tick."""
    n = int(p[H_N])
    ts = p[H_TS]
    kk = int(np.floor(t / ts + 0.5))
    mode = int(p[H_MODE])
    so, ro, ho = int(p[H_OSTAT]), int(p[H_ORING]), int(p[H_OHEARD])
    ring = int(p[H_RING])
    per = int(p[H_PERIOD])
    trip_ticks = p[H_TRIPTICKS]
    nres, nflt = int(p[H_NRESET]), int(p[H_NFAULT])
    rst, flt = int(p[H_ORST]), int(p[H_OFLT])
    for k in range(n):
        b = so + k * SCOLS
        row = HSIZE + k * UCOLS
        xc[b + S_REFUSED] = 0.0
        # 1 unit faults
        for f in range(nflt):
            q = flt + 3 * f
            if int(p[q + 1]) == k:
                if p[q + 2] == 1.0 and kk >= p[q]:
                    xc[b + S_LOST] = 1.0
                    xc[b + S_LATCH] = 1.0
                    xc[b + S_CAUSE] = float(int(xc[b + S_CAUSE]) | 8)
                elif p[q + 2] == 2.0 and kk == p[q]:
                    xc[b + S_LATCH] = 1.0
                    xc[b + S_CAUSE] = float(int(xc[b + S_CAUSE]) | 16)
        # 2 per-unit interlocks
        ic = y[int(p[row + U_IYC])]
        vk = y[int(p[row + U_IYV])]
        i_hi = p[row + U_ITRIP] > 0.0 and not (abs(ic) <= p[row + U_ITRIP])
        v_hi = p[row + U_VTRIP] > 0.0 and not (vk <= p[row + U_VTRIP])
        xc[b + S_CNT_I] = xc[b + S_CNT_I] + 1.0 if i_hi else 0.0
        xc[b + S_CNT_V] = xc[b + S_CNT_V] + 1.0 if v_hi else 0.0
        if xc[b + S_CNT_I] >= trip_ticks:
            xc[b + S_LATCH] = 1.0
            xc[b + S_CAUSE] = float(int(xc[b + S_CAUSE]) | 1)
        if xc[b + S_CNT_V] >= trip_ticks:
            xc[b + S_LATCH] = 1.0
            xc[b + S_CAUSE] = float(int(xc[b + S_CAUSE]) | 2)
        for m in range(nres):
            q = rst + 2 * m
            if int(p[q + 1]) == k and kk == p[q] and xc[b + S_LATCH] != 0.0:
                if xc[b + S_LOST] == 0.0 and not i_hi and not v_hi:
                    xc[b + S_LATCH] = 0.0
                    xc[b + S_CAUSE] = 0.0
                    xc[b + S_REINIT] = 1.0
                    xc[b + S_DELTA] = 0.0
                else:
                    xc[b + S_REFUSED] = 1.0
    # 3 exchange
    if mode == 2:
        dly = int(p[H_DELAY])
        seed = int(p[H_SEED])
        if kk % per == 0:
            slot = (kk // per) % ring
            for k in range(n):
                if xc[so + k * SCOLS + S_LOST] == 0.0:
                    row = HSIZE + k * UCOLS
                    q = ro + (k * ring + slot) * 3
                    xc[q] = y[int(p[row + U_IYI])]
                    xc[q + 1] = y[int(p[row + U_IYV])]
                    xc[q + 2] = float(kk)
        if kk >= dly:
            kp = ((kk - dly) // per) * per
            slot = (kp // per) % ring
            for k in range(n):
                q = ro + (k * ring + slot) * 3
                if xc[q + 2] != float(kp):
                    continue  # not published (the sender was lost) or overwritten
                for j in range(n):
                    if j == k:
                        continue
                    h = ho + (j * n + k) * 3
                    if float(kp) > xc[h + 2] and not (_uniform(seed, kp, k, j) < p[H_LOSS]):
                        xc[h] = xc[q]
                        xc[h + 1] = xc[q + 1]
                        xc[h + 2] = float(kp)
    # 4 references
    for k in range(n):
        b = so + k * SCOLS
        row = HSIZE + k * UCOLS
        ik = y[int(p[row + U_IYI])]
        if mode == 2 and xc[b + S_LATCH] == 0.0:
            vk = y[int(p[row + U_IYV])]
            sn = ik / p[row + U_W]
            sv = vk
            m = 1.0
            for j in range(n):
                if j == k:
                    continue
                h = ho + (k * n + j) * 3
                if kk - xc[h + 2] <= p[H_STALE]:
                    sn += xc[h] / p[HSIZE + j * UCOLS + U_W]
                    sv += xc[h + 1]
                    m += 1.0
            dd = (p[H_SHARE_BW] * p[row + U_RD] * (p[row + U_W] * sn / m - ik)
                  + p[H_RESTORE_BW] * (r[0] - sv / m))
            de = xc[b + S_DELTA] + ts * dd
            cm = p[H_CORR]
            if de > cm:
                de = cm
            elif de < -cm:
                de = -cm
            xc[b + S_DELTA] = de
    return kk


@njit(cache=True, inline="always", error_model="numpy")
def load_read(p, y, k, i):
    """What unit k's controller reads as its load current ``i_out`` (``units.load_current``):
    its share of the bus's load current (a bus current sensor every unit reads), none (0 A),
    or its own output current (as if it were alone: with a load-current feed-forward that is
    positive feedback of its own current, the units' currents then drift apart)."""
    ff = p[H_FF]
    if ff == 0.0:
        return y[1] * p[HSIZE + k * UCOLS + U_W]
    if ff == 1.0:
        return 0.0
    return y[i]


@njit(cache=True, inline="always", error_model="numpy")
def reference(p, xc, y, r, k, ro):
    """Unit k's reference vector into xc[ro:ro+5]: droop and correction on v_ref."""
    row = HSIZE + k * UCOLS
    b = int(p[H_OSTAT]) + k * SCOLS
    mode = int(p[H_MODE])
    v = r[0]
    if mode >= 1:
        v = v - p[row + U_RD] * y[int(p[row + U_IYI])] + xc[b + S_DELTA]
    xc[ro] = v
    for j in range(1, 5):
        xc[ro + j] = r[j]


@njit(cache=True, inline="always", error_model="numpy")
def after(p, xc, u, k, code, x0, x1, u0, u1):
    """After unit k's step: a fault code or a non-finite command or state trips the unit."""
    b = int(p[H_OSTAT]) + k * SCOLS
    bad = code != 0
    for j in range(u0, u1):
        if not (u[j] - u[j] == 0.0):
            bad = True
    for j in range(x0, x1):
        if not (xc[j] - xc[j] == 0.0):
            bad = True
    if bad:
        xc[b + S_LATCH] = 1.0
        xc[b + S_CAUSE] = float(int(xc[b + S_CAUSE]) | 4)
        for j in range(x0, x1):
            xc[j] = 0.0


@njit(cache=True, inline="always", error_model="numpy")
def finish(p, xc, u):
    """Each unit's enable, trip cause and correction into u; a blocked unit's command is its
    safe value."""
    n = int(p[H_N])
    nin = int(p[H_NIN])
    so = int(p[H_OSTAT])
    for k in range(n):
        b = so + k * SCOLS
        latched = xc[b + S_LATCH] != 0.0
        if latched:
            for j in range(nin):
                u[k * nin + j] = p[HSIZE + k * UCOLS + U_SAFE]
        u[n * nin + k] = 0.0 if latched else 1.0
        u[n * nin + n + k] = xc[b + S_CAUSE] + (32.0 if xc[b + S_REFUSED] != 0.0 else 0.0)
        u[n * nin + 2 * n + k] = xc[b + S_DELTA]


def module_text(spec: dict, imports: list[str]) -> str:
    from hilrig.runtime.loop import source_key
    n = spec["n"]
    lay = spec["layout"]
    nin = spec["n_in"]
    lines = []
    for k in range(n):
        lines.append(f"c{k}_init = _inline(_c{spec['unit_ctrl'][k]}.init)")
        lines.append(f"c{k}_step = _inline(_c{spec['unit_ctrl'][k]}.step)")
    body_init, body_step = [], []
    for k in range(n):
        pa, pb = lay["p_off"][k], lay["p_off"][k] + spec["p_len"][k]
        xa, xb = lay["x_off"][k], lay["x_off"][k] + max(spec["x_len"][k], 1)
        ya, yb = lay["y_off"][k], lay["y_off"][k] + max(len(spec["read_idx"][k]), 1)
        ra, rb = lay["r_off"][k], lay["r_off"][k] + 5
        ua, ub = k * nin, (k + 1) * nin
        st = lay["stat"] + k * SCOLS
        copy = []
        for m, i in enumerate(spec["read_idx"][k]):
            if i == spec["iy_i"][k]:
                # the unit's load current as its controller reads it (units.load_current)
                # (load_read written out with this unit's indices)
                w = HSIZE + k * UCOLS + U_W
                copy.append(f"    xc[{ya + m}] = (y[1] * p[{w}] if ff == 0.0 else "
                            f"(0.0 if ff == 1.0 else y[{i}]))")
            else:
                copy.append(f"    xc[{ya + m}] = y[{i}]")
        copy = "\n".join(copy)
        # the unit's reference (reference() written out with this unit's indices: the
        # helper's index lookups cost about 20 ns a unit)
        row = HSIZE + k * UCOLS
        ref = (f"    xc[{ra}] = (r[0] - p[{row + U_RD}] * y[{spec['iy_i'][k]}] + "
               f"xc[{st + S_DELTA}]) if droop else r[0]\n"
               + "\n".join(f"    xc[{ra + j}] = r[{j}]" for j in range(1, 5)))
        call_init = f"c{k}_init(p[{pa}:{pb}], xc[{xa}:{xb}], xc[{ya}:{yb}], xc[{ra}:{rb}])"
        body_init.append(f"    # unit {k + 1}\n{copy}\n{ref}\n    {call_init}\n    xc[{st + S_REINIT}] = 0.0")
        body_step.append(
            f"    # unit {k + 1}\n{copy}\n{ref}\n"
            f"    if xc[{st + S_LATCH}] == 0.0:\n"
            f"        if xc[{st + S_REINIT}] != 0.0:\n"
            f"            {call_init}\n"
            f"            xc[{st + S_REINIT}] = 0.0\n"
            f"        code = c{k}_step(t, p[{pa}:{pb}], xc[{xa}:{xb}], xc[{ya}:{yb}], xc[{ra}:{rb}], u[{ua}:{ub}])\n"
            f"        _mc.after(p, xc, u, {k}, code, {xa}, {xb}, {ua}, {ub})")
    head = f'''"""Generated by hilrig: the controllers of {n} paralleled units
({", ".join(spec["unit_names"])}). Do not edit: the file name is the hash of its text.
unit plugin sources sha256: {", ".join(spec["unit_sha"])}; hilrig sources: {source_key()}"""
import numpy as np
from numba import njit
from hilrig.runtime.loop import inline as _inline
from hilrig.runtime.multi import control as _mc
{chr(10).join(imports)}
{chr(10).join(lines)}

SPEC = {spec!r}
DECLARATION = _mc.declaration(SPEC)
#: the kernels the loop calls rather than inlines (init runs on tick 0 and after a reset);
#: step is inlined into the loop like any controller's (8 cabled units: 20.8x -> 21.9x real
#: time in bench/parallel.py, for about 8 % more compile time)
NOT_INLINED = ("init",)


@njit(cache=True, error_model="numpy")
def init(p, xc, y, r):
    """Tick 0: every unit's message buffers and its controller's bumpless start; later (the
    runtime's reset) each unit that runs starts again."""
    if xc[0] == 0.0:
        _mc.start(p, xc, y)
    ff = p[{H_FF}]
    droop = p[{H_MODE}] >= 1.0
{chr(10).join(body_init)}


@njit(cache=True, error_model="numpy")
def step(t, p, xc, y, r, u):
    """Every unit: faults, interlocks, exchange, reference, then its controller."""
    _mc.begin(t, p, xc, y, r)
    ff = p[{H_FF}]
    droop = p[{H_MODE}] >= 1.0
{chr(10).join(body_step)}
    _mc.finish(p, xc, u)
    return 0
'''
    return head


def generate(spec: dict, plugins: list, folder: Path) -> Path:
    """Write (if absent) the units' controller module for ``spec``; return its path."""
    from .plant import import_text, write_module
    imports = [import_text(pl, f"_c{i}") for i, pl in enumerate(plugins)]
    return write_module(folder, "units_control", module_text(spec, imports))


def declaration(spec: dict) -> Declaration:
    """The generated controller's DECLARATION (called at its import)."""
    n = spec["n"]
    lay = spec["layout"]
    states = (Signal("units", "-", "units' controller states, status and message buffers"),)

    def build(values, ctx):
        return pack(spec, values, ctx)

    return Declaration(
        kind="controller", name=f"units({', '.join(dict.fromkeys(spec['unit_names']))})",
        summary=f"{n} unit controllers with per-unit interlocks, droop and sharing",
        params=(), states=tuple(states), reads=tuple(spec["reads"]),
        outputs=(), source="hilrig paralleled units (runtime/multi/control.py)", build=build,
        n_states=lambda values: lay["x_fixed"] + 3 * n * int(values["sharing"]["ring"]))


def pack(spec: dict, values: dict, ctx) -> np.ndarray:
    from hilrig.runtime import registry
    from .plant import unit_context
    n = spec["n"]
    lay = spec["layout"]
    sh = values["sharing"]
    mode = SHARING.index(sh["mode"])
    head = np.zeros(HSIZE)
    head[H_N] = n
    head[H_TS] = ctx.Ts
    head[H_MODE] = mode
    head[H_PERIOD] = sh["period_ticks"]
    head[H_DELAY] = sh["delay_ticks"]
    head[H_LOSS] = sh["loss"]
    head[H_SHARE_BW] = sh["share_bw"]
    head[H_RESTORE_BW] = sh["restore_bw"]
    head[H_STALE] = sh["stale_ticks"]
    head[H_CORR] = sh["correction_max"]
    head[H_SEED] = values["seed"]
    head[H_NRESET] = len(values["resets"])
    head[H_NFAULT] = len(values["faults"])
    head[H_RING] = sh["ring"]
    head[H_TRIPTICKS] = values["trip_ticks"]
    head[H_OSTAT] = lay["stat"]
    head[H_ORING] = lay["x_fixed"]
    head[H_ORST] = lay["p_fixed"]
    head[H_OFLT] = lay["p_fixed"] + 2 * len(values["resets"])
    head[H_OHEARD] = lay["heard"]
    head[H_NIN] = spec["n_in"]
    head[H_FF] = FEEDFORWARD.index(values["load_current"])
    rows = np.zeros(n * UCOLS)
    w = np.asarray(values["weight"], dtype=np.float64)
    w = w / w.sum()
    for k in range(n):
        u = values["units"][k]
        rows[k * UCOLS:(k + 1) * UCOLS] = [u["droop_R"], w[k], u["I_trip"], u["V_trip"],
                                           spec["iy_cur"][k], spec["iy_v"][k], spec["iy_i"][k],
                                           values["safe_u"]]
    rst = np.array([[round(tt / ctx.Ts), k] for tt, k in values["resets"]],
                   dtype=np.float64).ravel()
    flt = np.array([[round(tt / ctx.Ts), k, FAULT_KINDS[kind]] for tt, k, kind in values["faults"]],
                   dtype=np.float64).ravel()
    parts = [head, rows]
    plant_units = ctx.plant.get("units") if isinstance(ctx.plant, dict) else None
    unit_mod = registry.load("plant", spec["unit_plant"]).module
    for k in range(n):
        u = values["units"][k]
        pl = registry.load("controller", u["plugin"])
        uctx = unit_context(ctx, unit_mod, plant_units[k] if plant_units else {})
        pk = pl.declaration.pack(u["values"], uctx)
        if pk.shape[0] != spec["p_len"][k]:
            raise ValueError(f"unit {k + 1}: its controller's parameter array has {pk.shape[0]} "
                             f"entries, the units' controller was generated for {spec['p_len'][k]}")
        parts.append(pk)
    return np.concatenate(parts + [rst, flt])
