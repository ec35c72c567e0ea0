"""The quantity grammar and unit conversion.

Prefix factors: BIPM SI Brochure, 9th edition (2019), table 7 (G 1e9, M 1e6, k 1e3, m 1e-3,
u/µ 1e-6, n 1e-9, p 1e-12). mbar = 100 Pa: BIPM SI Brochure table 8 (bar = 1e5 Pa).
Hour 3600 s, minute 60 s, day 86400 s: SI Brochure table 8. 1 Torr = 101325/760 Pa by
definition (from memory).
"""
import math

import pytest

from sequencer.quantities import QuantityError, format_duration, format_si, parse_quantity


@pytest.mark.parametrize("text,unit,si", [
    ("1 kV", "V", 1e3), ("600 V", "V", 600.0), ("5 V/s", "V/s", 5.0),
    ("2 V/um", "V/m", 2e6), ("2 V/µm", "V/m", 2e6), ("2 V/μm", "V/m", 2e6),
    ("10 uA", "A", 1e-5), ("500 nA", "A", 5e-7), ("3 pA", "A", 3e-12),
    ("1 h", "s", 3600.0), ("10 min", "s", 600.0), ("2 d", "s", 172800.0),
    ("500 um", "m", 5e-4), ("500 µm", "m", 5e-4), ("1 mm", "m", 1e-3),
    ("10 Mohm", "ohm", 1e7), ("10 MΩ", "ohm", 1e7), ("1 Gohm", "ohm", 1e9),
    ("5e-5 Pa", "Pa", 5e-5), ("1e-6 mbar", "Pa", 1e-4),
    ("0.5 W", "W", 0.5), ("1 %/s", "1/s", 0.01), ("0.01 1/s", "1/s", 0.01),
    ("5 %", "", 0.05), ("1e-6 Torr", "Pa", 1e-6 * 101325 / 760), ("3", "", 3.0), ("+2.5e3 V", "V", 2500.0), (".5 s", "s", 0.5),
    ("600V", "V", 600.0),
])
def test_valid_quantities_in_si(text, unit, si):
    q = parse_quantity(text, unit)
    assert q.value == pytest.approx(si, rel=1e-12)
    assert q.unit == unit


def test_decimal_text_converts_without_double_rounding():
    # "10 uA" is the float nearest 1e-5 exactly (so hand-computed tests compare with ==)
    assert parse_quantity("10 uA", "A").value == 1e-5
    assert parse_quantity("0.3 uA", "A").value == 3e-7


def test_a_voltage_key_may_take_a_field():
    q = parse_quantity("1.4 V/um", "V", alternatives=("V/m",))
    assert q.unit == "V/m" and q.value == pytest.approx(1.4e6)


@pytest.mark.parametrize("text,unit,words", [
    ("600", "V", "no unit"),                        # bare number where a unit is needed
    ("5 V", "V/s", "wrong dimension"),
    ("2 MV", "V", "mega"),                          # MV where mV
    ("0.1 MA", "A", "mega"),
    ("2000 kV", "V", "absurd"),                     # 2 MV: above 1 MV
    ("20 A", "A", "absurd"),
    ("nan V", "V", "finite"), ("inf V", "V", "finite"), ("-inf s", "s", "finite"),
    ("1e999 V", "V", "finite"),
    ("1+1 kV", "V", "arithmetic"), ("2*3 V", "V", "arithmetic"),
    ("10**3 V", "V", "arithmetic"), ("(2) V", "V", "number followed by a unit"),
    ("1:30", "s", "base-60"),
    ("11/s", "1/s", "space"),                       # would otherwise read as 1 x (1/s)
    ("5 furlongs", "m", "unknown unit"),
    ("ten V", "V", "number followed by a unit"),
    ("", "V", "number followed by a unit"),
    ("5 V^2", "V", "wrong dimension"),
    ("1" * 70 + " V", "V", "too long"),
    ("5 in", "m", "unknown unit"),                  # inches: pint knows them, we do not
])
def test_invalid_quantities_are_refused_with_a_reason(text, unit, words):
    with pytest.raises(QuantityError) as exc:
        parse_quantity(text, unit)
    assert words in exc.value.message
    assert exc.value.hint is not None


def test_non_strings_are_refused():
    for v in (True, None, [1], {"a": 1}):
        with pytest.raises(QuantityError):
            parse_quantity(v, "V")


def test_printing():
    assert format_si(2.5e-5, "A") == "25 uA"
    assert format_si(1500.0, "V") == "1.5 kV"
    assert format_si(2e6, "V/m") == "2 V/um"
    assert format_duration(4680) == "1:18:00"
    assert format_duration(math.nan) == "-"
