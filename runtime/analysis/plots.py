"""Figures of the operating-point analysis (matplotlib, Agg): one figure per operating point
with every controller in it (loop gain magnitude and phase with the margins marked, output
impedance against the load's, closed-loop poles in the z-plane), and the stability map, alone
or drawn over an envelope map of the same grid."""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

#: one colour per controller, in a fixed order of names so that a layout does not depend on
#: which controller was listed first
_COLOURS = ("#1f5fa8", "#c0392b", "#2e8b57", "#8e44ad", "#d68910", "#566573")


def _colour(names: list[str], name: str) -> str:
    return _COLOURS[sorted(names).index(name) % len(_COLOURS)]


def point_figure(models: dict[str, Any], summaries: dict[str, dict[str, Any]], title: str = ""):
    """The figure of one operating point; ``models`` maps controller name to LoopModel."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from . import point
    names = list(models)
    fig, axes = plt.subplots(2, 2, figsize=(11, 7.5), constrained_layout=True)
    ax_mag, ax_ph, ax_z, ax_pz = axes[0, 0], axes[1, 0], axes[0, 1], axes[1, 1]
    any_model = next(iter(models.values()))
    fn = point.nyquist_hz(any_model)
    f = np.geomspace(1e-4 * fn, fn, 1500)[:-1]
    for name, m in models.items():
        c = _colour(names, name)
        s = summaries[name]
        if m.nu == 1:
            L = point.loop_gain(m, f)
            ax_mag.semilogx(f, 20 * np.log10(np.abs(L)), color=c, label=name)
            ph = np.degrees(np.unwrap(np.angle(L)))
            ph -= 360.0 * math.ceil(ph[0] / 360.0)  # start in (-360, 0]
            ax_ph.semilogx(f, ph, color=c, label=name)
            mg = s["margins"]
            if mg.get("f_gain_crossover_hz"):
                ax_mag.plot(mg["f_gain_crossover_hz"], 0.0, "o", color=c, ms=5)
                pc = float(np.interp(mg["f_gain_crossover_hz"], f, ph))
                ax_ph.annotate(f"PM {mg['phase_margin_deg']:.1f} deg", (mg["f_gain_crossover_hz"], pc),
                               fontsize=7, color=c, xytext=(4, 4), textcoords="offset points")
            if mg.get("f_phase_crossover_hz"):
                ax_mag.annotate(f"GM {mg['gain_margin_db']:.1f} dB",
                                (mg["f_phase_crossover_hz"], -mg["gain_margin_db"]), fontsize=7,
                                color=c, xytext=(4, -10), textcoords="offset points")
                ax_mag.plot(mg["f_phase_crossover_hz"], -mg["gain_margin_db"], "s", color=c, ms=4)
        Z = point.output_impedance(m, f)
        ax_z.loglog(f, np.abs(Z), color=c, label=f"|Z_out| {name}")
        z = np.linalg.eigvals(m.Acl)
        ax_pz.plot(z.real, z.imag, "x", color=c, ms=7, mew=1.5,
                   label=f"{name}: max |z| {s['largest_pole_abs']:.4f}")
    zl = point.load_impedance(any_model)
    if math.isfinite(zl):
        ax_z.axhline(abs(zl), color="k", ls="--", lw=1, label=f"|Z_load| = {abs(zl):.3g} ohm"
                     f"{' (negative)' if zl < 0 else ''}")
    ax_mag.axhline(0.0, color="0.6", lw=0.8)
    for k in range(-3, 2):
        ax_ph.axhline(-180.0 + 360.0 * k, color="0.8", lw=0.6)
    ax_mag.set_ylabel("|L| [dB]")
    ax_mag.set_title("loop gain broken at the converter command", fontsize=9)
    ax_ph.set_ylabel("phase of L [deg]")
    ax_ph.set_xlabel("frequency [Hz]")
    ax_z.set_title("output impedance of the controlled emulator against the load's", fontsize=9)
    ax_z.set_ylabel("impedance [ohm]")
    ax_z.set_xlabel("frequency [Hz]")
    t = np.linspace(0, 2 * math.pi, 400)
    ax_pz.plot(np.cos(t), np.sin(t), color="0.5", lw=0.8)
    ax_pz.set_aspect("equal", adjustable="datalim")
    ax_pz.set_title("closed-loop poles (z-plane, unit circle = stability limit)", fontsize=9)
    ax_pz.set_xlabel("Re z [-]")
    ax_pz.set_ylabel("Im z [-]")
    for ax in (ax_mag, ax_ph, ax_z, ax_pz):
        ax.grid(True, which="both", lw=0.3, color="0.85")
        ax.legend(fontsize=7, loc="best")
    if title:
        fig.suptitle(title, fontsize=10)
    return fig


def point_png(models, summaries, dest: Path, title: str = "") -> Path:
    fig = point_figure(models, summaries, title)
    import matplotlib.pyplot as plt
    fig.savefig(dest, dpi=90)
    plt.close(fig)
    return dest


def _grid(rows, controller):
    sel = [r for r in rows if r["controller"] == controller]
    vs = sorted({r["v_ref_V"] for r in sel})
    ps = sorted({r["p_load_W"] for r in sel})
    g = np.full((len(vs), len(ps)), np.nan)
    for r in sel:
        if r["largest_pole_abs"] is not None:
            g[vs.index(r["v_ref_V"]), ps.index(r["p_load_W"])] = r["largest_pole_abs"]
    return vs, ps, g


def map_figure(map_rows: list[dict[str, Any]], env_rows: list[dict[str, Any]] | None = None,
               title: str = ""):
    """The stability map. Alone: the largest closed-loop pole magnitude per point, with the
    contour |z| = 1. Over an envelope (``env_rows``): the envelope's heat map with the same
    contour and a cross on every point the analysis calls unstable."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ctrls = list(dict.fromkeys(r["controller"] for r in map_rows))
    if env_rows is not None:
        from hilrig.runtime.trials.envelope import heat_map_figure
        sel = [r for r in env_rows if r["controller"] in ctrls]
        fig = heat_map_figure(sel, title)
        env_ctrls = list(dict.fromkeys(r["controller"] for r in sel))
        axes = dict(zip(env_ctrls, fig.axes[:len(env_ctrls)]))
    else:
        fig, ax_arr = plt.subplots(1, len(ctrls), figsize=(4.2 * len(ctrls) + 1.5, 4.4),
                                   squeeze=False, constrained_layout=True)
        axes = dict(zip(ctrls, ax_arr[0]))
        if title:
            fig.suptitle(title, fontsize=10)
    for c, ax in axes.items():
        vs, ps, g = _grid(map_rows, c)
        if not vs:
            continue
        pk = np.array(ps) / 1e3
        if env_rows is None:
            dv = (vs[-1] - vs[0]) / max(len(vs) - 1, 1) / 2 or 1.0
            dp = (pk[-1] - pk[0]) / max(len(pk) - 1, 1) / 2 or 1.0
            im = ax.imshow(np.clip(g, 0.5, 1.5), origin="lower", aspect="auto", cmap="RdYlGn_r",
                           vmin=0.5, vmax=1.5, interpolation="nearest",
                           extent=(pk[0] - dp, pk[-1] + dp, vs[0] - dv, vs[-1] + dv))
            fig.colorbar(im, ax=ax, label="largest closed-loop |z| [-]")
            ax.set_title(c, fontsize=10)
            ax.set_xlabel("constant load power [kW]")
            ax.set_ylabel("reference voltage [V]")
        if len(vs) > 1 and len(ps) > 1 and np.nanmin(g) < 1.0 < np.nanmax(g):
            ax.contour(pk, vs, g, levels=[1.0], colors="k", linewidths=1.6)
            ax.plot([], [], "-", color="k", lw=1.6, label="largest |z| = 1")
        bad = [(r["p_load_W"] / 1e3, r["v_ref_V"]) for r in map_rows
               if r["controller"] == c and r["status"] == "unstable"]
        if bad:
            bx, by = zip(*bad)
            ax.plot(bx, by, "x", color="k", ms=4, mew=0.9,
                    label="unstable")
        none = [(r["p_load_W"] / 1e3, r["v_ref_V"]) for r in map_rows
                if r["controller"] == c and r["status"] == "no steady state"]
        if none:
            nx, ny = zip(*none)
            ax.plot(nx, ny, "o", mfc="none", color="k", ms=4, mew=0.8, label="no steady state")
        over = [(r["p_load_W"] / 1e3, r["v_ref_V"]) for r in map_rows
                if r["controller"] == c and r["status"] == "stable" and r.get("beyond_interlock")]
        if over:
            ox, oy = zip(*over)
            ax.plot(ox, oy, "+", color="k", ms=5, mew=0.9, label="stable, at rest beyond an interlock")
    # one key of the analysis' marks for every panel, beside the panels (not over the cells)
    seen: dict[str, Any] = {}
    for ax in axes.values():
        for h, lab in zip(*ax.get_legend_handles_labels()):
            seen.setdefault(lab, h)
    if seen:
        fig.legend(list(seen.values()), list(seen), fontsize=7, title="linear analysis",
                   title_fontsize=8, loc="outside right center" if env_rows is not None
                   else "outside lower center", ncols=1 if env_rows is not None else len(seen))
    return fig


def map_png(map_rows, dest: Path, env_rows=None, title: str = "") -> Path:
    fig = map_figure(map_rows, env_rows, title)
    import matplotlib.pyplot as plt
    fig.savefig(dest, dpi=90)
    plt.close(fig)
    return dest
