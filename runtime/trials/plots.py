"""Plots of a run folder (PNG, matplotlib's non-interactive Agg backend)."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..recording import Run

#: the largest magnitude drawn as it is. Values beyond (a peer sending 1e308, a diverged
#: state) are drawn at this bound, with a note on the figure: matplotlib cannot scale an axis
#: whose range overflows a double (axis ranges and tick spacing become inf or NaN and drawing
#: fails). The recording keeps the values unchanged. 1e9 V or A is far beyond any battery
#: emulator (common practice, no source) and the bound of fault values in a scenario.
PLOT_LIMIT = 1e9


class _Shown:
    """Clips what a figure draws to +-PLOT_LIMIT and remembers the largest magnitude clipped."""

    def __init__(self):
        self.largest = 0.0

    def __call__(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        big = np.isfinite(x) & (np.abs(x) > PLOT_LIMIT)
        if not big.any():
            return x
        self.largest = max(self.largest, float(np.abs(x[big]).max()))
        return np.where(big, np.sign(x) * PLOT_LIMIT, x)

    def note(self) -> str | None:
        if not self.largest:
            return None
        return (f"values beyond +-{PLOT_LIMIT:g} are drawn at +-{PLOT_LIMIT:g} (largest "
                f"magnitude {self.largest:.3g}); the recording holds them unchanged")



def overview_png(run: Run, dest: Path) -> Path:
    """Four stacked panels: v_out and v_ref; tracking error; command u; currents."""
    import matplotlib
    matplotlib.use("Agg")
    import warnings

    import matplotlib.pyplot as plt

    with warnings.catch_warnings(), np.errstate(over="ignore", invalid="ignore"):
        # absurd values (overflowing differences) are clipped below: no warning per operation
        warnings.simplefilter("ignore", RuntimeWarning)
        return _overview(plt, run, dest)


def _overview(plt, run: Run, dest: Path) -> Path:
    shown = _Shown()
    t = run.time
    # the interlock word is a bit field (bit 50: latched), not a value to clip
    s = {k: v if k == "interlock_word" else shown(v) for k, v in run.signals.items()}
    fig = plt.figure(figsize=(9, 11), constrained_layout=True)
    grid = fig.add_gridspec(5, 1, height_ratios=[1, 1, 1, 1, 1.1])
    ax = [fig.add_subplot(grid[0])]
    ax += [fig.add_subplot(grid[i], sharex=ax[0]) for i in range(1, 4)]
    zoom = fig.add_subplot(grid[4])
    ax[0].plot(t, s["v_ref"], lw=1.6, color="0.65", label="v_ref (shaped)")
    if "v_ref_raw" in s:
        ax[0].plot(t, s["v_ref_raw"], lw=0.8, ls=":", color="0.3", label="v_ref_raw")
    ax[0].plot(t, s["v_out"], lw=0.9, color="tab:blue", label="v_out")
    ax[0].set_ylabel("voltage [V]")
    ax[0].legend(loc="best", fontsize=8)
    ax[1].plot(t, shown(s["v_ref"] - s["v_out"]), lw=0.8, color="tab:red")
    ax[1].set_ylabel("v_ref - v_out [V]")
    u = s.get("u")
    if u is not None:
        ax[2].plot(t, u, lw=0.8, color="tab:green", label="u")
        if "v_dc" in s:
            ax[2].plot(t, s["v_dc"], lw=0.8, ls="--", color="0.4", label="v_dc (limit)")
        ax[2].legend(loc="best", fontsize=8)
    ax[2].set_ylabel("command [V]")
    for name in ("i_L1", "i_L2", "i_out"):
        if name in s:
            ax[3].plot(t, s[name], lw=0.8, label=name)
    ax[3].set_ylabel("current [A]")
    ax[3].set_xlabel("time [s]")
    if ax[3].get_legend_handles_labels()[1]:
        ax[3].legend(loc="best", fontsize=8)
    # zoom on the largest tracking error: the transient a reviewer wants to see
    raw = run.signals
    err = np.abs(raw["v_ref"] - raw["v_out"])
    if t.size > 1 and np.isfinite(err).any():
        j = int(np.nanargmax(err))
        half = max(40, int(round(3e-3 / max(t[1] - t[0], 1e-12))))
        k = slice(max(0, j - half), min(t.size, j + 2 * half))
        zoom.plot(t[k] * 1e3, s["v_ref"][k], lw=1.6, color="0.65", label="v_ref")
        zoom.plot(t[k] * 1e3, s["v_out"][k], lw=0.9, color="tab:blue", label="v_out")
        zoom.set_xlabel("time [ms]")
        zoom.set_ylabel("voltage [V]")
        zoom.set_title(f"zoom on the largest |v_ref - v_out| = {err[j]:.3g} V at {t[j]:.6g} s",
                       fontsize=9)
        zoom.legend(loc="best", fontsize=8)
        zoom.grid(True, lw=0.3)
    word = s.get("interlock_word")
    if word is not None:
        latched = np.flatnonzero(word.astype(np.int64) & (1 << 50))
        if latched.size:
            for a in ax:
                a.axvline(t[latched[0]], color="black", lw=1.0, ls="-.")
            ax[0].annotate("trip", (t[latched[0]], ax[0].get_ylim()[1]), fontsize=8, va="top")
    title = run.attrs.get("title", "") or run.folder.name
    if run.attrs.get("demo_data"):
        title += "  [demo data]"
    if run.summary:
        import textwrap

        from ..outcome import judge
        title += "\n" + textwrap.fill(judge(run.summary)["text"], 110)
    note = shown.note()
    if note:
        title += "\n" + note
    fig.suptitle(title, fontsize=10)
    for a in ax:
        a.grid(True, lw=0.3)
    fig.savefig(dest, dpi=90)
    plt.close(fig)
    return dest


def unit_signals(run: Run) -> list[int]:
    """The unit numbers k whose output current ``unit<k>_i_out`` the run recorded (empty for
    a single-unit run)."""
    ks = []
    k = 1
    while f"unit{k}_i_out" in run.signals:
        ks.append(k)
        k += 1
    return ks


def units_png(run: Run, dest: Path) -> Path | None:
    """A run of paralleled units: the bus voltage with its reference; each unit's output
    current with its share of the units' total current (dashed, renormalised while a unit is
    blocked: runtime/trials/sharing.py), each unit's trips marked with its number. None for a
    single-unit run."""
    if not unit_signals(run):
        return None
    import matplotlib
    matplotlib.use("Agg")
    import warnings

    import matplotlib.pyplot as plt

    with warnings.catch_warnings(), np.errstate(over="ignore", invalid="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        return _units(plt, run, dest)


def _units(plt, run: Run, dest: Path) -> Path:
    from .sharing import LATCH_BITS, cause_text
    shown = _Shown()
    t = run.time
    s = run.signals
    ks = unit_signals(run)
    sh = (run.summary or {}).get("sharing") or {}
    weights = {u["unit"]: u["share"] for u in sh.get("units") or []}
    fig, ax = plt.subplots(2, 1, figsize=(9, 7), sharex=True, constrained_layout=True,
                           gridspec_kw={"height_ratios": [1, 1.4]})
    ax[0].plot(t, shown(s["v_ref"]), lw=1.6, color="0.65", label="v_ref (shaped)")
    if "v_ref_raw" in s:
        ax[0].plot(t, shown(s["v_ref_raw"]), lw=0.8, ls=":", color="0.3", label="v_ref_raw")
    ax[0].plot(t, shown(s["v_out"]), lw=0.9, color="tab:blue", label="v_out (bus)")
    ax[0].set_ylabel("bus voltage [V]")
    ax[0].legend(loc="best", fontsize=8)
    cur = np.stack([s[f"unit{k}_i_out"] for k in ks], axis=1)
    on = np.stack([s.get(f"unit{k}_enable", np.ones_like(t)) for k in ks], axis=1) > 0.5
    colours = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    share_i = None
    if len(weights) == len(ks):
        w = np.asarray([weights[k] for k in ks]) * on
        tot = w.sum(axis=1, keepdims=True)
        share_i = np.where(tot > 0, w / np.where(tot > 0, tot, 1.0), 0.0) * cur.sum(axis=1)[:, None]
    for j, k in enumerate(ks):
        c = colours[j % len(colours)]
        ax[1].plot(t, shown(cur[:, j]), lw=0.9, color=c, label=f"unit {k}")
        if share_i is not None:
            ax[1].plot(t, shown(share_i[:, j]), lw=0.8, ls="--", color=c)
        trip = s.get(f"unit{k}_trip")
        if trip is not None:
            bits = np.where(np.isfinite(trip), trip, 0.0).astype(np.int64) & LATCH_BITS
            new = bits & ~np.concatenate(([0], bits[:-1]))
            for i in np.flatnonzero(new):
                for a in ax:
                    a.axvline(t[i], color=c, lw=1.0, ls="-.")
                ax[1].annotate(f"{k}: {cause_text(int(new[i]))}", (t[i], 0.98),
                               xycoords=("data", "axes fraction"), fontsize=8, va="top",
                               color=c)
    if share_i is not None:
        ax[1].plot([], [], lw=0.8, ls="--", color="0.3", label="dashed: each unit's share")
    ax[1].set_ylabel("unit output current [A]")
    ax[1].set_xlabel("time [s]")
    ax[1].legend(loc="best", fontsize=8, ncol=2)
    for a in ax:
        a.grid(True, lw=0.3)
    title = (run.attrs.get("title", "") or run.folder.name) + f": {len(ks)} units"
    if run.attrs.get("demo_data"):
        title += "  [demo data]"
    dev = sh.get("largest_deviation_pct")
    if isinstance(dev, (int, float)) and np.isfinite(dev):
        title += (f"\nlargest steady deviation from a share {dev:+.3g} % (unit "
                  f"{sh.get('largest_deviation_unit')})")
    note = shown.note()
    if note:
        title += "\n" + note
    fig.suptitle(title, fontsize=10)
    fig.savefig(dest, dpi=90)
    plt.close(fig)
    return dest
