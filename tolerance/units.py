"""Physical quantities: parsing, formatting and IEC 60063 preferred number series.

Every value inside the engine is a plain SI float (ohm, volt, ampere, watt, second, hertz,
henry, farad, joule, kelvin per watt, per kelvin, kelvin). This module turns the strings an
engineer writes in a study file ("4k7", "470 nF", "25 degC", "5%") into those floats, turns
floats back into short ASCII labels for reports and plot axes, and provides the E-series of
preferred values used to snap computed resistor and capacitor values to buyable parts.

Unit names accepted by :func:`parse_quantity` and :func:`format_quantity`:

``"ohm" "V" "A" "W" "s" "Hz" "H" "F" "J"``
    Ordinary SI quantities; SI prefixes f p n u (or micro sign) m k M G are accepted.
``"K/W"``
    Thermal resistance.
``"1/K"``
    Temperature coefficient; written as ppm/K, ppm/degC, %/K or 1/K.
``"1"``
    Dimensionless fraction; written as 5%, 200 ppm or 0.05.
``"temperature"``
    Absolute temperature, returned in kelvin; a bare number means degC.
``"K"``
    Temperature difference in kelvin; "10 K" and "10 degC" are both 10.0.
"""

from __future__ import annotations

import math
import numbers
import re

import numpy as np

__all__ = [
    "E_SERIES",
    "UnitError",
    "format_quantity",
    "parse_quantity",
    "parse_series_range",
    "preferred_values",
    "snap",
    "spread_unit",
]


class UnitError(ValueError):
    """A quantity, unit or series could not be understood.

    The message states what was wrong and what was expected; it carries no file or key
    context, which the caller adds.
    """


# ---------------------------------------------------------------------------------------------
# Unit kinds
# ---------------------------------------------------------------------------------------------

# Prefix -> power of ten. Multipliers are kept as exponents so that "470n" is computed as
# 470 / 1e9 (correctly rounded) rather than 470 * 1e-9 (which is off by one ulp).
_PREFIXES: dict[str, int] = {
    "f": -15,
    "p": -12,
    "n": -9,
    "u": -6,
    "\u00b5": -6,  # micro sign
    "\u03bc": -6,  # Greek small letter mu
    "m": -3,
    "k": 3,
    "M": 6,
    "G": 9,
}

# Ordinary SI kinds: unit -> (description, example text, accepted spellings, may be negative).
_SI_KINDS: dict[str, tuple[str, str, tuple[str, ...], bool]] = {
    "ohm": (
        "a resistance",
        "e.g. 4.7 kohm, 4k7 or 330R",
        ("ohm", "Ohm", "ohms", "Ohms", "OHM", "\u03a9", "\u2126", "R"),
        False,
    ),
    "V": ("a voltage", "e.g. 12 V, 3.3 or 500 mV", ("V",), True),
    "A": ("a current", "e.g. 120 mA, 1.5 A or 20m", ("A",), True),
    "W": ("a power", "e.g. 250 mW, 1.5 W or 0.6", ("W",), True),
    "s": ("a time", "e.g. 3.2 us, 10 ms or 1e-3", ("s",), True),
    "Hz": ("a frequency", "e.g. 50 Hz, 20 kHz or 1k", ("Hz",), False),
    "H": ("an inductance", "e.g. 100 mH, 4.7 uH or 10m", ("H",), False),
    "F": ("a capacitance", "e.g. 470 nF, 10 uF or 100p", ("F",), False),
    "J": ("an energy", "e.g. 5 mJ, 1.2 J or 20u", ("J",), True),
}

_OTHER_KINDS: dict[str, tuple[str, str]] = {
    "K/W": ("a thermal resistance", "e.g. 62 K/W or 62 degC/W"),
    "1/K": ("a temperature coefficient", "e.g. 100 ppm/K, -0.3 %/K or 3.9e-3 1/K"),
    "1": ("a fraction", "5% or 0.05"),
    "temperature": ("a temperature", "e.g. 25 degC, -40 degC or 300 K"),
    "K": ("a temperature difference", "e.g. 10 K or 10 degC"),
}

_THERMAL_RES_UNITS = {"": 0, "K/W": 0, "degC/W": 0, "\u00b0C/W": 0}
_TEMPCO_UNITS = {
    "": 0,
    "1/K": 0,
    "/K": 0,
    "ppm/K": -6,
    "ppm/degC": -6,
    "ppm/\u00b0C": -6,
    "%/K": -2,
    "%/degC": -2,
    "%/\u00b0C": -2,
}
_FRACTION_UNITS = {"": 0, "%": -2, "ppm": -6}
_CELSIUS = ("degC", "\u00b0C", "\u2103")

