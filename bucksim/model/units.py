"""Quantities with SI prefixes: read ``"2.2 uH"``, write ``2.2e-6`` back.

A quantity in a scenario file is either a plain number in SI base units or a
string holding a number, optional spaces, an optional SI prefix and the unit
the key expects: ``"2.2 uH"``, ``"500 kHz"``, ``"20 ns"``, ``"4.7mF"``,
``"10 mohm"``. The unit is checked, so ``"2.2 uF"`` given for an inductance is
an error rather than a silently wrong number.

Prefixes: ``f p n u µ m k M G`` (and none); ``c`` is also accepted for powers
of the metre (``"1.5 cm^3"``). For a unit raised to a power the prefix is
raised with it, as in ordinary use: ``1 mm^2 = 1e-6 m^2``.
"""

from __future__ import annotations

import math
import numbers
import re
from decimal import Decimal, InvalidOperation

from bucksim.errors import ScenarioError

#: SI prefix -> power of ten. Both the micro sign (U+00B5) and the Greek
#: small mu (U+03BC) are accepted besides the ASCII ``u``.
PREFIXES = {
    "f": -15, "p": -12, "n": -9, "u": -6, "\u00b5": -6, "\u03bc": -6,
    "m": -3, "": 0, "k": 3, "M": 6, "G": 9,
}
# Prefixes used when writing, smallest to largest (ASCII micro for terminals).
_WRITE_PREFIXES = (("f", -15), ("p", -12), ("n", -9), ("u", -6), ("m", -3),
                   ("", 0), ("k", 3), ("M", 6), ("G", 9))
# Length prefixes for areas and volumes, largest to smallest.
_LENGTH_PREFIXES = (("", 0), ("c", -2), ("m", -3), ("u", -6))

_SUPERSCRIPTS = {"2": "\u00b2", "3": "\u00b3"}
# Both the Greek capital omega (U+03A9) and the ohm sign (U+2126) are in use.
_OHM_SPELLINGS = ("ohm", "Ohm", "\u03a9", "\u2126")

_NUMBER = re.compile(
    r"\s*(?P<number>[+-]?(?:(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?|inf(?:inity)?))"
    r"\s*(?P<suffix>.*?)\s*$")

_EXAMPLES = {
    "H": "2.2 uH", "Hz": "500 kHz", "s": "20 ns", "F": "100 uF", "ohm": "10 mohm",
    "V": "1.2 V", "A": "0.5 A", "C": "3 nC", "m^3": "1.5 cm^3", "m^2": "50 mm^2",
    "W/m^3": "1.2 kW/m^3", "V/s": "50 kV/s",
}


def example(unit):
    """A sample quantity string in ``unit``, for error messages."""
    return _EXAMPLES.get(unit, f"1.5 k{unit}")


def _power_of(unit):
    """Split ``"m^3"`` into ``("m", 3)``; other units are ``(unit, 1)``."""
    m = re.fullmatch(r"([A-Za-z]+)\^(\d+)", unit)
    return (m.group(1), int(m.group(2))) if m else (unit, 1)


def _spellings(unit):
    """The ways ``unit`` may be written after its prefix."""
    if unit == "ohm":
        return _OHM_SPELLINGS
    base, power = _power_of(unit)
    if power != 1 and str(power) in _SUPERSCRIPTS:
        return (unit, base + _SUPERSCRIPTS[str(power)])
    return (unit,)


def _prefix_exponent(suffix, unit):
    """Power of ten that ``suffix`` (prefix + unit) scales the number by.

    Returns ``None`` when ``suffix`` is not ``unit`` with a known prefix.
    """
    if not unit:
        return None  # a dimensionless number takes no prefix
    base, power = _power_of(unit)
    prefixes = dict(PREFIXES)
    if base == "m" and power != 1:
        prefixes["c"] = -2
    for spelling in _spellings(unit):
        if suffix == spelling:
            return 0
        if suffix.endswith(spelling):
            prefix = suffix[: -len(spelling)]
            if prefix in prefixes:
                return prefixes[prefix] * power
    return None


