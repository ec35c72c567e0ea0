"""Quantities in protocol and rig files: a strict number-plus-unit grammar, then pint.

Every physical value in a protocol or rig file is written as a number followed by a unit,
for example ``"1 kV"``, ``"5 V/s"``, ``"2 V/um"``, ``"10 uA"``, ``"1 h"``, ``"500 um"``,
``"10 Mohm"``, ``"5e-5 Pa"``. The text is first matched against a small grammar (below) so
that pint's own string parser, which evaluates arithmetic and powers, never sees anything
but a plain unit expression. Then pint converts it to an SI float in the unit the caller
expects, after a dimension check. pint is used only here, at parse and print time; the rest
of fieldrun works on SI floats.

Grammar (whitespace between number and unit optional)::

    quantity := number unit?
    number   := [+-]? ( digits [. digits?] | . digits ) ( [eE] [+-]? digits )?
    unit     := "%" | ("1" | term) ( ("/" | "*" | "·") term )*
    term     := letters ( "^" [-]? digit )?          e.g. V, kV, um, µm, MΩ, m^2

A bare number is accepted only where the expected quantity is dimensionless; there ``"5 %"``
means 0.05. NaN and infinity are refused (the grammar has no word for them), and so are
magnitudes no cold-cathode bench uses (above 1 MV, for instance), with a hint at the likely
slip (``MV`` written for ``mV``, ``kV`` for ``V``).
"""
from __future__ import annotations

import math
import re
from decimal import Decimal
from dataclasses import dataclass
from typing import Optional

# The expected units fieldrun asks for, by the SI unit its floats are kept in. The values
# are what a user would recognise in an error message.
UNIT_WORDS = {
    "V": "a voltage",
    "V/s": "a voltage rate",
    "V/m": "a field",
    "A": "a current",
    "s": "a duration",
    "m": "a length",
    "Pa": "a pressure",
    "ohm": "a resistance",
    "W": "a power",
    "1/s": "a rate per second",
    "": "a plain number",
}

# An example of each, used in hints.
UNIT_EXAMPLES = {
    "V": '"600 V" or "1.2 kV"',
    "V/s": '"5 V/s"',
    "V/m": '"2 V/um"',
    "A": '"10 uA" or "500 nA"',
    "s": '"30 s", "10 min" or "1 h"',
    "m": '"500 um"',
    "Pa": '"5e-5 Pa" or "1e-6 mbar"',
    "ohm": '"10 Mohm"',
    "W": '"0.5 W"',
    "1/s": '"0.01 1/s" or "1 %/s"',
    "": '"5" or "5 %"',
}

# Magnitudes above these are refused as absurd for this work (common practice, no
# source: bench field emission runs at volts to tens of kilovolts, nA to mA, gaps of
# micrometres to centimetres, high vacuum to atmosphere).
ABSURD_ABOVE = {
    "V": (1e6, "MV where mV? kV where V?"),
    "V/s": (1e5, "kV/s where V/s?"),
    "V/m": (1e11, "that is above 100 V/nm; V/um where V/nm? V/m where V/um?"),
    "A": (10.0, "A where uA? mA where uA?"),
    "s": (90 * 86400.0, "more than 90 days; d where h? h where min?"),
    "m": (1.0, "more than a metre; m where mm or um?"),
    "Pa": (2e5, "more than twice atmospheric; Pa where mPa?"),
    "ohm": (1e15, "Tohm where Gohm?"),
    "W": (1e5, "kW where W?"),
    "1/s": (1e3, "check the unit"),
    "": (1e9, "check the value"),
}

# Units written with a mega prefix that no bench of this kind uses: almost always a slip
# for the milli prefix. ``MV`` is refused outright whatever the number.
_SUSPECT_MEGA = {"MV": "mV (millivolts) or kV", "MA": "mA (milliamperes)",
                 "MV/s": "mV/s or kV/s", "MW": "mW (milliwatts) or W"}

_NUMBER = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_ATOM = r"[A-Za-zµμΩ]+"
_TERM = rf"{_ATOM}(?:\^-?\d)?"
_UNIT = rf"(?:(?:%|1|{_TERM})(?:\s*[/*·]\s*(?:{_TERM}|%))*)"
_QUANTITY_RE = re.compile(rf"^\s*(?P<num>{_NUMBER})\s*(?P<unit>{_UNIT})?\s*$")
_SEXAGESIMAL_RE = re.compile(r"^\s*[+-]?\d+(?::[0-5]?\d)+(?:\.\d*)?\s*$")
_NAN_INF_RE = re.compile(r"^\s*[+-]?\.?(nan|inf|infinity)\b", re.IGNORECASE)