_ZERO_CELSIUS = 273.15  # [K]

_NUMBER_RE = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
# IEC 60062 letter-as-decimal-point codes: 4k7, 4K7, 330R, 1M0, 2R2, 0R1, R47, 2G2.
_RKM_RE = re.compile(r"([+-]?)(\d*)([RkKMG])(\d*)")
_RKM_EXP = {"R": 0, "k": 3, "K": 3, "M": 6, "G": 9}


def _known_unit(unit: str) -> None:
    if unit not in _SI_KINDS and unit not in _OTHER_KINDS:
        known = ", ".join(repr(u) for u in [*_SI_KINDS, *_OTHER_KINDS])
        raise UnitError(f"unknown unit {unit!r}; expected one of {known}")


def _describe(unit: str) -> tuple[str, str]:
    if unit in _SI_KINDS:
        what, example, _, _ = _SI_KINDS[unit]
        return what, example
    return _OTHER_KINDS[unit]


def _reject(value: object, unit: str, why: str = "") -> UnitError:
    what, example = _describe(unit)
    text = value if isinstance(value, str) else str(value)
    msg = f"{text!r} is not {what}; write {example}"
    if why:
        msg = f"{text!r} is not {what} ({why}); write {example}"
    return UnitError(msg)


def _times_ten(number: float, exponent: int) -> float:
    """``number * 10**exponent``, correctly rounded when ``number`` is exact."""
    if exponent >= 0:
        return number * 10.0**exponent
    return number / 10.0**-exponent


def _si_exponent(suffix: str, unit: str) -> int | None:
    """Power of ten for an SI suffix like 'kohm', 'k', 'ohm' or '' (None when not understood)."""
    _, _, spellings, _ = _SI_KINDS[unit]
    prefixes = dict(_PREFIXES)
    if unit == "ohm":
        prefixes["K"] = 3  # "4.7K" and "4.7 KOhm" are common on parts lists
    if suffix == "" or suffix in spellings:
        return 0
    if suffix in prefixes:
        return prefixes[suffix]
    if len(suffix) >= 2 and suffix[0] in prefixes and suffix[1:] in spellings:
        return prefixes[suffix[0]]
    return None


def _split_number(text: str) -> tuple[float, str] | None:
    match = _NUMBER_RE.match(text)
    if match is None:
        return None
    return float(match.group(0)), text[match.end() :].strip()


def _parse_text(text: str, unit: str) -> float:
    stripped = text.strip()
    if not stripped:
        raise _reject(text, unit, "empty")
    if not stripped.isascii():
        # Python's float() reads other scripts' digits ("١٢ V" was 12 V) and their spaces;
        # a quantity is written in ASCII (the micro sign and ohm sign are units, read below)
        digits = [ch for ch in stripped if ch.isdigit() and not ch.isascii()]
        if digits:
            raise _reject(text, unit, f"digits are written 0-9 (found {digits[0]!r})")

    if unit == "ohm":
        rkm = _RKM_RE.fullmatch(stripped)
        if rkm is not None and (rkm.group(2) or rkm.group(4)):
            sign, whole, letter, frac = rkm.groups()
            number = float(f"{sign}{whole or '0'}.{frac or '0'}")
            return _times_ten(number, _RKM_EXP[letter])

    split = _split_number(stripped)
    if split is None:
        raise _reject(text, unit)
    number, suffix = split

    if unit in _SI_KINDS:
        exponent = _si_exponent(suffix, unit)
        if exponent is None:
            raise _reject(text, unit)
        return _times_ten(number, exponent)
    if unit == "K/W":
        table = _THERMAL_RES_UNITS
    elif unit == "1/K":
        table = _TEMPCO_UNITS
    elif unit == "1":
        table = _FRACTION_UNITS
    elif unit == "temperature":
        if suffix == "" or suffix in _CELSIUS:
            return number + _ZERO_CELSIUS
        if suffix == "K":
            return number
        raise _reject(text, unit)
    else:  # "K": temperature difference
        table = {"": 0, "K": 0, **{c: 0 for c in _CELSIUS}}
    if suffix not in table:
        raise _reject(text, unit)
    return _times_ten(number, table[suffix])


