"""Current-sharing metrics of a run of paralleled units (a scenario's ``[units]``), from its
recording: ``summary["sharing"]``, the run table's sharing rows and report.md's Units section.

Symbols, per tick (k = 1 .. N the units; all currents in A, positive out of a unit into the
bus):

- :math:`i_k` the unit's output current (``unit<k>_i_out``, its cable current),
- :math:`e_k \\in \\{0, 1\\}` whether it runs (``unit<k>_enable``; 0 while its gates are
  blocked after a trip of its own or a loss),
- :math:`w_k` its share as the scenario sets it (``weight``, normalised over all units),
- :math:`I = \\sum_k i_k` the units' total output current (the load current plus what the bus
  capacitance takes; equal to the load current in steady state).

Share and deviation. While some units are blocked the others take the load, so a unit's share
is renormalised over the units that run:

.. math::

    s_k = \\frac{w_k e_k}{\\sum_j w_j e_j}, \\qquad d_k = i_k - s_k I \\quad [A]

(a blocked unit's share is 0, so its deviation is whatever current still flows through its
cable; the deviations of all units sum to zero at every tick). Per unit, over the steady
samples below while the unit runs:

- ``largest_deviation_A``: the deviation of largest magnitude, with its sign (negative: the unit
  carries less than its share) and its time ``time_of_largest_deviation_s``;
- ``largest_deviation_pct``: the per-tick deviation in % of the unit's share current,
  :math:`100 d_k / (s_k I)`, of largest magnitude, with its sign, over the ticks whose share
  current is at least ``PCT_FLOOR_A`` (1 A: below it, on an unloaded bus, a percentage of
  almost nothing says nothing; common practice, no source);
- ``rms_deviation_A`` :math:`\\sqrt{\\overline{d_k^2}}` and ``rms_deviation_pct``
  :math:`100 \\sqrt{\\overline{d_k^2}} / \\sqrt{\\overline{(s_k I)^2}}`;
- ``mean_deviation_A`` :math:`\\overline{d_k}` and ``mean_deviation_pct``
  :math:`100\\,\\overline{d_k} / \\overline{s_k I}`: the steady sharing error (droop's own error
  for droop sharing, which the exchange of messages is there to remove);
- ``largest_current_A``: the largest :math:`|i_k|` over every scored sample (transients
  included), beside the unit's trip level ``i_trip_A`` (``I_trip``, on its converter current;
  0: none) as its current rating;
- ``time_blocked_s``: ticks with :math:`e_k = 0` times Ts; ``trips``: each tick on which the
  unit's latched cause bits (``unit<k>_trip``, runtime/multi/control.py ``CAUSES``) gain a
  bit, with the new bits' cause text; ``resets_s``: the times its latch cleared.

Circulating current. Half the sum of the deviations' magnitudes,

.. math::

    i_{circ} = \\tfrac12 \\sum_k |d_k| \\quad [A],

is the current the units that carry more than their share deliver in excess of it, which is
the current the others fall short by (the deviations sum to zero): the current that flows
between the units' outputs and the bus beyond what ideal sharing would make each carry, 0 iff
every unit carries exactly its share. Its largest value (and time) and RMS over the steady
samples, and its largest over every scored sample (``largest_whole_run_A``, transients
included). And the reverse current, current that flows *into* a unit while another one
sources: :math:`\\max_k \\max(0, -i_k)` at ticks where some other unit has :math:`i_j > 0`;
its largest value over every scored sample, with the unit and the time (0 and no unit when no
unit ever sank current). A reverse current is current that circulates through two units
without reaching the load; a blocked unit's output filter, still on the bus through its
cable, takes and gives back such current too.

Bus voltage tracking: the bus is ``v_out``, so the run's tracking metrics, segments and band
check (runtime/trials/metrics.py) are the bus's. Here only the steady bus error
``v_ref_raw - v_out`` over the steady samples (mean and largest magnitude), droop's voltage
drop under load.

Steady samples (the rule of the band check's settled windows, metrics.py "Tracking band",
extended to the load and the units): a window starts ``SETTLE_DELAY_S`` (10 ms, and at least
``SETTLE_TICKS`` = 100 ticks) after the run's start and after the end of every change, and
ends at the start of the next change (its last unchanged tick), at the run's end or at the cut,
whichever comes first. Changes are the raw reference's steps and ramps
(:func:`~hilrig.runtime.trials.metrics.split_reference`), the same rule applied to each
recorded load profile (``P_load``, ``I_load``, ``G_load``; each on its own scale), and every
tick on which a unit starts or stops running (a trip, a loss, an accepted reset: the others
take up its share and settle again). Ticks on which no unit runs are never steady.

Cut: as every metric of the run (metrics.py), these are scored only on the samples before the
first trip of the runtime's latch (the bus-level interlocks: every unit's safe output drives
the bus after it) or the collapse that ended the run; the units' trips and resets listed are
those before it too. A unit's own trip does not cut the run: the others carry on, which is
what these metrics describe.
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from . import metrics as _m

#: a share current below this gives no percentage (see the module docstring)
PCT_FLOOR_A = 1.0
#: the recorded load profiles whose changes end steady windows
LOAD_COLUMNS = ("P_load", "I_load", "G_load")
#: the cause bits of a unit's latch (bit 32, "reset refused", is a per-tick flag, not a cause)
LATCH_BITS = 31


def cause_text(bits: int) -> str:
    """The text of a unit's trip cause bits (runtime/multi/control.py ``CAUSES``)."""
    from hilrig.runtime.multi.control import CAUSES
    names = [text for b, text in CAUSES.items() if bits & b]
    return ", ".join(names) if names else "none"


