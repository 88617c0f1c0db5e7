"""``hilrig diff RUN_A RUN_B``: two run folders side by side, for checking a controller change
against a stored run (a lab's own CI).

What it compares:

- the summary's metrics and outcome, side by side with B - A;
- every signal recorded in both runs: the largest |B - A|, the time at which it occurs (A's
  time) and that difference relative to the signal's range in B (max - min of B's finite
  samples); signals recorded in only one run are named;
- time bases: with the same control period (the recording's ``Ts``) the runs are compared sample
  by sample over the samples both have; with different periods B is interpolated onto A's time
  base (``numpy.interp``, linear, only where A's time lies within B's) and the result says so;
- a bit-identical verdict: the same signals, the same number of samples and every sample equal
  to the bit (NaN included: compared as the 64-bit patterns).

Tolerances (the exit status): ``--tol SIGNAL=VALUE`` is absolute in the signal's unit
(``0.5 V``, ``500 mV``, a bare number in the signal's SI unit) or relative with ``%`` to B's
range of the signal; ``--tol-metric NAME=VALUE`` is absolute in the metric's unit or relative
with ``%`` to B's value. A metric is named as in summary.json (``iae_Vs``), without its
unit suffix (``iae``), in any case, or by the start of one name (``iae_v``). Exit 0: every tolerance holds; 1: one or more do not (or, with
``bit_identical``, the runs are not bit-identical); 2: bad input (:class:`DiffInputError`).
A sample that is finite in one run and not in the other breaks any tolerance of its signal.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import RecordingError, UnitError
from ..recording import Run, open_run
from ..units import parse_quantity

EXIT_OK = 0
EXIT_BEYOND = 1
EXIT_BAD_INPUT = 2

#: the signals drawn in the overlaid plot, one panel per group, when the runs both have them
PLOT_GROUPS = (("v_out", "v_ref"), ("u",), ("i_L1",))

#: a metric key's unit suffix -> the unit shown (summary.json's metrics end in their SI unit)
_METRIC_UNITS = (("_V2s", "V^2 s"), ("_Vs", "V s"), ("_V", "V"), ("_A", "A"), ("_W", "W"),
                 ("_s", "s"))

#: readable labels of the summary's metrics (a metric not listed shows its key)
_METRIC_LABELS = {
    "iae_Vs": "IAE", "ise_V2s": "ISE", "rms_error_V": "RMS tracking error",
    "max_abs_error_V": "max |v_ref - v_out|", "time_of_max_abs_error_s": "time of max |error|",
    "saturation_time_s": "time in saturation", "v_out_min_V": "v_out min",
    "v_out_max_V": "v_out max", "nonfinite_samples": "non-finite samples", "trips": "trips",
    "warnings": "warnings",
}


class DiffInputError(ValueError):
    """Bad input to ``hilrig diff``: a folder that is not a run, an unknown signal or metric,
    a tolerance that does not read. One line naming what and the fix."""


@dataclass
class SignalDiff:
    name: str
    unit: str
    compared: int            # samples compared
    max_abs: float | None    # largest |B - A| over samples finite in both (None: none such)
    at_s: float | None       # A's time of it
    a_value: float | None
    b_value: float | None
    range_b: float           # max - min of B's finite samples (0 when constant or none)
    rel_range: float | None  # max_abs / range_b (None when range_b is 0)
    finite_mismatch: int     # samples finite in one run and not in the other
    identical: bool          # bit for bit over the compared samples

    def as_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass
class Check:
    kind: str      # "signal" or "metric"
    name: str
    text: str      # the tolerance as given
    limit: float   # absolute, in the unit
    unit: str
    value: float | None  # the difference it is judged on (absolute)
    passed: bool

    def as_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass
class DiffResult:
    a: Path
    b: Path
    time_base: dict
    metrics: list[dict]
    outcome: dict
    signals: list[SignalDiff]
    only_in_a: list[str]
    only_in_b: list[str]
    bit_identical: bool
    identical_reason: str
    checks: list[Check] = field(default_factory=list)
    require_identical: bool = False
    plot: str | None = None

    @property
    def failed(self) -> list[str]:
        out = [f"{c.kind} {c.name}: |B - A| = {_g(c.value)} {c.unit} beyond {c.text}"
               for c in self.checks if not c.passed]
        if self.require_identical and not self.bit_identical:
            out.append(f"not bit-identical: {self.identical_reason}")
        return out

    @property
    def exit_code(self) -> int:
        return EXIT_BEYOND if self.failed else EXIT_OK

    def as_dict(self) -> dict:
        return {
            "a": str(self.a), "b": str(self.b), "time_base": self.time_base,
            "outcome": self.outcome, "metrics": self.metrics,
            "signals": [s.as_dict() for s in self.signals],
            "only_in_a": self.only_in_a, "only_in_b": self.only_in_b,
            "bit_identical": self.bit_identical, "identical_reason": self.identical_reason,
            "require_bit_identical": self.require_identical,
            "checks": [c.as_dict() for c in self.checks], "failed": self.failed,
            "exit": self.exit_code, "plot": self.plot,
        }


def _g(v, spec: str = ".6g") -> str:
    return "n/a" if v is None else format(v, spec)


def load(path: str | Path) -> Run:
    """A run folder with its summary, or a DiffInputError naming the folder and the fix."""
    p = Path(path)
    if not p.is_dir():
        raise DiffInputError(f"{p} is not a folder: give a run folder written by 'hilrig run'")
    try:
        run = open_run(p)
    except RecordingError as exc:
        raise DiffInputError(str(exc)) from None
    if not run.summary:
        raise DiffInputError(f"{p}: no summary.json (the run did not finish); give a finished "
                             f"run folder written by 'hilrig run'")
    return run


def metric_unit(key: str) -> str:
    for suffix, unit in _METRIC_UNITS:
        if key.endswith(suffix):
            return unit
    return "-"


def _metric_short(key: str) -> str:
    for suffix, _ in _METRIC_UNITS:
        if key.endswith(suffix):
            return key[: -len(suffix)]
    return key


def _num(v) -> float | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    return float(v) if math.isfinite(v) else None


def _metrics(a: Run, b: Run) -> list[dict]:
    ma, mb = a.summary.get("metrics") or {}, b.summary.get("metrics") or {}
    rows = []
    for key in list(ma) + [k for k in mb if k not in ma]:
        va, vb = _num(ma.get(key)), _num(mb.get(key))
        unit = metric_unit(key)
        label = _METRIC_LABELS.get(key, key)
        rows.append({"key": key, "label": f"{label} [{unit}]" if unit != "-" else label,
                     "unit": unit, "a": va, "b": vb,
                     "delta": None if va is None or vb is None else vb - va,
                     "in_a": key in ma, "in_b": key in mb})
    return rows


def _outcome(a: Run, b: Run) -> dict:
    oa, ob = a.summary.get("outcome") or {}, b.summary.get("outcome") or {}
    return {"a": oa.get("text", oa.get("status")), "b": ob.get("text", ob.get("status")),
            "a_status": oa.get("status"), "b_status": ob.get("status"),
            "same": oa.get("status") == ob.get("status")}


def _ts(run: Run) -> float | None:
    ts = run.attrs.get("Ts", run.summary.get("Ts_s"))
    return float(ts) if ts is not None else None


def _bits_equal(x: np.ndarray, y: np.ndarray) -> bool:
    x = np.ascontiguousarray(x, dtype=np.float64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    return x.shape == y.shape and bool(np.array_equal(x.view(np.uint64), y.view(np.uint64)))


def _range(x: np.ndarray) -> float:
    f = x[np.isfinite(x)]
    return float(f.max() - f.min()) if f.size else 0.0


def _signal_diff(name: str, unit: str, t: np.ndarray, xa: np.ndarray, xb: np.ndarray,
                 b_full: np.ndarray, same_base: bool) -> SignalDiff:
    fa, fb = np.isfinite(xa), np.isfinite(xb)
    both = fa & fb
    mismatch = int(np.count_nonzero(fa != fb))
    rng = _range(b_full)
    identical = same_base and _bits_equal(xa, xb)
    if both.any():
        d = np.where(both, np.abs(xb - xa), -1.0)
        i = int(np.argmax(d))  # the first sample of the largest difference
        mx = float(d[i])
        at, va, vb = float(t[i]), float(xa[i]), float(xb[i])
    else:
        mx = at = va = vb = None
    rel = None if mx is None or rng == 0.0 else mx / rng
    return SignalDiff(name, unit, int(xa.shape[0]), mx, at, va, vb, rng, rel, mismatch,
                      identical)


def compare(a: Run, b: Run) -> DiffResult:
    """Compare run B with run A (no tolerances yet: see :func:`judge`)."""
    ts_a, ts_b = _ts(a), _ts(b)
    same_ts = ts_a is not None and ts_b is not None and ts_a == ts_b
    if same_ts:
        n = min(a.time.shape[0], b.time.shape[0])
        t = a.time[:n]
        idx = slice(0, n)
        base = {"method": "sample by sample", "Ts_a_s": ts_a, "Ts_b_s": ts_b,
                "samples_a": int(a.time.shape[0]), "samples_b": int(b.time.shape[0]),
                "compared": n,
                "span_s": [float(t[0]), float(t[-1])] if n else None,
                "text": f"same Ts ({ts_a:g} s): sample by sample over the {n} samples both have"}
    else:
        lo, hi = (b.time[0], b.time[-1]) if b.time.size else (np.inf, -np.inf)
        keep = (a.time >= lo) & (a.time <= hi)
        t = a.time[keep]
        idx = keep
        base = {"method": "B interpolated onto A's time base (numpy.interp, linear)",
                "Ts_a_s": ts_a, "Ts_b_s": ts_b,
                "samples_a": int(a.time.shape[0]), "samples_b": int(b.time.shape[0]),
                "compared": int(t.shape[0]),
                "span_s": [float(t[0]), float(t[-1])] if t.size else None,
                "text": (f"different Ts (A {_g(ts_a)} s, B {_g(ts_b)} s): B interpolated "
                         f"linearly onto A's time base (numpy.interp) over "
                         f"{int(t.shape[0])} samples of A within B's span")}
    common = [k for k in a.signals if k in b.signals]
    only_a = [k for k in a.signals if k not in b.signals]
    only_b = [k for k in b.signals if k not in a.signals]
    diffs = []
    for k in common:
        xa = np.asarray(a.signals[k], dtype=float)[idx]
        xb_full = np.asarray(b.signals[k], dtype=float)
        xb = xb_full[idx] if same_ts else np.interp(t, b.time, xb_full)
        diffs.append(_signal_diff(k, a.units.get(k, "") or b.units.get(k, ""), t, xa, xb,
                                  xb_full, same_ts))
    reasons = []
    if not same_ts:
        reasons.append(f"different Ts ({_g(ts_a)} s, {_g(ts_b)} s)")
    elif a.time.shape[0] != b.time.shape[0]:
        reasons.append(f"different lengths ({a.time.shape[0]} and {b.time.shape[0]} samples)")
    elif not _bits_equal(a.time, b.time):
        reasons.append("different time stamps")
    if only_a or only_b:
        reasons.append("different signal sets")
    differing = [s.name for s in diffs if not s.identical]
    if same_ts and differing:
        reasons.append(f"{len(differing)} signal(s) differ ({', '.join(differing[:5])}"
                       f"{', ...' if len(differing) > 5 else ''})")
    identical = not reasons
    return DiffResult(a=a.folder, b=b.folder, time_base=base, metrics=_metrics(a, b),
                      outcome=_outcome(a, b), signals=diffs, only_in_a=only_a,
                      only_in_b=only_b, bit_identical=identical,
                      identical_reason="; ".join(reasons) if reasons else "identical")


def _split(text: str, option: str) -> tuple[str, str]:
    name, sep, value = text.partition("=")
    name, value = name.strip(), value.strip()
    if not sep or not name or not value:
        eg = "iae=5%" if option == "--tol-metric" else "v_out=0.5V or --tol i_L1=2%"
        raise DiffInputError(f"{option} {text!r} does not read: write NAME=VALUE, e.g. "
                             f"{option} {eg}")
    return name, value


def _limit(value: str, unit: str, scale: float | None, where: str) -> float:
    """An absolute limit: ``value`` in ``unit`` or, ending in ``%``, that share of ``scale``."""
    if value.endswith("%"):
        try:
            pct = float(value[:-1])
        except ValueError:
            raise DiffInputError(f"{where} = {value!r} does not read: write a percentage "
                                 f"such as 2%") from None
        if not math.isfinite(pct) or pct < 0:
            raise DiffInputError(f"{where} = {value!r}: a percentage must be finite and not "
                                 f"negative")
        return pct / 100.0 * (scale if scale is not None else math.nan)
    try:
        v = parse_quantity(value, unit if unit else "-", where=where)
    except UnitError as exc:
        raise DiffInputError(str(exc)) from None
    if v < 0:
        raise DiffInputError(f"{where} = {value!r} is negative; a tolerance is a magnitude")
    return v


def judge(res: DiffResult, tols: list[str], metric_tols: list[str],
          bit_identical: bool = False) -> DiffResult:
    """Add the command line's tolerances to ``res`` (DiffInputError for one that does not
    read or names no common signal or metric)."""
    res.require_identical = bit_identical
    by_name = {s.name: s for s in res.signals}
    for text in tols:
        name, value = _split(text, "--tol")
        s = by_name.get(name)
        if s is None:
            where = ("only in A" if name in res.only_in_a else
                     "only in B" if name in res.only_in_b else "in neither run")
            known = ", ".join(sorted(by_name)) or "none"
            raise DiffInputError(f"--tol {text!r}: signal {name!r} is recorded {where}; "
                                 f"choose one of the common signals: {known}")
        limit = _limit(value, s.unit, s.range_b, f"--tol {name}")
        worst = s.max_abs
        ok = s.finite_mismatch == 0 and (worst is None or worst <= limit)
        res.checks.append(Check("signal", name, value, limit, s.unit, worst, bool(ok)))
    metrics = {m["key"]: m for m in res.metrics}
    short = {_metric_short(k): k for k in metrics}
    for text in metric_tols:
        name, value = _split(text, "--tol-metric")
        key = _metric_key(name, metrics, short)
        if key is None:
            known = ", ".join(f"{_metric_short(k)} ({k})" for k in metrics) or "none"
            raise DiffInputError(f"--tol-metric {text!r}: no metric {name!r} in the "
                                 f"summaries; choose one of: {known}")
        m = metrics[key]
        scale = abs(m["b"]) if m["b"] is not None else None
        limit = _limit(value, m["unit"], scale, f"--tol-metric {name}")
        delta = None if m["delta"] is None else abs(m["delta"])
        # one run without a finite value of the metric and the other with one: beyond
        ok = (delta is not None and delta <= limit) or (m["a"] is None and m["b"] is None)
        res.checks.append(Check("metric", key, value, limit, m["unit"], delta, bool(ok)))
    return res


def _metric_key(name: str, metrics: dict, short: dict) -> str | None:
    """The summary key a --tol-metric name means: the key itself, the key without its unit
    suffix, either in any case, or the one key it begins (``iae_v`` -> ``iae_Vs``)."""
    if name in metrics:
        return name
    if name in short:
        return short[name]
    low = name.lower()
    for k in metrics:
        if low in (k.lower(), _metric_short(k).lower()):
            return k
    begun = [k for k in metrics if k.lower().startswith(low)]
    if len(begun) > 1:
        raise DiffInputError(f"--tol-metric {name!r} could mean any of {', '.join(begun)}: "
                             f"write the whole name")
    return begun[0] if begun else None


def _plot_signals(res: DiffResult) -> list[tuple[str, ...]]:
    common = {s.name for s in res.signals}
    groups = [tuple(n for n in g if n in common) for g in PLOT_GROUPS]
    groups = [g for g in groups if g]
    if not groups:
        groups = [(s.name,) for s in res.signals[:3]]
    return groups


def plot(res: DiffResult, a: Run, b: Run, dest: Path) -> Path:
    """The overlaid plot: per panel A and B of v_out/v_ref, u and i_L1 (those both runs have;
    else the first three common signals), with B - A on a second axis."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from .plots import _Shown
    groups = _plot_signals(res)
    same = res.time_base["method"] == "sample by sample"
    n = res.time_base["compared"]
    if same:
        t = a.time[:n]
        pick = slice(0, n)
    else:
        pick = (a.time >= b.time[0]) & (a.time <= b.time[-1]) if b.time.size else slice(0, 0)
        t = a.time[pick]
    shown = _Shown()
    fig, axes = plt.subplots(max(1, len(groups)), 1, figsize=(10, 2.8 * max(1, len(groups))),
                             sharex=True, squeeze=False)
    units = {s.name: s.unit for s in res.signals}
    for ax, group in zip(axes[:, 0], groups):
        twin = ax.twinx()
        for name, dcolor in zip(group, ("tab:red", "tab:purple")):
            xa = np.asarray(a.signals[name], dtype=float)[pick]
            xb = (np.asarray(b.signals[name], dtype=float)[pick] if same
                  else np.interp(t, b.time, np.asarray(b.signals[name], dtype=float)))
            ax.plot(t, shown(xa), lw=1.0, label=f"{name} A")
            ax.plot(t, shown(xb), lw=1.0, ls="--", label=f"{name} B")
            twin.plot(t, shown(xb - xa), lw=0.8, color=dcolor, alpha=0.7,
                      label=f"{name} B - A")
        unit = units.get(group[0], "")
        ax.set_ylabel(f"{', '.join(group)} [{unit}]")
        twin.set_ylabel(f"B - A [{unit}]", color="tab:red")
        h1, l1 = ax.get_legend_handles_labels()
        h2, l2 = twin.get_legend_handles_labels()
        ax.legend(h1 + h2, l1 + l2, loc="best", fontsize=7)
        ax.grid(alpha=0.3)
    axes[-1, 0].set_xlabel("time [s]")
    title = f"A: {res.a.name}   B: {res.b.name}   ({res.time_base['method']})"
    note = shown.note()
    fig.suptitle(title + (f"\n{note}" if note else ""), fontsize=9)
    fig.tight_layout()
    dest.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(dest, dpi=100)
    plt.close(fig)
    return dest