def parse_quantity(value: str | int | float, unit: str) -> float:
    """Parse a quantity written by a person into an SI float.

    Parameters
    ----------
    value : str, int or float
        The quantity. Strings may carry an SI prefix and a unit with optional whitespace
        ("4.7 kohm", "470n", "3.3 V"); for resistances IEC 60062 codes are accepted ("4k7",
        "330R", "1M0", "R47"). Plain numbers are taken in the base unit (degC for
        ``unit="temperature"``). Booleans, NaN and infinities are rejected.
    unit : str
        The kind of quantity expected: one of "ohm", "V", "A", "W", "s", "Hz", "H", "F", "J",
        "K/W", "1/K", "1", "temperature", "K" (see the module docstring).

    Returns
    -------
    float
        The value in SI units [ohm, V, A, W, s, Hz, H, F, J, K/W, 1/K, 1, K or K].

    Raises
    ------
    UnitError
        If the value is malformed, carries the wrong unit, is not finite, or is negative for
        a quantity that cannot be (resistance, capacitance, inductance, frequency, thermal
        resistance) or below absolute zero.
    """
    _known_unit(unit)
    if isinstance(value, (bool, np.bool_)):
        raise _reject(value, unit, "a true/false value is not a number")
    if isinstance(value, str):
        result = _parse_text(value, unit)
    elif isinstance(value, numbers.Real):
        result = float(value)
        if unit == "temperature":
            result += _ZERO_CELSIUS
    else:
        raise _reject(value, unit, f"got a {type(value).__name__}")

    if not math.isfinite(result):
        raise _reject(value, unit, "not a finite number")
    nonnegative = (unit in _SI_KINDS and not _SI_KINDS[unit][3]) or unit == "K/W"
    if nonnegative and result < 0:
        raise _reject(value, unit, "it cannot be negative")
    if unit == "temperature" and result < 0:
        raise _reject(value, unit, "below absolute zero")
    return result


# ---------------------------------------------------------------------------------------------
# Formatting
# ---------------------------------------------------------------------------------------------

_DISPLAY_PREFIX = {-15: "f", -12: "p", -9: "n", -6: "u", -3: "m", 0: "", 3: "k", 6: "M", 9: "G"}
_DISPLAY_UNIT = {"ohm": "Ohm"}


def _plain(x: float, digits: int) -> str:
    """``x`` rounded to ``digits`` significant digits in fixed notation, trailing zeros trimmed."""
    if x == 0:
        return "0"
    rounded = float(f"{x:.{digits}g}")
    if rounded == 0:
        return "0"
    # scientific below 1e-4 as printf's %g does, so a fraction of 7e-10 reads "7e-10", not
    # "0.0000000007", and from a million up, so a drive margin of 1.31e10 (a load that never
    # conducts) does not read "13100000000"
    if abs(rounded) < 1e-4 or abs(rounded) >= 1e6:
        return f"{x:.{digits}g}"
    decimals = max(digits - 1 - math.floor(math.log10(abs(rounded))), 0)
    text = f"{rounded:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    if text in ("-0", ""):
        text = "0"
    return text


def spread_unit(unit: str | None) -> str | None:
    """Unit of a difference of two values (absolute temperatures differ in kelvin)."""
    return "K" if unit == "temperature" else unit


def format_ppm(rate) -> str:
    """A rate in parts per million, e.g. ``"184.4"``; ``"-"`` for none.

    One decimal from 1 ppm up; below it three significant digits (``"0.0253"``,
    ``"2.53e-05"``), so a rate or a bound under 0.05 ppm never reads as ``"0.0"``.
    """
    if rate is None:
        return "-"
    rate = float(rate)
    if math.isnan(rate):
        return "nan"
    ppm = 1e6 * rate
    if ppm == 0 or abs(ppm) >= 0.9995:  # (what three digits would round up to 1)
        return f"{ppm:.1f}"
    return f"{ppm:.3g}"


def format_yield(y, decimals: int = 4) -> str:
    """A yield as a percentage, e.g. ``"99.9816"``; ``"-"`` for none.

    ``decimals`` places, more where they would round a yield below 1 up to 100 or one
    above 0 down to 0 (1 failure in 1e7 reads ``"99.99999"``, not ``"100.0000"``).
    """
    if y is None:
        return "-"
    y = float(y)
    if math.isnan(y):
        return "nan"
    text = f"{100.0 * y:.{decimals}f}"
    while decimals < 12 and ((0 < y < 1 and float(text) in (0.0, 100.0))):
        decimals += 1
        text = f"{100.0 * y:.{decimals}f}"
    return text


