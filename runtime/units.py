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

#: SI prefix -> power of ten (the prefix is applied by shifting the decimal exponent, so
#: "50 us" reads as exactly the double nearest 5e-5, as the literal 5e-5 does; multiplying
#: 50 * 1e-6 would round twice and give 4.9999999999999996e-05)
PREFIX_EXPONENTS = {
    "p": -12, "n": -9, "u": -6, "\u00b5": -6, "\u03bc": -6, "m": -3,
    "": 0, "k": 3, "M": 6, "G": 9,
}
PREFIXES = {k: float(f"1e{e}") for k, e in PREFIX_EXPONENTS.items()}

#: unit symbols hilrig understands, with accepted spellings -> canonical symbol
UNITS = {
    "V": "V", "A": "A", "W": "W", "ohm": "ohm", "Ohm": "ohm", "\u03a9": "ohm", "S": "S",
    "H": "H", "F": "F", "s": "s", "Hz": "Hz", "rad/s": "rad/s", "V/s": "V/s",
    "Ah": "Ah", "A h": "Ah", "-": "-", "V/A": "V/A", "A/V": "A/V",
    "V/(A s)": "V/(A s)", "A/(V s)": "A/(V s)", "1/s": "1/s",
}

_MANTISSA = r"[-+]?(?:\d+\.?\d*|\.\d+)"
_RE = re.compile(rf"^\s*({_MANTISSA})(?:[eE]([-+]?\d+))?\s*(.*?)\s*$")


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
        mantissa, exp_txt, rest = m.group(1), m.group(2) or "0", m.group(3)
        if rest[:1] in (",", "."):
            # "1,5 V" (a decimal comma) or "1.2.3 V": no unit starts with these
            raise UnitError(f"{where} = {text!r} is not a quantity; write e.g. "
                            f"'12.5 {_example(unit)}' (one decimal point, no comma)")
        # int() refuses thousands of digits; any exponent this long over- or underflows anyway
        if len(exp_txt.lstrip("+-").lstrip("0")) <= 6:
            exponent = int(exp_txt)
        else:
            exponent = -10**7 if exp_txt.startswith("-") else 10**7
        if rest:
            exponent += _prefix_exponent(rest, unit, where, text)
        # one decimal-to-binary conversion: correctly rounded, like a literal in the source
        value = float(f"{mantissa}e{exponent}")
    else:
        raise UnitError(f"{where} = {text!r} is a {type(text).__name__}; expected a number in {unit}")
    if not math.isfinite(value):
        raise UnitError(f"{where} = {text!r} is not finite; expected a finite number in {unit}")
    return value


def _example(unit: str) -> str:
    return unit if unit != "-" else ""


def _prefix_exponent(rest: str, unit: str, where: str, text: str) -> int:
    if rest in UNITS and UNITS[rest] == unit:
        return 0
    # longest symbol first, so "mohm" is milli-ohm and "ms" is milliseconds, not mega-...
    for sym in sorted(UNITS, key=len, reverse=True):
        if rest.endswith(sym):
            prefix = rest[: len(rest) - len(sym)]
            if prefix in PREFIXES and UNITS[sym] == unit and unit not in ("-",):
                return PREFIX_EXPONENTS[prefix]
    got = _guess_unit(rest)
    # "(that reads as A)" after "has unit 'A'" would only repeat it
    hint = f" (that reads as {got})" if got and got != rest else ""
    raise UnitError(
        f"{where} = {text!r} has unit {rest!r}{hint}; expected {unit}"
        f"{' with an optional SI prefix (p n u m k M G)' if unit != '-' else ' (dimensionless)'}")


def _guess_unit(rest: str) -> str | None:
    for sym in sorted(UNITS, key=len, reverse=True):
        if rest.endswith(sym) and rest[: len(rest) - len(sym)] in PREFIXES:
            return UNITS[sym]
    return None
