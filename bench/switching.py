"""Speed of the switching-level plant next to the averaged plant and a bare fused loop, and the
averaged-versus-switched error, measured in the same run.

Scenario (invented demo data, as examples/switching/three_phase_20kHz.toml but 1 s long): the
demo's 100 V step (400 V -> 500 V at 0.1 s) at 50 kW, cascaded_pi, Ts = 50 us, recording on.

* switched: hilrig's SIL chunk loop (``run_chunk``) with ``switched_two_stage``: 3 interleaved
  phases at 20 kHz, 0.5 us dead time, 450 uH and 15 mohm each, the demo's second stage.
* averaged: the same loop with ``two_stage_lc`` (L1 = 150 uH, R1 = 5 mohm: the three phases in
  parallel), 4 RK4 substeps.
* bare: a hand-written numba function doing only the switched integration of the same circuit
  (the same phases, dead time, diodes, filter and load), period by period from the switched
  run's recorded states with its recorded commands (open loop the constant-power load is
  unstable, so a free replay would drift away and collapse), fused in one function: per period it lists the switching instants of each phase
  from the carrier, sorts them and integrates between them with RK4; no controller, no
  interlocks, no recording, no per-period records. At a change of the command it takes the new
  duty from the period's start on, and its dead-time bookkeeping looks only at this period's
  edges (the plant also knows the previous duty), and a dead-time current that reaches zero is
  clamped at the step's end, not located (the bench's phase currents stay above 20 A). Check:
  each of its periods ends on the plant's next recorded state (the largest difference printed).

Each is run --reps times, interleaved, timed with process_time; the medians are printed as ns
per tick and as multiples of real time (Ts / time per tick), with the ratios switched / bare and
switched / averaged. The error: the switched run's per-period means of v_out and i_L1 (the
plant's records) against the averaged run's means over the same periods (its recorded state
re-integrated within each period, 32 RK4 steps, trapezoidal rule), largest and RMS, over the
whole run and after the start (t >= 50 ms), with the dead time and without it.

Run: python bench/switching.py [--reps 7] [--duration 1.0]
The last printed line is JSON.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import statistics as st
import tempfile
import time
from pathlib import Path

import numpy as np
from numba import njit

HERE = Path(__file__).resolve().parent
SCENARIO = (HERE.parent / "examples" / "switching" / "three_phase_20kHz.toml").read_text()


def _scenario(duration: float, plant: str):
    text = SCENARIO.replace('duration = "30 ms"', f'duration = "{duration} s"')
    text = text.replace('["10 ms", "400 V"], ["10 ms", "500 V"]', '["0.1 s", "400 V"], ["0.1 s", "500 V"]')
    if plant == "averaged":
        head, rest = text.split("[plant]", 1)
        rest = rest.split("[controller]", 1)[1]
        text = head + '[plant]\nplugin = "two_stage_lc"\nL1 = "150 uH"\nR1 = "5 mohm"\n\n[controller]' + rest
    return text


# --------------------------------------------------------------------------------------------
# the bare loop: the switched circuit alone, hand-fused
# --------------------------------------------------------------------------------------------

@njit(inline="always")
def _rates(vn0, vn1, vn2, g0, g1, g2, c, d, i0, i1, i2, v1, il2, vo):
    inv_l, r, inv_c1, inv_l2, r2, inv_c2, vmin = c[0], c[1], c[2], c[3], c[4], c[5], c[6]
    if vo >= vmin:
        il = d[0] / vo + d[1] * vo + d[2]
    else:
        il = d[0] * vo / (vmin * vmin) + d[1] * vo + d[2]
    return ((vn0 - r * i0 - v1) * inv_l * g0, (vn1 - r * i1 - v1) * inv_l * g1,
            (vn2 - r * i2 - v1) * inv_l * g2, (i0 + i1 + i2 - il2) * inv_c1,
            (v1 - r2 * il2 - vo) * inv_l2, (il2 - il) * inv_c2)


@njit(inline="always")
def _step(dt, vn0, vn1, vn2, g0, g1, g2, c, d, x):
    a = _rates(vn0, vn1, vn2, g0, g1, g2, c, d, x[0], x[1], x[2], x[3], x[4], x[5])
    h = 0.5 * dt
    b = _rates(vn0, vn1, vn2, g0, g1, g2, c, d, x[0] + h * a[0], x[1] + h * a[1], x[2] + h * a[2],
               x[3] + h * a[3], x[4] + h * a[4], x[5] + h * a[5])
    e = _rates(vn0, vn1, vn2, g0, g1, g2, c, d, x[0] + h * b[0], x[1] + h * b[1], x[2] + h * b[2],
               x[3] + h * b[3], x[4] + h * b[4], x[5] + h * b[5])
    f = _rates(vn0, vn1, vn2, g0, g1, g2, c, d, x[0] + dt * e[0], x[1] + dt * e[1],
               x[2] + dt * e[2], x[3] + dt * e[3], x[4] + dt * e[4], x[5] + dt * e[5])
    w = dt / 6.0
    return (x[0] + w * (a[0] + 2.0 * b[0] + 2.0 * e[0] + f[0]),
            x[1] + w * (a[1] + 2.0 * b[1] + 2.0 * e[1] + f[1]),
            x[2] + w * (a[2] + 2.0 * b[2] + 2.0 * e[2] + f[2]),
            x[3] + w * (a[3] + 2.0 * b[3] + 2.0 * e[3] + f[3]),
            x[4] + w * (a[4] + 2.0 * b[4] + 2.0 * e[4] + f[4]),
            x[5] + w * (a[5] + 2.0 * b[5] + 2.0 * e[5] + f[5]))


@njit(inline="always")
def _push(te, dl, a_end, j, new, ne, ev_t, ev_p, ev_m):
    """A command edge at te (carrier periods from the period's start): dead time from te, the
    switch of the new side on at te + dl (only the parts inside this period)."""
    if 0.0 < te < a_end:
        ev_t[ne], ev_p[ne], ev_m[ne] = te, j, 2
        ne += 1
    if 0.0 < te + dl < a_end:
        ev_t[ne], ev_p[ne], ev_m[ne] = te + dl, j, new
        ne += 1
    return ne


@njit(inline="always")
def _nodeb(mode, i, vdc):
    """(node voltage, 1.0 if the current flows) of a phase by mode (0 low, 1 high, 2 dead)."""
    if mode == 1:
        return vdc, 1.0
    if mode == 0:
        return 0.0, 1.0
    if i > 0.0:
        return 0.0, 1.0
    if i < 0.0:
        return vdc, 1.0
    return 0.0, 0.0


@njit(cache=False)
def bare(u_seq, ts, fsw, td, vdc, c, lin_k, d, xr, ev_t, ev_p, ev_m, mode):
    """Integrate the 3-phase switched circuit over each of len(u_seq) periods from the state
    recorded at its start, xr[k] = (i1, i2, i3, v_C1, i_L2, v_out); return the largest
    difference of its end state from xr[k + 1], relative to max(|value|, 1). Modes: 0 low side
    on, 1 high side on, 2 dead time."""
    worst = 0.0
    tsw = 1.0 / fsw
    dl = td * fsw
    a_end = ts * fsw
    dd0 = min(max(u_seq[0] / vdc, 0.0), 1.0)
    for j in range(3):  # settled start: each carrier's command at t = 0
        y = j / 3.0
        mode[j] = 1 if (y < 0.5 * dd0 or y > 1.0 - 0.5 * dd0) else 0
    for k in range(u_seq.shape[0]):
        x = (xr[k, 0], xr[k, 1], xr[k, 2], xr[k, 3], xr[k, 4], xr[k, 5])
        dd = min(max(u_seq[k] / vdc, 0.0), 1.0)
        ne = 0
        for j in range(3):
            y0 = k * a_end + j / 3.0
            xi = y0 - math.floor(y0)
            if 0.0 < dd < 1.0:
                h0 = xi < 0.5 * dd or xi > 1.0 - 0.5 * dd
            else:
                h0 = dd >= 1.0
            if (mode[j] == 1 and not h0) or (mode[j] == 0 and h0):  # the new duty, at 0
                ne = _push(1e-300, dl, a_end, j, 1 if h0 else 0, ne, ev_t, ev_p, ev_m)
            if 0.0 < dd < 1.0:
                for m in range(-1, int(a_end) + 2):
                    ne = _push(m + 0.5 * dd - xi, dl, a_end, j, 0, ne, ev_t, ev_p, ev_m)
                    ne = _push(m + 1.0 - 0.5 * dd - xi, dl, a_end, j, 1, ne, ev_t, ev_p, ev_m)
        for q in range(1, ne):  # insertion sort of the instants
            tq, pq, mq = ev_t[q], ev_p[q], ev_m[q]
            r = q - 1
            while r >= 0 and ev_t[r] > tq:
                ev_t[r + 1], ev_p[r + 1], ev_m[r + 1] = ev_t[r], ev_p[r], ev_m[r]
                r -= 1
            ev_t[r + 1], ev_p[r + 1], ev_m[r + 1] = tq, pq, mq
        a = 0.0
        q = 0
        while True:
            while q < ne and ev_t[q] <= a:
                mode[ev_p[q]] = ev_m[q]
                q += 1
            b = ev_t[q] if q < ne else a_end
            if b > a:
                vn0, g0 = _nodeb(mode[0], x[0], vdc)
                vn1, g1 = _nodeb(mode[1], x[1], vdc)
                vn2, g2 = _nodeb(mode[2], x[2], vdc)
                span = (b - a) * tsw
                vo = x[5]
                lo = d[0] / (vo * vo) if vo > c[6] else -d[0] / (c[6] * c[6])
                n = max(1, int(math.ceil(span * max(lin_k, abs(d[1] - lo) * c[5] * 5.0))))
                dt = span / n
                for _ in range(n):
                    xn = _step(dt, vn0, vn1, vn2, g0, g1, g2, c, d, x)
                    # a dead-time current reaching zero is held there (not located: the
                    # bench's currents stay far from zero)
                    if mode[0] == 2 and g0 == 1.0 and xn[0] * x[0] <= 0.0:
                        xn = (0.0, xn[1], xn[2], xn[3], xn[4], xn[5])
                        g0 = 0.0
                    if mode[1] == 2 and g1 == 1.0 and xn[1] * x[1] <= 0.0:
                        xn = (xn[0], 0.0, xn[2], xn[3], xn[4], xn[5])
                        g1 = 0.0
                    if mode[2] == 2 and g2 == 1.0 and xn[2] * x[2] <= 0.0:
                        xn = (xn[0], xn[1], 0.0, xn[3], xn[4], xn[5])
                        g2 = 0.0
                    x = xn
            a = b
            if q >= ne:
                break
        for j in range(6):
            worst = max(worst, abs(x[j] - xr[k + 1, j]) / max(abs(xr[k + 1, j]), 1.0))
    return worst


def bare_constants(values):
    from hilrig.plugins.plants import switched_two_stage as sw
    c = np.array([1.0 / values["L_phase"], values["R_phase"], 1.0 / values["C1"],
                  1.0 / values["L2"], values["R2"], 1.0 / values["C2"], values["v_load_min"]])
    return c, sw.linear_rate(values) / sw.Z_LIN


def averaged_means(s, p, ts, m=32):
    """Per-period means of v_out and i_L1 of the averaged run (see the module docstring)."""
    from hilrig.plugins.plants import two_stage_lc
    return _avg_means(s["i_L1"], s["v_C1"], s["i_L2"], s["v_out"], s["u"], s["P_load"],
                      s["G_load"], s["I_load"], p, ts, m, two_stage_lc.rk4_step)


@njit(cache=False)
def _avg_means(i1, v1, i2, vo, u_rec, pl, gl, il, p, ts, m, step):
    n = i1.shape[0] - 1
    out = np.zeros((n, 2))
    dt = ts / m
    u = np.zeros(1)
    d = np.zeros(3)
    for k in range(n):
        x = (i1[k], v1[k], i2[k], vo[k])
        u[0] = u_rec[k]
        d[0], d[1], d[2] = pl[k], gl[k], il[k]
        av, ai = 0.5 * x[3], 0.5 * x[0]
        for j in range(m):
            x = step(dt, p, x, u, d)
            w = 0.5 if j == m - 1 else 1.0
            av += w * x[3]
            ai += w * x[0]
        out[k, 0] = av / m
        out[k, 1] = ai / m
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=7)
    ap.add_argument("--duration", type=float, default=1.0, help="simulated seconds per run")
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="hilrig-switching-"))
    os.environ.setdefault("HILRIG_CACHE_DIR", str(tmp / "cache"))
    from hilrig.plugins.base import BuildContext
    from hilrig.plugins.plants import two_stage_lc
    from hilrig.runtime import run as R
    from hilrig.runtime.scenario import parse_scenario

    scs = {"switched": parse_scenario(_scenario(args.duration, "switched"), name="switched.toml"),
           "averaged": parse_scenario(_scenario(args.duration, "averaged"), name="averaged.toml")}
    scs["switched, no dead time"] = parse_scenario(_scenario(args.duration, "switched"),
                                                   name="switched.toml",
                                                   overrides={"plant.t_dead": "0 s"})
    fns, recs, preps = {}, {}, {}
    for key, sc in scs.items():
        fns[key] = R.compile_loop(sc)[0]
        preps[key] = R.prepare(sc)

    def run(key, rec):
        sc = scs[key]
        a = R.prepare(sc).args
        n = sc.n_ticks
        chunk = int(round(sc.recording["chunk"] / sc.Ts))
        done = 0
        while done < n:
            done += R._call(fns[key], done, min(chunk, n - done), rec[done:], a)
        return a

    for key, sc in scs.items():  # compile and keep one recording of each
        recs[key] = np.zeros((sc.n_ticks, len(preps[key].signals)))
        run(key, recs[key])
    sig = {key: {s.name: recs[key][:, j] for j, s in enumerate(preps[key].signals)} for key in scs}

    sc = scs["switched"]
    values = dict(sc.plant.values)
    c, lin_k = bare_constants(values)
    s0 = sig["switched"]
    xr = np.ascontiguousarray(np.column_stack(
        [s0[k] for k in ("i_ph1", "i_ph2", "i_ph3", "v_C1", "i_L2", "v_out")]))
    u_seq = np.ascontiguousarray(s0["u"][:-1])
    d = np.array([50e3, 0.0, 0.0])
    ev_t, ev_p, ev_m = np.zeros(256), np.zeros(256, dtype=np.int64), np.zeros(256, dtype=np.int64)
    bare_args = (u_seq, sc.Ts, values["f_sw"], values["t_dead"], values["V_dc"], c, lin_k, d, xr,
                 ev_t, ev_p, ev_m, np.zeros(3, dtype=np.int64))
    # check: from each recorded state, the bare loop's period ends on the plant's next one
    gap = bare(*bare_args)

    timed = {"switched": lambda rec: run("switched", rec),
             "averaged": lambda rec: run("averaged", rec),
             "bare": lambda rec: bare(*bare_args)}
    ns = {k: [] for k in timed}
    n_ticks = sc.n_ticks
    for _ in range(args.reps):
        for key, f in timed.items():
            rec = recs[key] if key in recs else None
            t = time.process_time()
            f(rec)
            ns[key].append((time.process_time() - t) / n_ticks * 1e9)
    med = {k: st.median(v) for k, v in ns.items()}
    rt = {k: sc.Ts * 1e9 / v for k, v in med.items()}
    print(f"scenario: 3 phases, f_sw 20 kHz, t_dead 0.5 us, Ts 50 us, {args.duration:g} s simulated, "
          f"cascaded_pi, 50 kW; medians of {args.reps}, interleaved (process_time)")
    for k in timed:
        print(f"  {k:9s} {med[k]:8.1f} ns per tick   {rt[k]:7.1f}x real time")
    r_bare = med["switched"] / med["bare"]
    r_avg = med["switched"] / med["averaged"]
    print(f"  ratio switched / bare     {r_bare:5.2f}  (target <= 1.5)")
    print(f"  ratio switched / averaged {r_avg:5.2f}")
    print(f"  check: each period of the bare loop from the plant's recorded state ends on its "
          f"next one within {gap:.1e} (relative, largest)")

    # averaged versus switched: per-period means
    pa = two_stage_lc.DECLARATION.pack(dict(scs["averaged"].plant.values), BuildContext(Ts=sc.Ts))
    means = averaged_means(sig["averaged"], pa, sc.Ts)
    t = np.arange(1, n_ticks) * sc.Ts
    errors = {}
    for key in ("switched", "switched, no dead time"):
        ev = sig[key]["v_out_mean"][1:] - means[:, 0]
        ei = sig[key]["i_L1_mean"][1:] - means[:, 1]
        late = t >= 0.05
        errors[key] = dict(v_max=float(np.max(np.abs(ev))), v_rms=float(np.sqrt(np.mean(ev ** 2))),
                           i_max=float(np.max(np.abs(ei))), i_rms=float(np.sqrt(np.mean(ei ** 2))),
                           v_max_late=float(np.max(np.abs(ev[late]))),
                           i_max_late=float(np.max(np.abs(ei[late]))))
        e = errors[key]
        print(f"averaged vs {key} (per-period means): v_out max {e['v_max']:.4f} V "
              f"(rms {e['v_rms']:.4f}; after 50 ms max {e['v_max_late']:.4f}), i_L1 max "
              f"{e['i_max']:.4f} A (rms {e['i_rms']:.4f}; after 50 ms max {e['i_max_late']:.4f})")
    print(json.dumps({"ns_per_tick": {k: round(v, 1) for k, v in med.items()},
                      "x_real_time": {k: round(v, 1) for k, v in rt.items()},
                      "ratio_switched_bare": round(r_bare, 3),
                      "ratio_switched_averaged": round(r_avg, 3), "bare_vs_plant": gap,
                      "error": errors}))


if __name__ == "__main__":
    main()