# Unit words accepted (before pint sees them): SI prefixes on the units this work uses,
# and a few unprefixed ones. Anything else (furlongs, inches, hectares) is refused, so a
# slip cannot land on an exotic unit pint happens to know.
_PREFIXABLE = ("V", "A", "s", "m", "Pa", "ohm", "Ω", "W", "Hz")
_PREFIX_LETTERS = ("", "G", "M", "k", "m", "u", "µ", "μ", "n", "p", "f")
_PLAIN_UNITS = ("min", "h", "d", "mbar", "bar", "torr", "Torr", "percent")
ALLOWED_UNIT_WORDS = frozenset(
    [p + u for p in _PREFIX_LETTERS for u in _PREFIXABLE] + list(_PLAIN_UNITS))
_WORD_RE = re.compile(r"[A-Za-zµμΩ]+")

_REGISTRY = None


def registry():
    """The one pint UnitRegistry of fieldrun, created on first use."""
    global _REGISTRY
    if _REGISTRY is None:
        import pint
        _REGISTRY = pint.UnitRegistry(autoconvert_offset_to_baseunit=False)
    return _REGISTRY


class QuantityError(ValueError):
    """A quantity string is malformed, of the wrong dimension, or absurd. ``message`` says
    what is wrong and ``hint`` how to write it."""

    def __init__(self, message: str, hint: str = ""):
        super().__init__(message)
        self.message = message
        self.hint = hint


@dataclass(frozen=True)
class Quantity:
    """A parsed quantity: its SI value in ``unit`` and the text it came from."""
    value: float
    unit: str
    text: str


def _normalise_unit(unit: str) -> str:
    u = unit.strip().replace("·", "*").replace("μ", "µ")
    u = u.replace("%", "percent").replace("Torr", "torr")
    return u


def _dimension_of(unit: str):
    reg = registry()
    if unit == "":
        return reg.dimensionless.dimensionality
    return reg.parse_units(unit).dimensionality


