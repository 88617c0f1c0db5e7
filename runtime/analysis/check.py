"""The stability check before a run: the operating-point analysis at the run's start (the
start voltage and the load at t = 0), for each controller that is about to run.

A finding is a notice (``--strict`` makes it an error, nothing runs):

- **unstable**: a closed-loop pole on or outside the unit circle (largest |z| >= 1);
- **no steady state**: a limit of the controller or converter cannot hold the start;
- **beyond an interlock**: the steady state itself trips one of the scenario's interlocks;
- **little margin**: stable, but the loop broken at the converter command has a gain margin
  within ``GAIN_MARGIN_DB`` of 0 dB (either side: with a constant-power load the loop may need
  a minimum gain) or a phase margin below ``PHASE_MARGIN_DEG``.

The thresholds are lower bounds below which a loop is commonly called fragile (common practice,
no source); design targets are usually higher (6 dB, 30-45 degrees).

The check costs one analysis (milliseconds; no loop is compiled for it). It is made on the
scenario's plant model, also for a bridge run, whose external plant it stands for.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

#: why a scenario of paralleled units gets no operating-point analysis
UNITS_NOT_ANALYSED = ("the operating-point analysis covers a single unit; a scenario of "
                      "paralleled units ([units]) is not analysed (its runs are)")
#: a gain margin closer than this to 0 dB is "little margin" [dB]
GAIN_MARGIN_DB = 3.0
#: a phase margin below this is "little margin" [deg]
PHASE_MARGIN_DEG = 20.0


@dataclass
class Finding:
    controller: str
    v_ref: float
    p_load: float
    kind: str
    text: str

    def notice(self) -> str:
        return (f"stability check: {self.controller} at {self.v_ref:.6g} V, "
                f"{self.p_load / 1e3:.6g} kW (the run's start): {self.text}")


def start_check(prep) -> tuple[list[Finding], dict[str, Any]]:
    """The findings at the start of the prepared scenario, and a summary for the run record."""
    from . import point
    from .linear import AnalysisError, linearize
    sc = prep.sc
    name = sc.controller.plugin.name
    v = float(prep.v0)
    p = float(sc.load_v[0, 0])
    record: dict[str, Any] = dict(v_ref_V=v, p_load_W=p, thresholds=dict(
        gain_margin_db=GAIN_MARGIN_DB, phase_margin_deg=PHASE_MARGIN_DEG))
    if getattr(sc, "units", None) is not None:
        record.update(status="not analysed", note=UNITS_NOT_ANALYSED)
        return [], record
    try:
        m = linearize(prep, v, p)
    except AnalysisError as exc:
        record.update(status="no steady state", note=str(exc))
        return [Finding(name, v, p, "no steady state", str(exc))], record
    top = point.largest_pole(m)
    findings = []
    record.update(largest_pole_abs=top)
    if top >= point.STABLE_BELOW:
        poles = point.poles(m)
        worst = poles[0]
        f = worst["f_n_hz"]
        findings.append(Finding(name, v, p, "unstable", (
            f"the linearised loop is unstable: largest closed-loop |z| = {top:.4f} per tick"
            + (f" (a mode near {f:.4g} Hz)" if f is not None and worst["z"].imag != 0 else "")
            + "; expect it to oscillate or collapse. hilrig analyze shows the poles and margins")))
        record.update(status="unstable")
    else:
        record.update(status="stable")
        mg = point.margins(m)
        if mg.get("available"):
            gm, pm = mg["gain_margin_db"], mg["phase_margin_deg"]
            record.update(gain_margin_db=gm if math.isfinite(gm) else None,
                          phase_margin_deg=pm if math.isfinite(pm) else None)
            low = []
            if math.isfinite(gm) and abs(gm) < GAIN_MARGIN_DB:
                low.append(f"gain margin {gm:.2f} dB at {mg['f_phase_crossover_hz']:.4g} Hz "
                           f"(within {GAIN_MARGIN_DB:g} dB of instability)")
            if math.isfinite(pm) and pm < PHASE_MARGIN_DEG:
                low.append(f"phase margin {pm:.1f} deg at {mg['f_gain_crossover_hz']:.4g} Hz "
                           f"(below {PHASE_MARGIN_DEG:g} deg)")
            if low:
                findings.append(Finding(name, v, p, "little margin",
                                        "stable with little margin: " + "; ".join(low)))
                record.update(status="little margin")
    for il in m.op.interlocks_beyond:
        findings.append(Finding(name, v, p, "beyond an interlock",
                                f"the steady state trips an interlock: {il}"))
    if m.op.interlocks_beyond:
        record["interlocks_beyond"] = list(m.op.interlocks_beyond)
    record["findings"] = [f.text for f in findings]
    return findings, record


def grid_check(scenarios: dict, path, grid, workers: int | None = None) -> list[Finding]:
    """For an envelope: the stability map over its grid and loads (constant power only), one
    finding per controller with points the analysis predicts will not track (unstable, no
    steady state, or resting beyond an interlock)."""
    from . import grid as gmod
    tasks = []
    if any(getattr(sc, "units", None) is not None for sc in scenarios.values()):
        return []
    for c, sc in scenarios.items():
        tasks += gmod.tasks_for(sc.text, path.name, str(path), [c], grid, power_only=True)
    rows = gmod.stability_map(tasks, workers=workers)
    findings = []
    for c in scenarios:
        mine = [r for r in rows if r["controller"] == c]
        bad = [r for r in mine if r["status"] != "stable" or r["beyond_interlock"]]
        if not bad:
            continue
        n_uns = sum(r["status"] == "unstable" for r in mine)
        n_none = sum(r["status"] == "no steady state" for r in mine)
        n_il = sum(r["status"] == "stable" and bool(r["beyond_interlock"]) for r in mine)
        parts = [f"unstable at {n_uns}" if n_uns else "", f"no steady state at {n_none}"
                 if n_none else "", f"at rest beyond an interlock at {n_il}" if n_il else ""]
        lo = min(bad, key=lambda r: (r["v_ref_V"], -r["p_load_W"]))
        findings.append(Finding(c, lo["v_ref_V"], lo["p_load_W"], "grid", (
            "the linear analysis predicts no tracking: " + ", ".join(x for x in parts if x)
            + f" of {len(mine)} points (hilrig analyze --map draws them)")))
    return findings
