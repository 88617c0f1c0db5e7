"""Designs for paralleled units: each unit's controller designed for its own plant, as a
single unit would be (runtime/analysis/design.py), over the scenario's design range with the
load powers scaled to the unit's share; and the reference shaping derived from the units.

Each unit is prepared as a scenario of its own (the unit's plant and controller, the load
times its share, no interlocks, faults or sensors): the same design, cache and record as a
single-unit run. Units with the same plant values and controller are designed once.
"""
from __future__ import annotations

import dataclasses
import json
from typing import Any

import numpy as np


def unit_scenario(sc, k: int):
    """Unit k's (0-based) single-unit scenario: its plant and controller, the load profile and
    the design range's powers times its share."""
    u = sc.units
    w = float(u.shares[k])
    design = dict(sc.design)
    if design.get("p_range") is not None:
        lo, hi = design["p_range"]
        design["p_range"] = (lo * w, hi * w)
    load_v = np.array(sc.load_v, dtype=np.float64, copy=True)
    load_v[0] *= w
    load_v[1] *= w
    load_v[2] *= w
    return dataclasses.replace(sc, plant=u.plants[k], controller=u.controllers[k], units=None,
                               load_v=load_v, interlocks=[], faults=[], sensors=[], resets=[],
                               design=design)


def design_units(sc) -> tuple[Any, dict[str, Any] | None, dict[str, Any] | None]:
    """(the scenario with each unit's designed controller values, the design record, the
    shaping derived from the units or None)."""
    from hilrig.runtime.run import plain_values, prepare
    from hilrig.runtime.scenario import PluginChoice
    u = sc.units
    want_design = sc.design["defaults"] == "plant"
    want_shaping = bool(sc.shaping.get("from_plant"))
    if not (want_design or want_shaping):
        return sc, None, None
    memo: dict[str, Any] = {}
    records, shapings, values = [], [], []
    for k in range(u.count):
        key = json.dumps([u.plants[k].plugin.origin, plain_values(u.plants[k].values),
                          u.controllers[k].plugin.origin, plain_values(u.controllers[k].values),
                          sorted(u.controllers[k].given), u.shares[k]], sort_keys=True,
                          default=str)
        if key not in memo:
            memo[key] = prepare(unit_scenario(sc, k))
        pk = memo[key]
        values.append(dict(pk.sc.controller.values))
        records.append(dict(unit=k + 1, **(pk.design or {"designed": []})))
        if pk.shaping is not None:
            shapings.append(pk.shaping)
    cvals = sc.controller.values
    if want_design:
        units = [dict(cu, values=values[k]) for k, cu in enumerate(cvals["units"])]
        cvals = dict(cvals, units=units)
        ctrl = PluginChoice(plugin=sc.controller.plugin, values=cvals, given=sc.controller.given)
        sc = dataclasses.replace(sc, controller=ctrl)
    record = dict(units=records) if want_design else None
    shaping = None
    if want_shaping and shapings:
        # the bus follows the slowest unit: the lowest slew rate and filter pole of the units
        best = min(shapings, key=lambda r: (r["slew_rate_V_s"], r["pole_rad_s"]))
        shaping = dict(best, pole_rad_s=min(r["pole_rad_s"] for r in shapings),
                       slew_rate_V_s=min(r["slew_rate_V_s"] for r in shapings),
                       note="the lowest of the units' derived values (each unit with its share "
                            "of the load)")
    return sc, record, shaping
