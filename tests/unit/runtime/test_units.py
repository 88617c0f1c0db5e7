"""Quantity strings -> SI values: prefixes, unit spellings, and the messages for bad input.

The prefix factors are checked against the SI prefix table, not against the parser's own table,
and the decimal conversions against Python's float literals (correctly rounded, IEEE 754).
"""
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hilrig.runtime.errors import UnitError
from hilrig.runtime.units import UNITS, parse_quantity

#: SI prefixes used by hilrig and their powers of ten: BIPM, The International System of Units
#: (SI Brochure), 9th ed., 2019, sec. 3, Table 7 (from memory). "u" is the usual ASCII stand-in
#: for the micro sign (common practice, no source); the micro sign U+00B5 and the Greek small
#: letter mu U+03BC are both typed for it.
SI_PREFIX_EXPONENT = {
    "p": -12, "n": -9, "u": -6, "\u00b5": -6, "\u03bc": -6, "m": -3, "k": 3, "M": 6, "G": 9,
}


def expect_unit_error(text, unit, *fragments, where="value"):
    """Parse ``text``; it must raise exactly UnitError (a ValueError) naming every fragment."""
    with pytest.raises(UnitError) as info:
        parse_quantity(text, unit, where=where)
    assert type(info.value) is UnitError and isinstance(info.value, ValueError)
    msg = str(info.value)
    for frag in fragments:
        assert frag in msg, f"{frag!r} missing from {msg!r}"
    return msg


@pytest.mark.parametrize("prefix, exponent", sorted(SI_PREFIX_EXPONENT.items()))
def test_every_si_prefix_scales_by_its_power_of_ten(prefix, exponent):
    # 2.5 x 10^e is exactly what the literal f"2.5e{e}" denotes; Python's float() rounds a
    # decimal literal correctly (IEEE 754-2019, 5.12.2, from memory), so the parse must equal it
    assert parse_quantity(f"2.5 {prefix}V", "V") == float(f"2.5e{exponent}")
    assert parse_quantity(f"-40 {prefix}W", "W") == float(f"-40e{exponent}")


@pytest.mark.parametrize("spelling, canonical", sorted(UNITS.items()))
def test_every_unit_spelling_reads_as_its_canonical_unit(spelling, canonical):
    assert parse_quantity(f"7 {spelling}", canonical) == 7.0
    if not spelling[0].isdigit():  # "71/s" would read as 71 with unit "/s"
        assert parse_quantity(f"7{spelling}", canonical) == 7.0  # no space needed
    if canonical != "-":
        # kilo = 10^3 (SI Brochure, 9th ed., Table 7, from memory)
        assert parse_quantity(f"7 k{spelling}", canonical) == 7000.0


@pytest.mark.parametrize("text, unit, expected", [
    ("5 mohm", "ohm", 5e-3),      # milli-ohm
    ("2 Mohm", "ohm", 2e6),
    ("3 ms", "s", 3e-3),          # milliseconds, not mega-siemens
    ("3 mS", "S", 3e-3),          # millisiemens
    ("1.5 MW", "W", 1.5e6),       # megawatt
    ("1.5 mW", "W", 1.5e-3),      # milliwatt
    ("2 kOhm", "ohm", 2e3),
    ("2 k\u03a9", "ohm", 2e3),
    ("60 mAh", "Ah", 60e-3),
    ("7.5 krad/s", "rad/s", 7.5e3),
    ("200 kV/s", "V/s", 2e5),
    ("1 GHz", "Hz", 1e9),
    ("33 pF", "F", 33e-12),
    ("1e-3 ms", "s", 1e-6),       # exponent and prefix together
    ("-.5 uH", "H", -0.5e-6),
])
def test_prefix_and_unit_that_look_alike(text, unit, expected):
    # every expected value is a literal: the SI value the text names (SI Brochure, 9th ed.,
    # Table 7, from memory)
    assert parse_quantity(text, unit) == expected


@pytest.mark.parametrize("text, unit, expected", [
    ("200 uH", "H", 2e-4), ("50 us", "s", 5e-5), ("220 uF", "F", 2.2e-4), ("680 uF", "F", 6.8e-4),
    ("7 nH", "H", 7e-9), ("60 kW", "W", 6e4),
])
def test_prefixed_values_equal_the_float_literal_exactly(text, unit, expected):
    # "50 us" must be the same double as the literal 5e-5 (the nearest double to 5 x 10^-5,
    # IEEE 754-2019, 5.12.2, from memory). Multiplying 50 * 1e-6 rounds twice and misses by an ulp,
    # which made Ts and hence every tick time differ from the number the user wrote.
    assert parse_quantity(text, unit) == expected