def parse_quantity(text, unit: str, *, alternatives: tuple = ()) -> Quantity:
    """Parse ``text`` into an SI float in ``unit`` (one of ``UNIT_WORDS``).

    ``alternatives`` are further SI units the value may have instead (for example a voltage
    key that also takes a field: ``parse_quantity(t, "V", alternatives=("V/m",))``); the
    returned ``Quantity.unit`` says which one matched. Raises ``QuantityError``.
    """
    expected = (unit,) + tuple(alternatives)
    want = " or ".join(UNIT_WORDS.get(u, u) for u in expected)
    example = " or ".join(UNIT_EXAMPLES.get(u, u) for u in expected)
    if isinstance(text, bool) or text is None:
        raise QuantityError(f"expected {want}, got {text!r}", f"write it as {example}")
    if isinstance(text, (int, float)):
        text = repr(text)
    if not isinstance(text, str):
        raise QuantityError(f"expected {want}, got a {type(text).__name__}",
                            f"write it as {example}")
    shown = text.strip()
    if len(shown) > 64:
        raise QuantityError(f"quantity {shown[:40]!r}... is too long", f"write it as {example}")
    if _NAN_INF_RE.match(shown):
        raise QuantityError(f"{shown!r} is not a finite number",
                            "NaN and infinity are never valid settings")
    if _SEXAGESIMAL_RE.match(shown):
        raise QuantityError(f"{shown!r} looks like a clock time; YAML 1.1 would read it as a "
                            "base-60 number", f"write it as {example}")
    m = _QUANTITY_RE.match(text)
    if not m:
        if re.search(r"[()+\-*/^]\s*\d|\d\s*[+*/^(]|\*\*", shown):
            raise QuantityError(f"{shown!r} is not a number followed by a unit "
                                "(arithmetic and powers are not allowed)",
                                f"write the result, e.g. {example}")
        raise QuantityError(f"{shown!r} is not a number followed by a unit",
                            f"write it as {example}")
    try:
        number = float(m.group("num"))
    except ValueError:  # pragma: no cover - the grammar admits only floats
        raise QuantityError(f"{shown!r} is not a number followed by a unit",
                            f"write it as {example}") from None
    if not math.isfinite(number):
        raise QuantityError(f"{shown!r} is not a finite number",
                            "the number is too large to represent")
    unit_text = (m.group("unit") or "").strip()
    if unit_text.startswith("1") and m.start("unit") == m.end("num"):
        raise QuantityError(f"{shown!r}: put a space between the number and a unit starting "
                            "with 1", f"write it as {example}")
    if not unit_text and "" not in expected:
        raise QuantityError(f"{shown!r} has no unit; expected {want}", f"write it as {example}")
    compact = unit_text.replace(" ", "")
    if compact in _SUSPECT_MEGA:
        raise QuantityError(f"{shown!r}: {compact} means mega; no bench of this kind runs at "
                            "mega scale", f"did you mean {_SUSPECT_MEGA[compact]}?")
    for word in _WORD_RE.findall(unit_text):
        if word not in ALLOWED_UNIT_WORDS:
            raise QuantityError(f"{shown!r}: unknown unit {word!r}", f"write it as {example}")
    reg = registry()
    try:
        if unit_text:
            parsed_unit = reg.parse_units(_normalise_unit(unit_text))
            q = reg.Quantity(number, parsed_unit)
        else:
            q = reg.Quantity(number, reg.dimensionless)
    except Exception as exc:  # pint raises several types for unknown units
        name = getattr(exc, "unit_names", None) or unit_text
        raise QuantityError(f"{shown!r}: unknown unit {name!r}" if isinstance(name, str)
                            else f"{shown!r}: unknown unit {', '.join(name)!r}",
                            f"write it as {example}") from None
    for u in expected:
        try:
            target = reg.dimensionless if u == "" else reg.parse_units(u)
            if q.dimensionality != _dimension_of(u):
                continue
            # the unit's factor from pint, the number kept as written: "10 uA" is exactly
            # the float nearest 1e-5, not 10 * 1e-6 rounded twice
            factor = float(reg.Quantity(1.0, q.units).to(target).magnitude)
            value = float(Decimal(m.group("num")) * Decimal(repr(factor)))
        except Exception:  # pint DimensionalityError, offset units
            continue
        if not math.isfinite(value):
            raise QuantityError(f"{shown!r} is not a finite number", "")
        limit, slip = ABSURD_ABOVE.get(u, (math.inf, ""))
        if abs(value) > limit:
            raise QuantityError(f"{shown!r} is an absurd magnitude for {UNIT_WORDS.get(u, u)} "
                                f"(above {format_si(limit, u)})", slip)
        return Quantity(value, u, shown)
    got = "no unit" if not unit_text else f"unit {unit_text!r}"
    raise QuantityError(f"{shown!r} has the wrong dimension ({got}); expected {want}",
                        f"write it as {example}")


def parse_value(text, unit: str) -> float:
    """Shorthand: the SI float of ``text`` in ``unit`` (raises ``QuantityError``)."""
    return parse_quantity(text, unit).value


_PREFIXES = [(1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "u"),
             (1e-9, "n"), (1e-12, "p"), (1e-15, "f")]


def format_si(value: Optional[float], unit: str, digits: int = 4) -> str:
    """Print an SI float with an engineering prefix: ``format_si(2.5e-5, "A") == "25 uA"``.
    Seconds are printed plainly (see ``format_duration`` for h:mm:ss)."""
    if value is None:
        return "-"
    if not math.isfinite(value):
        return f"{value} {unit}".strip()
    if unit in ("", "1/s", "V/s", "V/m", "Pa") or value == 0:
        if unit == "V/m" and value != 0:
            return f"{value / 1e6:.{digits}g} V/um"
        if unit == "Pa" and value != 0 and abs(value) < 0.01:
            return f"{value:.{max(digits - 2, 1)}e} Pa"
        return f"{value:.{digits}g} {unit}".strip()
    a = abs(value)
    for scale, prefix in _PREFIXES:
        if a >= scale * 0.9995:
            return f"{value / scale:.{digits}g} {prefix}{unit}"
    return f"{value:.{digits}g} {unit}"


def format_duration(seconds: float) -> str:
    """``h:mm:ss`` (fractions of a second rounded)."""
    if seconds is None or not math.isfinite(seconds):
        return "-"
    s = int(round(seconds))
    return f"{s // 3600}:{(s % 3600) // 60:02d}:{s % 60:02d}"