def steady_mask(t: np.ndarray, v_ref_raw: np.ndarray, enable: np.ndarray,
                loads: list[np.ndarray] | tuple = (), lim: int | None = None
                ) -> tuple[np.ndarray, list[list[float]], int]:
    """The steady samples (module docstring, "Steady samples") as a boolean mask of the ticks,
    the windows ``[from_s, to_s]`` and the settling delay in ticks."""
    t = np.asarray(t, dtype=float)
    n = t.size
    lim = n if lim is None else max(0, min(int(lim), n))
    mask = np.zeros(n, dtype=bool)
    if n < 2:
        return mask, [], 0
    ts = float(t[1] - t[0])
    delay = max(int(math.ceil(_m.SETTLE_DELAY_S / ts - 1e-9)), _m.SETTLE_TICKS)
    mask[:lim] = True
    mask[:delay] = False
    # (a, b): the change leaves its hold after tick a and is complete at tick b
    changes = [(ch.a, ch.b) for ch in _m.split_reference(np.asarray(v_ref_raw, dtype=float))[0]]
    for col in loads:
        changes += [(ch.a, ch.b) for ch in _m.split_reference(np.asarray(col, dtype=float))[0]]
    on = np.asarray(enable, dtype=float) > 0.5
    if on.ndim == 2 and on.shape[0] > 1:
        moved = np.flatnonzero((on[1:] != on[:-1]).any(axis=1)) + 1
        changes += [(int(k) - 1, int(k)) for k in moved]
        mask &= on.any(axis=1)
    for a, b in changes:
        mask[a + 1:b + delay] = False
    windows = []
    edges = np.diff(np.concatenate(([0], mask.astype(np.int8), [0])))
    for i0, i1 in zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)):
        if i1 - i0 < 2:
            mask[i0:i1] = False
            continue
        windows.append([float(t[i0]), float(t[i1 - 1] + ts)])
    return mask, windows, delay


def _largest(x: np.ndarray, t: np.ndarray) -> tuple[float, float]:
    """The value of largest magnitude of x (signed) and its time; NaN when x has none."""
    ok = np.isfinite(x)
    if not ok.any():
        return math.nan, math.nan
    j = int(np.argmax(np.where(ok, np.abs(x), -1.0)))
    return float(x[j]), float(t[j])


def _rms(x: np.ndarray) -> float:
    x = x[np.isfinite(x)]
    return math.sqrt(float(np.mean(x * x))) if x.size else math.nan


def _trip_events(t: np.ndarray, trip: np.ndarray, lim: int) -> tuple[list[dict], list[float]]:
    """A unit's trips (ticks on which its latched cause bits gain a bit) and the times its
    latch cleared, before tick ``lim``."""
    col = np.asarray(trip[:lim], dtype=float)
    bits = np.where(np.isfinite(col), col, 0.0).astype(np.int64) & LATCH_BITS
    prev = np.concatenate(([0], bits[:-1]))
    new = bits & ~prev
    trips = [{"tick": int(k), "time_s": float(t[k]), "bits": int(new[k]),
              "cause": cause_text(int(new[k]))} for k in np.flatnonzero(new)]
    resets = [float(t[k]) for k in np.flatnonzero((bits == 0) & (prev != 0))]
    return trips, resets