def _rejected(key, unit, value):
    if unit:
        expected = (f"must be a quantity in {unit} (a number, or a string such as "
                    f"{example(unit)!r})")
    else:
        expected = "must be a plain number"
    return ScenarioError(key, expected, value)


def parse_quantity(value, unit, key="value"):
    """Read a quantity given as a number in SI base units or a prefixed string.

    Parameters
    ----------
    value : int, float or str
        A plain number (taken as SI base units) or a string such as
        ``"2.2 uH"``: a number, optional spaces, an optional SI prefix and the
        unit. A string holding only a number is taken as SI base units.
        ``inf`` is accepted (``"inf"``, ``"inf ohm"``); the caller's own
        validation decides whether it makes sense.
    unit : str
        The unit the key expects, e.g. ``"H"``, ``"Hz"``, ``"ohm"`` (also
        written ``"Ω"``), ``"m^3"``; ``""`` for a dimensionless number.
    key : str
        Dotted scenario key, used in the error message.

    Returns
    -------
    float
        The value in SI base units, correctly rounded from the decimal text
        (``"2.2 uH"`` gives exactly the float ``2.2e-6``).

    Raises
    ------
    ScenarioError
        When ``value`` is not a number nor a string in ``unit`` (wrong unit,
        unknown prefix, garbage, a boolean).
    """
    if isinstance(value, bool):
        raise _rejected(key, unit, value)
    if isinstance(value, numbers.Real):
        try:
            return float(value)
        except OverflowError:
            raise _rejected(key, unit, value) from None
    if not isinstance(value, str):
        raise _rejected(key, unit, value)
    m = _NUMBER.fullmatch(value)
    if m is None:
        raise _rejected(key, unit, value)
    suffix = m.group("suffix")
    exponent = _prefix_exponent(suffix, unit) if suffix else 0
    if exponent is None:
        raise _rejected(key, unit, value)
    try:
        number = Decimal(m.group("number"))
    except InvalidOperation:  # pragma: no cover - the pattern admits only valid numbers
        raise _rejected(key, unit, value) from None
    result = float(number.scaleb(exponent))
    if math.isinf(result) and number.is_finite():
        raise _rejected(key, unit, value)  # overflowed the float range
    return result


def format_si(value, unit="", digits=4):
    """Write ``value`` [SI base units] with an SI prefix, e.g. ``"2.2 uH"``.

    Parameters
    ----------
    value : float
        Value in SI base units.
    unit : str
        Unit symbol appended after the prefix (``"H"``, ``"ohm"``, ``"m^3"``).
        An empty unit gives the plain number without a prefix.
    digits : int
        Significant digits kept.

    Returns
    -------
    str
        ``"<mantissa> <prefix><unit>"`` with ``1 <= |mantissa| < 1000`` where a
        prefix allows it; :func:`parse_quantity` reads it back.
    """
    v = float(value)
    if not unit:
        return f"{v:.{digits}g}"
    if not math.isfinite(v):
        return f"{v} {unit}"
    if v == 0.0:
        return f"0 {unit}"
    base, power = _power_of(unit)
    if power != 1 and base == "m":
        for prefix, exp in _LENGTH_PREFIXES:
            scale = exp * power
            if abs(v) >= 10.0 ** scale or prefix == _LENGTH_PREFIXES[-1][0]:
                mantissa = float(f"{v / 10.0 ** scale:.{digits}g}")
                return f"{mantissa:.{digits}g} {prefix}{unit}"
    lowest, highest = _WRITE_PREFIXES[0][1], _WRITE_PREFIXES[-1][1]
    exp = min(max(3 * math.floor(math.log10(abs(v)) / 3), lowest), highest)
    mantissa = float(f"{v / 10.0 ** exp:.{digits}g}")
    if abs(mantissa) >= 1000 and exp < highest:  # rounding carried into the next prefix
        exp += 3
        mantissa = float(f"{v / 10.0 ** exp:.{digits}g}")
    prefix = dict((e, p) for p, e in _WRITE_PREFIXES)[exp]
    return f"{mantissa:.{digits}g} {prefix}{unit}"