def plot_path(a: Path, b: Path, out: str | None) -> Path:
    """``--out`` (a .png file, or a folder to hold diff.png), or by default
    ``diff-A-vs-B.png`` in the folder holding run A."""
    if out:
        o = Path(out)
        return o if o.suffix.lower() == ".png" else o / "diff.png"
    return Path(a).absolute().parent / f"diff-{Path(a).name}-vs-{Path(b).name}.png"


def diff_runs(path_a: str | Path, path_b: str | Path, tols: list[str] = (),
              metric_tols: list[str] = (), bit_identical: bool = False,
              out: str | None = None, draw: bool = True) -> DiffResult:
    """The whole command without printing: read, compare, judge, plot."""
    a, b = load(path_a), load(path_b)
    res = judge(compare(a, b), list(tols), list(metric_tols), bit_identical)
    if draw and res.signals:
        res.plot = str(plot(res, a, b, plot_path(Path(path_a), Path(path_b), out)))
    return res


def print_result(console, res: DiffResult) -> None:
    """The tables of the text output."""
    from rich.markup import escape
    from rich.table import Table
    console.print(f"A: {res.a}", markup=False)
    console.print(f"B: {res.b}", markup=False)
    console.print(f"time base: {res.time_base['text']}", markup=False)
    t = Table(title="metrics (summary.json)")
    for h in ("metric", "A", "B", "B - A"):
        t.add_column(h, justify="left" if h == "metric" else "right")
    t.add_row("outcome", str(res.outcome["a"]), str(res.outcome["b"]),
              "same" if res.outcome["same"] else "differs")
    for m in res.metrics:
        t.add_row(escape(m["label"]), _g(m["a"]), _g(m["b"]), _g(m["delta"]))
    console.print(t)
    t = Table(title="largest difference |B - A| per common signal")
    for h in ("signal", "unit", "max |B - A|", "at t \\[s]", "A", "B", "% of B range",
              "same bits"):
        t.add_column(h, justify="left" if h in ("signal", "unit") else "right",
                     no_wrap=h in ("signal", "unit"))
    for s in res.signals:
        rel = "n/a" if s.rel_range is None else f"{100 * s.rel_range:.3g}"
        extra = f" (+{s.finite_mismatch} non-finite in one)" if s.finite_mismatch else ""
        t.add_row(s.name, escape(s.unit), _g(s.max_abs, ".4g") + extra, _g(s.at_s, ".5g"),
                  _g(s.a_value, ".4g"), _g(s.b_value, ".4g"), rel,
                  "yes" if s.identical else "no")
    console.print(t)
    if res.only_in_a:
        console.print(f"only in A: {', '.join(res.only_in_a)}", markup=False)
    if res.only_in_b:
        console.print(f"only in B: {', '.join(res.only_in_b)}", markup=False)
    console.print(f"bit-identical: {'yes' if res.bit_identical else 'no'}"
                  f"{'' if res.bit_identical else ' (' + res.identical_reason + ')'}",
                  markup=False)
    for c in res.checks:
        console.print(f"{'within' if c.passed else 'BEYOND'}: {c.kind} {c.name} |B - A| = "
                      f"{_g(c.value)} {c.unit}, tolerance {c.text} = {_g(c.limit)} {c.unit}",
                      markup=False)
    if res.plot:
        console.print(f"wrote {res.plot}", markup=False)
    console.print("result: " + ("beyond tolerance: " + "; ".join(res.failed) if res.failed
                                else "within tolerances"), markup=False)
