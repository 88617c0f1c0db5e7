"""High-voltage hazard notices.

Signal word and colour (from memory of ANSI Z535.4 and ISO 3864-2): CAUTION is kept for a
hazardous situation which, if not avoided, could result in minor or moderate injury; WARNING for
one which could result in death or serious injury; DANGER for one which will. A voltage above
60 V DC can kill, and whether it will depends on the equipment and the work on it, which the
tool cannot know: the notice is a WARNING, in the colour ANSI Z535 gives that word (orange).

A notice is shown whenever a voltage that can be present on the equipment a scenario describes
exceeds 60 V DC, the limit of voltage class A for road-vehicle electric circuits (above it:
class B, hazardous; ISO 6469-3, and UN ECE / EU Regulation 2015/208 Annex XXIV).

Which configured values count (:func:`scenario_voltages`; the choice is common practice, no
source):

- every plant parameter in volts, defaults included: the DC link ``V_dc`` and the like are what
  the modelled (or, through a bridge, the real) power stage carries, and a plant left at its
  default DC link still has it;
- the reference's range, defaults included, since the output is driven towards it: every
  voltage parameter and every volt column of its tables (the profile's points), and for a
  battery model its pack voltage, ``n_series`` times the largest cell voltage of its tables
  (``n_series * max OCV``);
- ``[initial] v_out`` and the ``[limits]`` voltages (``safe_u`` is applied on a trip);
- interlock thresholds in volts: the scenario states them, so they say what its author expects;
- the controller's voltage parameters only where the scenario sets them: in its text, or at a
  value other than the plugin's default (a ``--set`` override, an interlock-suite case). A
  controller's defaults in volts are tuning values such as the cascaded PI's command clamp
  ``u_max = 10 kV``, which the controller itself limits to the plant's ``V_dc``; a clamp above
  what the plant can produce is not a voltage present on equipment.

When in doubt a value counts: the notice must never be missing for a scenario that has more
than 60 V anywhere.
"""
from __future__ import annotations

from typing import Iterable

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from hilrig.plugins.base import Param, TableParam

#: ISO 6469-3 voltage class B begins above 60 V DC
CLASS_B_DC_V = 60.0

#: the signal word for a hazard that could result in death or serious injury (ANSI Z535.4,
#: ISO 3864-2; from memory)
SIGNAL_WORD = "WARNING"
#: ANSI Z535 gives WARNING the safety colour orange. A terminal only approximates it: colour
#: 208 of the 256-colour palette (rich's "dark_orange", #ff8700); a 16-colour terminal shows
#: its nearest colour (yellow).
SIGNAL_COLOUR = "dark_orange"
#: the signal-word panel of a WARNING: black letters on orange
SIGNAL_STYLE = f"bold black on {SIGNAL_COLOUR}"
#: the border and text of the notice in the terminal
NOTICE_STYLE = f"bold {SIGNAL_COLOUR}"

WARNING_TITLE = f"{SIGNAL_WORD}: HAZARDOUS VOLTAGE"
#: short form for the live view
WARNING_SHORT = (f"{SIGNAL_WORD}: hazardous voltage (above 60 V DC). These interlocks are\n"
                 " not safety-rated functions; hardware protection must stay in place.")
WARNING_TEXT = (
    "This scenario configures voltages above 60 V DC (voltage class B, ISO 6469-3), e.g. "
    "{where} = {vmax:.0f} V. On real equipment such voltages can kill. hilrig's interlocks and "
    "watchdogs are monitoring functions of a test tool, NOT safety-rated functions "
    "(IEC 61508, ISO 13849-1): hardware protection, isolation and interlocking must stay in "
    "place. Local electrical codes and licensed practice govern any connection to real equipment."
)


def hazardous_voltages(items: Iterable[tuple[str, float]]) -> list[tuple[str, float]]:
    """The (name, voltage [V]) pairs whose magnitude exceeds 60 V DC, in the order given (NaN
    counts: it cannot be shown to be at most 60 V)."""
    return [(n, float(v)) for n, v in items if not abs(float(v)) <= CLASS_B_DC_V]


def caution_text(items: Iterable[tuple[str, float]]) -> str | None:
    """The hazard notice (WARNING) for a set of configured voltages, or None when all are at
    most 60 V."""
    hv = hazardous_voltages(items)
    if not hv:
        return None
    name, v = hv[0]
    return WARNING_TEXT.format(vmax=abs(v), where=name)