def format_quantity(x: float, unit: str, digits: int = 3) -> str:
    """Format an SI value in engineering notation with an ASCII unit.

    Parameters
    ----------
    x : float
        The value in SI units [ohm, V, A, W, s, Hz, H, F, J, K/W, 1/K, 1, K or K].
    unit : str
        The kind of quantity, as for :func:`parse_quantity`.
    digits : int, optional
        Significant digits kept (default 3); trailing zeros are trimmed.

    Returns
    -------
    str
        E.g. "4.7 kOhm", "3.2 us", "120 mA", "62 K/W", "85 degC" (absolute temperatures are
        shown in degC), "100 ppm/K" (temperature coefficients), "0.05" (unit "1"); NaN is
        shown as "nan"; magnitudes below 1 f or from 1 T up in scientific notation
        ("1.2e-19 J"). The result parses back with :func:`parse_quantity`.
    """
    _known_unit(unit)
    if digits < 1:
        raise UnitError(f"digits must be at least 1, got {digits}")
    x = float(x)
    if math.isnan(x):
        return "nan"
    if unit == "1":
        return _plain(x, digits) if math.isfinite(x) else str(x)
    if unit == "temperature":
        return f"{_plain(x - _ZERO_CELSIUS, digits) if math.isfinite(x) else x} degC"
    if unit == "1/K":
        return f"{_plain(x * 1e6, digits) if math.isfinite(x) else x} ppm/K"
    if unit in ("K/W", "K"):
        return f"{_plain(x, digits) if math.isfinite(x) else x} {unit}"
    label = _DISPLAY_UNIT.get(unit, unit)
    if not math.isfinite(x):
        return f"{x} {label}"
    if x == 0:
        return f"0 {label}"
    if abs(x) < 1e-15 or abs(x) >= 1e12:  # beyond the prefixes: scientific notation
        return f"{x:.{digits}g} {label}"
    exp3 = int(math.floor(math.log10(abs(x)) / 3.0)) * 3
    exp3 = min(max(exp3, -15), 9)
    mantissa = float(f"{x / 10.0**exp3:.{digits}g}")
    if abs(mantissa) >= 1000 and exp3 < 9:
        exp3 += 3
        mantissa = float(f"{x / 10.0**exp3:.{digits}g}")
    return f"{_plain(mantissa, digits)} {_DISPLAY_PREFIX[exp3]}{label}"


# ---------------------------------------------------------------------------------------------
# IEC 60063:2015 preferred number series
# ---------------------------------------------------------------------------------------------

# Integer mantissas: E3..E24 in tenths (10 = 1.0), E48..E192 in hundredths (100 = 1.00).
_E24_INT = (
    10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30, 33, 36, 39, 43, 47, 51, 56, 62, 68, 75, 82, 91,
)  # fmt: skip
_E12_INT = (10, 12, 15, 18, 22, 27, 33, 39, 47, 56, 68, 82)
_E6_INT = (10, 15, 22, 33, 47, 68)
_E3_INT = (10, 22, 47)
# E192: round(100 * 10**(i/192)) to three significant digits, except i = 185 where the standard
# lists 920 (the rounding rule gives 919).
_E192_INT = (
    100, 101, 102, 104, 105, 106, 107, 109, 110, 111, 113, 114, 115, 117, 118, 120,
    121, 123, 124, 126, 127, 129, 130, 132, 133, 135, 137, 138, 140, 142, 143, 145,
    147, 149, 150, 152, 154, 156, 158, 160, 162, 164, 165, 167, 169, 172, 174, 176,
    178, 180, 182, 184, 187, 189, 191, 193, 196, 198, 200, 203, 205, 208, 210, 213,
    215, 218, 221, 223, 226, 229, 232, 234, 237, 240, 243, 246, 249, 252, 255, 258,
    261, 264, 267, 271, 274, 277, 280, 284, 287, 291, 294, 298, 301, 305, 309, 312,
    316, 320, 324, 328, 332, 336, 340, 344, 348, 352, 357, 361, 365, 370, 374, 379,
    383, 388, 392, 397, 402, 407, 412, 417, 422, 427, 432, 437, 442, 448, 453, 459,
    464, 470, 475, 481, 487, 493, 499, 505, 511, 517, 523, 530, 536, 542, 549, 556,
    562, 569, 576, 583, 590, 597, 604, 612, 619, 626, 634, 642, 649, 657, 665, 673,
    681, 690, 698, 706, 715, 723, 732, 741, 750, 759, 768, 777, 787, 796, 806, 816,
    825, 835, 845, 856, 866, 876, 887, 898, 909, 920, 931, 942, 953, 965, 976, 988,
)  # fmt: skip
_E96_INT = (
    100, 102, 105, 107, 110, 113, 115, 118, 121, 124, 127, 130, 133, 137, 140, 143,
    147, 150, 154, 158, 162, 165, 169, 174, 178, 182, 187, 191, 196, 200, 205, 210,
    215, 221, 226, 232, 237, 243, 249, 255, 261, 267, 274, 280, 287, 294, 301, 309,
    316, 324, 332, 340, 348, 357, 365, 374, 383, 392, 402, 412, 422, 432, 442, 453,
    464, 475, 487, 499, 511, 523, 536, 549, 562, 576, 590, 604, 619, 634, 649, 665,
    681, 698, 715, 732, 750, 768, 787, 806, 825, 845, 866, 887, 909, 931, 953, 976,
)  # fmt: skip
_E48_INT = (
    100, 105, 110, 115, 121, 127, 133, 140, 147, 154, 162, 169, 178, 187, 196, 205,
    215, 226, 237, 249, 261, 274, 287, 301, 316, 332, 348, 365, 383, 402, 422, 442,
    464, 487, 511, 536, 562, 590, 619, 649, 681, 715, 750, 787, 825, 866, 909, 953,
)  # fmt: skip