def sharing_metrics(t, v_out, v_ref_raw, currents, enable, trip, shares, *,
                    loads: list[np.ndarray] | tuple = (), names: list[str] | None = None,
                    i_trip: list[float] | None = None, cut: int | None = None,
                    cut_reason: str = "the first trip") -> dict[str, Any]:
    """The sharing metrics of the module docstring on whole recorded signals.

    ``currents``, ``enable`` and ``trip`` are (ticks, N) arrays of the units' output currents
    [A], enables (1 runs) and trip cause bits; ``shares`` the N weights (normalised here);
    ``loads`` the recorded load profiles; ``cut`` the first tick not to score. Returns the dict
    of ``summary["sharing"]`` (NaN where a metric has no sample; null in summary.json)."""
    t = np.asarray(t, dtype=float)
    y = np.asarray(v_out, dtype=float)
    r = np.asarray(v_ref_raw, dtype=float)
    cur = np.asarray(currents, dtype=float).reshape(t.size, -1)
    on = np.asarray(enable, dtype=float).reshape(t.size, -1) > 0.5
    tr = np.asarray(trip, dtype=float).reshape(t.size, -1)
    n, N = cur.shape
    w = np.asarray(shares, dtype=float)
    w = w / w.sum()
    names = names or [f"unit{k}" for k in range(1, N + 1)]
    lim = n if cut is None else max(0, min(int(cut), n))
    ts = float(t[1] - t[0]) if n > 1 else 0.0
    mask, windows, delay = steady_mask(t, r, on, loads, lim)
    out: dict[str, Any] = dict(
        count=N, settle_delay_s=delay * ts, pct_floor_A=PCT_FLOOR_A, windows=windows,
        steady_s=float(np.count_nonzero(mask)) * ts)
    if lim < n:
        out.update(cut_at_s=float(t[lim]), cut_reason=cut_reason)
    # renormalised shares and deviations, every tick
    ww = w[None, :] * on
    tot_w = ww.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.where(tot_w > 0, ww / np.where(tot_w > 0, tot_w, 1.0), 0.0)
        total = cur.sum(axis=1)
        share_i = s * total[:, None]
        dev = cur - share_i
        circ = 0.5 * np.abs(dev).sum(axis=1)
    scored = np.zeros(n, dtype=bool)
    scored[:lim] = True
    units = []
    for k in range(N):
        m = mask & on[:, k]
        d, si = dev[m, k], share_i[m, k]
        big, t_big = _largest(d, t[m])
        okp = np.isfinite(si) & (np.abs(si) >= PCT_FLOOR_A)
        with np.errstate(invalid="ignore", divide="ignore"):
            pct = np.where(okp, 100.0 * d / np.where(okp, si, 1.0), np.nan)
        big_pct, _ = _largest(pct, t[m])
        fin = np.isfinite(d) & np.isfinite(si)
        rms_si = _rms(si[fin])
        mean_si = float(np.mean(si[fin])) if fin.any() else math.nan
        mean_d = float(np.mean(d[fin])) if fin.any() else math.nan
        rms_d = _rms(d)
        trips, resets = _trip_events(t, tr[:, k], lim)
        units.append(dict(
            unit=k + 1, name=names[k], share=float(w[k]),
            i_trip_A=float(i_trip[k]) if i_trip is not None else None,
            steady_s=float(np.count_nonzero(m)) * ts,
            largest_current_A=_largest(cur[:lim, k], t[:lim])[0] if lim else math.nan,
            mean_current_A=float(np.mean(cur[m, k][fin])) if fin.any() else math.nan,
            largest_deviation_A=big, time_of_largest_deviation_s=t_big,
            largest_deviation_pct=big_pct,
            rms_deviation_A=rms_d,
            rms_deviation_pct=100.0 * rms_d / rms_si if rms_si >= PCT_FLOOR_A else math.nan,
            mean_deviation_A=mean_d,
            mean_deviation_pct=(100.0 * mean_d / mean_si if abs(mean_si) >= PCT_FLOOR_A
                                else math.nan),
            time_blocked_s=float(np.count_nonzero(~on[:lim, k])) * ts,
            trips=trips, resets_s=resets))
    out["units"] = units
    # the headline: the unit whose largest deviation in % is the largest
    cand = [u for u in units if math.isfinite(u["largest_deviation_pct"])]
    worst = max(cand, key=lambda u: abs(u["largest_deviation_pct"])) if cand else None
    out["largest_deviation_pct"] = worst["largest_deviation_pct"] if worst else math.nan
    out["largest_deviation_unit"] = worst["unit"] if worst else None
    out["units_tripped"] = [u["unit"] for u in units if u["trips"]]
    # circulating and reverse currents
    c_big, c_t = _largest(circ[mask], t[mask])
    c_all, c_all_t = _largest(circ[scored], t[scored])
    sink = np.maximum(-cur, 0.0)                           # current into each unit
    src = cur > 0.0
    others = (src.sum(axis=1, keepdims=True) - src) > 0   # another unit sources
    rev = np.where(others & scored[:, None] & np.isfinite(sink), sink, 0.0)
    rev_tick = rev.max(axis=1) if N else np.zeros(n)
    j = int(np.argmax(rev_tick)) if n else 0
    has_rev = n > 0 and rev_tick[j] > 0.0
    out["circulating"] = dict(
        largest_A=c_big, time_of_largest_s=c_t, rms_A=_rms(circ[mask]),
        largest_whole_run_A=c_all, time_of_largest_whole_run_s=c_all_t,
        reverse_largest_A=float(rev_tick[j]) if has_rev else 0.0,
        reverse_unit=int(np.argmax(rev[j])) + 1 if has_rev else None,
        time_of_reverse_largest_s=float(t[j]) if has_rev else None)
    eb = (r - y)[mask]
    eb = eb[np.isfinite(eb)]
    out["bus"] = dict(steady_mean_error_V=float(np.mean(eb)) if eb.size else math.nan,
                      steady_max_abs_error_V=float(np.max(np.abs(eb))) if eb.size else math.nan)
    return out