def _volt_values(key: str, choice, names=None) -> list[tuple[str, float]]:
    """Every parameter of a plugin choice in volts (``names``: only these), as (name, value);
    a table contributes its largest magnitude of each volt column."""
    out = []
    for p in choice.plugin.declaration.params:
        if names is not None and p.name not in names:
            continue
        if isinstance(p, Param) and p.unit == "V":
            out.append((f"{key}.{p.name}", choice.values[p.name]))
        elif isinstance(p, TableParam):
            for j, (col, cu) in enumerate(p.columns):
                if cu == "V":
                    vals = [row[j] for row in choice.values[p.name]]
                    if vals:
                        out.append((f"{key}.{p.name}", max(vals, key=abs)))
    return out


def _pack_voltages(choice) -> list[tuple[str, float]]:
    """A battery model's pack voltage: cells in series (``n_series``) times the largest cell
    voltage of its tables (the OCV at full charge)."""
    n = choice.values.get("n_series")
    if isinstance(n, bool) or not isinstance(n, (int, float)):
        return []
    out = []
    for p in choice.plugin.declaration.params:
        if isinstance(p, TableParam):
            for name, v in _volt_values("reference", choice, {p.name}):
                out.append((f"reference pack voltage (n_series {n:g} x max {name})", n * v))
    return out


def _set_in_text(sc, key: str) -> set[str]:
    """The parameter names the scenario's text sets in its ``[key]`` table (empty when the
    text cannot be read)."""
    try:
        tab = tomllib.loads(sc.text or "").get(key, {})
    except (tomllib.TOMLDecodeError, TypeError):
        return set()
    return set(tab) if isinstance(tab, dict) else set()


def _explicit(sc, key: str, choice) -> set[str]:
    """Parameters the scenario sets: named in its text, or at a value other than the default."""
    names = _set_in_text(sc, key)
    for p in choice.plugin.declaration.params:
        if choice.values.get(p.name) != p.default:
            names.add(p.name)
    return names


def scenario_voltages(sc) -> list[tuple[str, float]]:
    """The voltages that can be present on the equipment a scenario describes (see the module
    docstring): plant ratings, the reference's range, the start voltage, the voltage limits,
    interlock thresholds and the controller's voltage parameters the scenario sets."""
    out = _volt_values("plant", sc.plant)
    out += _volt_values("reference", sc.reference) + _pack_voltages(sc.reference)
    if sc.v_out0 is not None:
        out.append(("initial.v_out", sc.v_out0))
    out.append(("limits.safe_u", sc.safe_u))
    out.append(("limits.v_collapse", sc.v_collapse))
    out += _volt_values("controller", sc.controller, _explicit(sc, "controller", sc.controller))
    for it in sc.interlocks:
        if it.unit == "V":
            out.append((f"interlock on {it.signal}", it.threshold))
    return out


def unreachable_voltages(sc) -> list[str]:
    """Notices for what a scenario asks of the output that its plant cannot give: a reference
    (or start voltage) above the DC link ``V_dc`` (an averaged buck stage holds its converter
    voltage in [0, V_dc]; common practice, no source), or below 0 V. Not an error: driving a
    controller into that limit is a legitimate trial, but it should not pass unnoticed."""
    vdc = sc.plant.values.get("V_dc")
    if not isinstance(vdc, (int, float)) or isinstance(vdc, bool):
        return []
    asks = _volt_values("reference", sc.reference) + _pack_voltages(sc.reference)
    if sc.v_out0 is not None:
        asks.append(("initial.v_out", sc.v_out0))
    # a table contributes its largest magnitude above; for "below 0 V" every row counts
    for q in sc.reference.plugin.declaration.params:
        if isinstance(q, TableParam):
            for j, (_, cu) in enumerate(q.columns):
                rows = sc.reference.values[q.name]
                if cu == "V" and rows:
                    asks.append((f"reference.{q.name}", min(row[j] for row in rows)))
    notes = []
    high = [(n, v) for n, v in asks if v > vdc]
    if high:
        n, v = max(high, key=lambda nv: nv[1])
        notes.append(f"{n} = {v:g} V is above plant.V_dc = {vdc:g} V: the output stage cannot "
                     f"reach it, and the command will sit at its limit")
    low = [(n, v) for n, v in asks if v < 0.0]
    if low:
        n, v = min(low, key=lambda nv: nv[1])
        notes.append(f"{n} = {v:g} V is below 0 V: the output stage cannot reach it")
    return notes