# series -> (integer mantissas, power of ten they are scaled by)
_SERIES_INT: dict[str, tuple[tuple[int, ...], int]] = {
    "E3": (_E3_INT, 1),
    "E6": (_E6_INT, 1),
    "E12": (_E12_INT, 1),
    "E24": (_E24_INT, 1),
    "E48": (_E48_INT, 2),
    "E96": (_E96_INT, 2),
    "E192": (_E192_INT, 2),
}

#: IEC 60063:2015 preferred number series: decade mantissas in [1, 10), ascending.
E_SERIES: dict[str, tuple[float, ...]] = {
    name: tuple(m / 10**scale for m in ints) for name, (ints, scale) in _SERIES_INT.items()
}


def _series(series: str) -> tuple[np.ndarray, int]:
    key = series.strip().upper() if isinstance(series, str) else series
    if key not in _SERIES_INT:
        raise UnitError(
            f"unknown preferred number series {series!r}; expected one of "
            + ", ".join(_SERIES_INT)
        )
    ints, scale = _SERIES_INT[key]
    return np.asarray(ints, dtype=np.int64), scale


def _scaled(mantissa: np.ndarray, exponent: np.ndarray) -> np.ndarray:
    """``mantissa * 10**exponent`` correctly rounded for integer mantissas and exponents."""
    mantissa = np.asarray(mantissa, dtype=float)
    exponent = np.asarray(exponent, dtype=np.int64)
    # beyond double precision (a range up to 1e308) a power of ten is inf, its value inf or
    # 0, and the caller's range test drops it: no overflow warning for that
    with np.errstate(over="ignore"):
        pos = np.power(10.0, np.maximum(exponent, 0))
        neg = np.power(10.0, np.maximum(-exponent, 0))
        return np.where(exponent >= 0, mantissa * pos, mantissa / neg)


def preferred_values(series: str, low: float, high: float) -> np.ndarray:
    """All preferred values of a series within ``[low, high]``.

    Parameters
    ----------
    series : str
        "E3", "E6", "E12", "E24", "E48", "E96" or "E192".
    low, high : float
        Inclusive bounds [any unit], positive, ``low <= high``; the ends are matched with a
        relative tolerance of 1e-9.

    Returns
    -------
    numpy.ndarray
        Ascending preferred values [same unit as the bounds].

    Raises
    ------
    UnitError
        For an unknown series or invalid bounds.
    """
    ints, scale = _series(series)
    low, high = float(low), float(high)
    if not (math.isfinite(low) and math.isfinite(high)) or low <= 0 or high < low:
        raise UnitError(
            f"bounds {low!r}..{high!r} are not a range; expected 0 < low <= high, both finite"
        )
    first = math.floor(math.log10(low)) - 1
    last = math.floor(math.log10(high)) + 1
    decades = np.arange(first, last + 1)
    mant = np.tile(ints, decades.size)
    expo = np.repeat(decades - scale, ints.size)
    values = _scaled(mant, expo)
    keep = (values >= low * (1 - 1e-9)) & (values <= high * (1 + 1e-9))
    return values[keep]


