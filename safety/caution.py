"""High-voltage caution notices.

A caution is shown whenever any configured voltage, limit or plant rating exceeds 60 V DC, the
limit of voltage class A for road-vehicle electric circuits (above it: class B, hazardous;
ISO 6469-3, and UN ECE / EU Regulation 2015/208 Annex XXIV).
"""
from __future__ import annotations

from typing import Iterable

from hilrig.plugins.base import Param, TableParam

#: ISO 6469-3 voltage class B begins above 60 V DC
CLASS_B_DC_V = 60.0

CAUTION_TITLE = "CAUTION: HAZARDOUS VOLTAGE"
CAUTION_TEXT = (
    "This scenario configures voltages above 60 V DC (voltage class B, ISO 6469-3), e.g. "
    "{where} = {vmax:.0f} V. On real equipment such voltages can kill. hilrig's interlocks and "
    "watchdogs are monitoring functions of a test tool, NOT safety-rated functions "
    "(IEC 61508, ISO 13849-1): hardware protection, isolation and interlocking must stay in "
    "place. Local electrical codes and licensed practice govern any connection to real equipment."
)


def hazardous_voltages(items: Iterable[tuple[str, float]]) -> list[tuple[str, float]]:
    """The (name, voltage [V]) pairs whose magnitude exceeds 60 V DC, in the order given."""
    return [(n, float(v)) for n, v in items if abs(float(v)) > CLASS_B_DC_V]


def caution_text(items: Iterable[tuple[str, float]]) -> str | None:
    """The caution for a set of configured voltages, or None when all are at most 60 V."""
    hv = hazardous_voltages(items)
    if not hv:
        return None
    name, v = hv[0]
    return CAUTION_TEXT.format(vmax=abs(v), where=name)


def scenario_voltages(sc) -> list[tuple[str, float]]:
    """Every voltage a scenario configures: plant ratings, voltage limits, references."""
    out = []
    for choice, key in ((sc.plant, "plant"), (sc.controller, "controller"), (sc.reference, "reference")):
        decl = choice.plugin.declaration
        for p in decl.params:
            if isinstance(p, Param) and p.unit == "V":
                out.append((f"{key}.{p.name}", choice.values[p.name]))
            elif isinstance(p, TableParam):  # any column in volts
                for j, (col, cu) in enumerate(p.columns):
                    if cu == "V":
                        vals = [row[j] for row in choice.values[p.name]]
                        if vals:
                            out.append((f"{key}.{p.name}", max(vals, key=abs)))
    for it in sc.interlocks:
        if it.unit == "V":
            out.append((f"interlock on {it.signal}", it.threshold))
    return out
