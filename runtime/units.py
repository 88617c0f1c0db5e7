"""Quantities with SI units: ``"200 uH"`` -> 2e-4 (henry).

Everything inside hilrig is SI. A scenario may give a number (taken as SI) or a string of a
number, an optional SI prefix and the unit symbol. The parser is deliberately small: the units
this tool meets are a fixed, short list, and a general units library would add start-up time to
every run for no gain here.
"""
from __future__ import annotations

import math
import re

from .errors import UnitError

PREFIXES = {
    "p": 1e-12, "n": 1e-9, "u": 1e-6, "\u00b5": 1e-6, "\u03bc": 1e-6, "m": 1e-3,
    "": 1.0, "k": 1e3, "M": 1e6, "G": 1e9,
}

#: unit symbols hilrig understands, with accepted spellings -> canonical symbol
UNITS = {
    "V": "V", "A": "A", "W": "W", "ohm": "ohm", "Ohm": "ohm", "\u03a9": "ohm", "S": "S",
    "H": "H", "F": "F", "s": "s", "Hz": "Hz", "rad/s": "rad/s", "V/s": "V/s",
    "Ah": "Ah", "A h": "Ah", "-": "-", "V/A": "V/A", "A/V": "A/V",
    "V/(A s)": "V/(A s)", "A/(V s)": "A/(V s)", "1/s": "1/s",
}

_NUM = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_RE = re.compile(rf"^\s*({_NUM})\s*(.*?)\s*$")


def parse_quantity(text: str | float | int, unit: str, where: str = "value") -> float:
    """Return the SI value of ``text`` whose unit must be ``unit``.

    Parameters
    ----------
    text : str or float or int
        ``400``, ``"400 V"``, ``"200 uH"``, ``"60 kW"``. A bare number is taken as SI.
    unit : str
        The canonical unit expected (a key of :data:`UNITS` values), or ``"-"``.
    where : str
        Name used in the message, e.g. ``"scenario.toml: plant.L1"``.
    """
    if isinstance(text, bool):
        raise UnitError(f"{where} = {text!r} is a boolean; expected a number in {unit}")
    if isinstance(text, (int, float)):
        value = float(text)
    elif isinstance(text, str):
        m = _RE.match(text)
        if not m:
            raise UnitError(f"{where} = {text!r} is not a quantity; write e.g. '12.5 {_example(unit)}'")
        value = float(m.group(1))
        rest = m.group(2)
        if rest:
            value *= _scale(rest, unit, where, text)
    else:
        raise UnitError(f"{where} = {text!r} is a {type(text).__name__}; expected a number in {unit}")
    if not math.isfinite(value):
        raise UnitError(f"{where} = {text!r} is not finite; expected a finite number in {unit}")
    return value


def _example(unit: str) -> str:
    return unit if unit != "-" else ""


def _scale(rest: str, unit: str, where: str, text: str) -> float:
    if rest in UNITS and UNITS[rest] == unit:
        return 1.0
    # longest symbol first, so "mohm" is milli-ohm and "ms" is milliseconds, not mega-...
    for sym in sorted(UNITS, key=len, reverse=True):
        if rest.endswith(sym):
            prefix = rest[: len(rest) - len(sym)]
            if prefix in PREFIXES and UNITS[sym] == unit and unit not in ("-",):
                return PREFIXES[prefix]
    got = _guess_unit(rest)
    hint = f" (that reads as {got})" if got else ""
    raise UnitError(
        f"{where} = {text!r} has unit {rest!r}{hint}; expected {unit}"
        f"{' with an optional SI prefix (p n u m k M G)' if unit != '-' else ' (dimensionless)'}")


def _guess_unit(rest: str) -> str | None:
    for sym in sorted(UNITS, key=len, reverse=True):
        if rest.endswith(sym) and rest[: len(rest) - len(sym)] in PREFIXES:
            return UNITS[sym]
    return None