def snap(value, series: str):
    """Nearest preferred value in the logarithmic sense.

    Parameters
    ----------
    value : float or array_like
        Positive value(s) [any unit]; NaN is passed through.
    series : str
        "E3", "E6", "E12", "E24", "E48", "E96" or "E192".

    Returns
    -------
    float or numpy.ndarray
        The preferred value minimizing ``abs(log(p / value))`` [same unit]; a float for a
        scalar input, else an array of the input's shape. An exact geometric tie goes to the
        lower value.

    Raises
    ------
    UnitError
        For an unknown series, or a value that is zero, negative or infinite.
    """
    ints, scale = _series(series)
    x = np.asarray(value, dtype=float)
    scalar = x.ndim == 0
    shape = x.shape
    x = x.ravel()
    nan = np.isnan(x)
    bad = ~nan & (~np.isfinite(x) | (x <= 0))
    if np.any(bad):
        raise UnitError(
            f"cannot snap {float(x[bad][0])!r} to {series}; expected a positive finite value"
        )
    safe = np.where(nan, 1.0, x)
    decade = np.floor(np.log10(safe)).astype(np.int64)
    # Candidates: last value of the decade below, the decade itself, first of the decade above.
    cand_m = np.concatenate(([ints[-1]], ints, [ints[0]]))
    cand_d = np.concatenate(([-1], np.zeros(ints.size, dtype=np.int64), [1]))
    expo = decade[:, None] + cand_d[None, :] - scale
    cands = _scaled(np.broadcast_to(cand_m, expo.shape), expo)
    dist = np.abs(np.log(cands) - np.log(safe)[:, None])
    best = np.argmin(dist, axis=1)  # first minimum -> lower value on an exact tie
    result = cands[np.arange(x.size), best]
    result = np.where(nan, np.nan, result)
    if scalar:
        return float(result[0])
    return result.reshape(shape)


def _range_bound(text: str, unit: str) -> float:
    """A bound of a preferred-value range. A plain number (a gain swept over E12:1000..10k)
    also takes the prefixes k and M there, as a resistor's bounds do; elsewhere a number
    without a unit is read as a fraction and takes none ("5m" is not 0.005)."""
    if unit == "1" and isinstance(text, str):
        split = _split_number(text.strip())
        if split is not None and split[1] in ("k", "M"):
            return _times_ten(split[0], _PREFIXES[split[1]])
    return parse_quantity(text, unit)


def parse_series_range(text: str, unit: str) -> tuple[str, float, float]:
    """Parse a preferred-value range such as "E24:47..1k".

    Parameters
    ----------
    text : str
        ``<series>:<low>..<high>``; the series is E3..E192 (case-insensitive), the bounds are
        quantities of kind ``unit``.
    unit : str
        Unit of the bounds, as for :func:`parse_quantity`.

    Returns
    -------
    tuple of (str, float, float)
        Series name (upper case), low and high bound [SI unit of ``unit``].

    Raises
    ------
    UnitError
        If the text does not have that form, the series is unknown, a bound does not parse,
        or low > high.
    """
    expect = "write e.g. E24:47..1k or E96:1k..10k"
    if not isinstance(text, str) or ":" not in text:
        raise UnitError(f"{text!r} is not a preferred-value range; {expect}")
    name, _, bounds = text.partition(":")
    name = name.strip().upper()
    if name not in _SERIES_INT:
        raise UnitError(
            f"{text!r} names no known series ({name!r}); expected one of "
            + ", ".join(_SERIES_INT)
            + f"; {expect}"
        )
    parts = bounds.split("..")
    if len(parts) != 2 or not parts[0].strip() or not parts[1].strip():
        raise UnitError(f"{text!r} is not a preferred-value range; {expect}")
    try:
        low = _range_bound(parts[0], unit)
        high = _range_bound(parts[1], unit)
    except UnitError as exc:
        raise UnitError(f"{text!r}: a bound is wrong: {exc}") from None
    if low <= 0 or high < low:
        raise UnitError(
            f"{text!r} is not a preferred-value range; expected 0 < low <= high; {expect}"
        )
    return name, low, high