@pytest.mark.parametrize("value", [400, 400.0, -3.25, 0, "400", "  400  ", "4e2", "+400."])
def test_bare_numbers_are_si(value):
    got = parse_quantity(value, "V")
    assert type(got) is float
    assert got == float(value)


def test_dimensionless_takes_a_number_or_a_dash_and_no_prefix():
    assert parse_quantity("0.8", "-") == 0.8
    assert parse_quantity("0.8 -", "-") == 0.8
    expect_unit_error("5 k", "-", "'5 k'", "dimensionless")
    expect_unit_error("80 %", "-", "'%'", "dimensionless")


@pytest.mark.parametrize("text, unit, fragments", [
    ("150 uF", "H", ("'150 uF'", "'uF'", "(that reads as F)", "expected H")),
    ("5 V", "A", ("'5 V'", "'V'", "expected A")),
    ("3 kHz", "H", ("'kHz'", "(that reads as Hz)", "expected H")),
    ("200 kV/s", "V", ("'kV/s'", "(that reads as V/s)", "expected V")),
    ("5 mAh", "A", ("'mAh'", "(that reads as Ah)", "expected A")),
    ("5 parsec", "s", ("'parsec'", "expected s")),
])
def test_wrong_unit_names_the_unit_given_and_the_unit_expected(text, unit, fragments):
    msg = expect_unit_error(text, unit, "plant.L1", *fragments, where="plant.L1")
    assert "optional SI prefix" in msg


def test_wrong_unit_does_not_repeat_itself():
    msg = expect_unit_error("480 A", "V", "'480 A'", "expected V")
    assert "reads as" not in msg  # "has unit 'A' (that reads as A)" says nothing new


@pytest.mark.parametrize("text", ["fast", "", "   ", "V 5", "1.2.3 V", "--1 V", "1,5 V", "nan V",
                                  "inf", "five volts"])
def test_garbage_is_not_a_quantity(text):
    expect_unit_error(text, "V", repr(text), "not a quantity", "e.g. '12.5 V'")


def test_hex_is_not_a_number():
    # the number is read as decimal "0"; the rest is no unit
    expect_unit_error("0x10 V", "V", "'0x10 V'", "'x10 V'", "expected V")


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf, "1e999 V", "-1e400 kV"])
def test_non_finite_values_are_refused(value):
    expect_unit_error(value, "V", "not finite", "finite number in V")


def test_absurd_exponent_is_refused_not_crashed():
    # thousands of exponent digits: int() would refuse them (CPython's int max-str-digits limit)
    expect_unit_error("1e" + "9" * 5000 + " V", "V", "not finite")
    assert parse_quantity("1e-" + "9" * 5000 + " V", "V") == 0.0


@pytest.mark.parametrize("value", [True, False])
def test_booleans_are_not_numbers(value):
    # bool is a subclass of int in Python; TOML 'true' must not read as 1 V
    expect_unit_error(value, "V", "boolean", "number in V")


@pytest.mark.parametrize("value", [None, [1.0], {"v": 1}])
def test_other_types_are_refused(value):
    expect_unit_error(value, "V", type(value).__name__, "number in V")


# Property: a prefix only shifts the decimal point. The value is compared with x * 10^e from the
# SI prefix table (SI Brochure, 9th ed., Table 7, from memory), within 2 ulp: x * float(10^e)
# rounds twice (<= ~1 ulp), the parser rounds once (<= 0.5 ulp). Magnitudes stay in the normal
# range so that "ulp" keeps its relative meaning.
_finite = st.floats(min_value=-1e290, max_value=1e290, allow_nan=False, allow_infinity=False,
                    allow_subnormal=False).filter(lambda x: x == 0.0 or abs(x) >= 1e-290)


@settings(max_examples=200, deadline=None)
@given(x=_finite, prefix=st.sampled_from(sorted(SI_PREFIX_EXPONENT)),
       unit=st.sampled_from(sorted(u for u in set(UNITS.values()) if u != "-")))
def test_prefix_scaling_property(x, prefix, unit):
    expected = x * 10.0 ** SI_PREFIX_EXPONENT[prefix]
    got = parse_quantity(f"{x!r} {prefix}{unit}", unit)
    assert abs(got - expected) <= 2 * math.ulp(expected)
    assert math.copysign(1.0, got) == math.copysign(1.0, x)  # -0.0 stays -0.0