def from_recording(path: Path, units, cut: int | None = None,
                   cut_reason: str = "the first trip") -> dict[str, Any]:
    """:func:`sharing_metrics` of a closed recording (``recording.h5``) of a run whose
    scenario has ``[units]`` (``units``: its :class:`~hilrig.runtime.multi.spec.UnitsSpec`)."""
    import h5py

    from hilrig.runtime.multi.plant import unit_signal
    n = units.count
    with h5py.File(path, "r") as f:
        g = f["signals"]
        t = f["time"][()]

        def cols(name):
            return np.stack([g[unit_signal(k, name)][()] for k in range(1, n + 1)], axis=1)
        cur = np.stack([g[name][()] for name in units.i_out], axis=1)
        out = sharing_metrics(t, g["v_out"][()], g["v_ref_raw"][()], cur, cols("enable"),
                              cols("trip"), units.shares,
                              loads=[g[c][()] for c in LOAD_COLUMNS if c in g],
                              names=[nm.rsplit("_i_out", 1)[0] for nm in units.i_out],
                              i_trip=list(units.i_trip) or None, cut=cut, cut_reason=cut_reason)
    out.update(topology=units.topology, sharing=units.sharing)
    return out


def _n(v, spec: str) -> str:
    return format(v, spec) if isinstance(v, (int, float)) and math.isfinite(v) else "n/a"


def trips_text(sh: dict) -> str:
    """Which units tripped, with each trip's cause and time ("none" when no unit did)."""
    parts = []
    for u in sh.get("units") or []:
        for tr in u.get("trips") or []:
            parts.append(f"unit {u['unit']}: {tr['cause']} at t = {_n(tr['time_s'], '.6g')} s")
    return "; ".join(parts) if parts else "none"


def table_rows(sh: dict | None) -> list[tuple[str, str]]:
    """The run table's rows for ``summary["sharing"]`` (label, value)."""
    if not isinstance(sh, dict) or not sh.get("units"):
        return []
    rows = []
    k = sh.get("largest_deviation_unit")
    u = next((x for x in sh["units"] if x["unit"] == k), None)
    if u is None:
        dev = f"n/a (no steady sample with a share current of {_n(PCT_FLOOR_A, 'g')} A or more)"
    else:
        dev = (f"{_n(u['largest_deviation_pct'], '+.3g')} % of its share, unit {k} "
               f"({_n(u['largest_deviation_A'], '+.4g')} A at most, mean "
               f"{_n(u['mean_deviation_pct'], '+.3g')} %)")
    rows.append(("sharing: largest deviation", dev))
    c = sh.get("circulating") or {}
    circ = (f"steady: largest {_n(c.get('largest_A'), '.4g')}, RMS {_n(c.get('rms_A'), '.4g')}; "
            f"with transients {_n(c.get('largest_whole_run_A'), '.4g')}")
    if c.get("reverse_unit"):
        circ += (f"; reverse {_n(c.get('reverse_largest_A'), '.4g')} into unit "
                 f"{c['reverse_unit']} at t = {_n(c.get('time_of_reverse_largest_s'), '.6g')} s")
    rows.append(("circulating current [A]", circ))
    rows.append(("units tripped", trips_text(sh)))
    return rows
