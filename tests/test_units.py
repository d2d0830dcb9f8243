"""Tests for tolerance.units: parsing, formatting and IEC 60063 preferred values."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tolerance.units import (
    E_SERIES,
    UnitError,
    format_ppm,
    format_yield,
    format_quantity,
    parse_quantity,
    parse_series_range,
    preferred_values,
    snap,
)

# ---------------------------------------------------------------------------------------------
# parse_quantity: accepted forms
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # IEC 60062:2016 letter code as decimal marker for resistance values, from memory
        ("4k7", 4700.0),
        ("4K7", 4700.0),
        ("330R", 330.0),
        ("1M0", 1e6),
        ("R47", 0.47),
        ("2R2", 2.2),
        ("0R1", 0.1),
        ("2G2", 2.2e9),
        # SI prefixes (SI Brochure, 9th ed. 2019, Table 7, from memory)
        ("4.7 kohm", 4700.0),
        ("4.7kohm", 4700.0),
        ("4.7 kOhm", 4700.0),
        ("10 ohms", 10.0),
        ("10 Ohm", 10.0),
        ("4.7 k\u03a9", 4700.0),
        ("4.7 k\u2126", 4700.0),
        ("470 R", 470.0),
        ("22k", 22000.0),
        ("4.7K", 4700.0),
        ("1.5 MOhm", 1.5e6),
        ("100 mOhm", 0.1),
        ("1e3", 1000.0),
        ("  68  ", 68.0),
    ],
)
def test_parse_resistance_forms(text, expected):
    # IEC 60062 / SI prefix definitions as listed in the parametrization
    assert parse_quantity(text, "ohm") == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize(
    ("text", "unit", "expected"),
    [
        ("3.3", "V", 3.3),
        ("500 mV", "V", 0.5),
        ("-12 V", "V", -12.0),
        ("120 mA", "A", 0.12),
        ("20m", "A", 0.02),
        ("1.5 W", "W", 1.5),
        ("250mW", "W", 0.25),
        ("3.2 us", "s", 3.2e-6),
        ("3.2 \u00b5s", "s", 3.2e-6),
        ("3.2 \u03bcs", "s", 3.2e-6),
        ("10 ms", "s", 0.01),
        ("20 kHz", "Hz", 2e4),
        ("1k", "Hz", 1e3),
        ("100 mH", "H", 0.1),
        ("4.7 uH", "H", 4.7e-6),
        ("470n", "F", 4.7e-7),
        ("100 pF", "F", 1e-10),
        ("10 fF", "F", 1e-14),
        ("5 mJ", "J", 5e-3),
        ("1.5 GHz", "Hz", 1.5e9),
        ("2 MHz", "Hz", 2e6),
    ],
)
def test_parse_si_quantities(text, unit, expected):
    # SI Brochure, 9th ed. 2019, Table 7 (prefix values, from memory)
    assert parse_quantity(text, unit) == pytest.approx(expected, rel=1e-15)


def test_parse_prefix_is_correctly_rounded():
    # common practice, no source: 470n must be the same double as the literal 470e-9
    assert parse_quantity("470n", "F") == 470e-9
    assert parse_quantity("200 ppm", "1") == 200e-6


@pytest.mark.parametrize(
    ("text", "expected"),
    [("5%", 0.05), ("5 %", 0.05), ("200 ppm", 2e-4), ("0.05", 0.05), ("1", 1.0), ("-3 %", -0.03)],
)
def test_parse_fraction(text, expected):
    # definitions of percent (1e-2) and ppm (1e-6), common practice, no source
    assert parse_quantity(text, "1") == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("100 ppm/K", 1e-4),
        ("100 ppm/degC", 1e-4),
        ("-250 ppm/\u00b0C", -2.5e-4),
        ("0.39 %/K", 3.9e-3),
        ("3.9e-3 1/K", 3.9e-3),
        ("3.9e-3", 3.9e-3),
    ],
)
def test_parse_temperature_coefficient(text, expected):
    # definitions of percent and ppm; a kelvin step equals a degC step
    # (SI Brochure 2019, 2.3.1, from memory)
    assert parse_quantity(text, "1/K") == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        ("25 degC", 298.15),
        ("25 \u00b0C", 298.15),
        ("25\u00b0C", 298.15),
        ("-40 degC", 233.15),
        ("300 K", 300.0),
        ("85", 358.15),
        (25, 298.15),
        (125.0, 398.15),
    ],
)
def test_parse_absolute_temperature(value, expected):
    # SI Brochure 9th ed. 2019, 2.3.1 (from memory): t/degC = T/K - 273.15
    assert parse_quantity(value, "temperature") == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("value", ["10 K", "10 degC", "10 \u00b0C", "10", 10])
def test_parse_temperature_difference(value):
    # SI Brochure 9th ed. 2019, 2.3.1 (from memory): a difference of 1 degC equals 1 K
    assert parse_quantity(value, "K") == 10.0


def test_parse_thermal_resistance():
    # a difference of 1 degC equals 1 K (SI Brochure 2019, 2.3.1, from memory)
    assert parse_quantity("62 K/W", "K/W") == 62.0
    assert parse_quantity("62 degC/W", "K/W") == 62.0
    assert parse_quantity(62, "K/W") == 62.0


def test_parse_plain_numbers():
    # common practice, no source: numbers are taken in the SI base unit
    assert parse_quantity(4700, "ohm") == 4700.0
    assert parse_quantity(np.float64(0.5), "A") == 0.5
    assert parse_quantity(np.int64(3), "V") == 3.0
    assert isinstance(parse_quantity(3, "V"), float)


# ---------------------------------------------------------------------------------------------
# parse_quantity: rejections
# ---------------------------------------------------------------------------------------------


def test_wrong_unit_message_names_expected_kind():
    # message format required by the project brief
    with pytest.raises(UnitError) as info:
        parse_quantity("5 V", "ohm")
    assert str(info.value) == "'5 V' is not a resistance; write e.g. 4.7 kohm, 4k7 or 330R"


def test_fraction_message():
    # message format required by the project brief
    with pytest.raises(UnitError) as info:
        parse_quantity("5 %%", "1")
    assert str(info.value) == "'5 %%' is not a fraction; write 5% or 0.05"


@pytest.mark.parametrize(
    ("text", "unit", "kind"),
    [
        ("5 V", "ohm", "a resistance"),
        ("4.7 kohms ohm", "ohm", "a resistance"),
        ("abc", "ohm", "a resistance"),
        ("", "ohm", "a resistance"),
        ("   ", "V", "a voltage"),
        ("1 meg", "ohm", "a resistance"),
        ("1 megohm", "ohm", "a resistance"),
        ("4.7 k ohm", "ohm", "a resistance"),
        ("4k7k", "ohm", "a resistance"),
        ("R", "ohm", "a resistance"),
        ("4k7", "V", "a voltage"),
        ("12 A", "V", "a voltage"),
        ("1 mV", "A", "a current"),
        ("3 s", "W", "a power"),
        ("10 Hz", "s", "a time"),
        ("1 kV", "Hz", "a frequency"),
        ("1 uF", "H", "an inductance"),
        ("1 uH", "F", "a capacitance"),
        ("1 W", "J", "an energy"),
        ("62 W/K", "K/W", "a thermal resistance"),
        ("100 ppm", "1/K", "a temperature coefficient"),
        ("5 %%", "1", "a fraction"),
        ("5 m", "1", "a fraction"),
        ("25 degF", "temperature", "a temperature"),
        ("25 mK", "temperature", "a temperature"),
        ("10 V", "K", "a temperature difference"),
        ("nan", "V", "a voltage"),
        ("inf", "V", "a voltage"),
        ("1e999", "V", "a voltage"),
        ("1.2.3", "V", "a voltage"),
    ],
)
def test_rejections_name_the_kind(text, unit, kind):
    # message contract required by the project brief
    with pytest.raises(UnitError, match=f"is not {kind}"):
        parse_quantity(text, unit)


@pytest.mark.parametrize("value", [True, False, np.bool_(True), math.nan, math.inf, -math.inf])
def test_rejects_bool_and_non_finite_numbers(value):
    # project brief: bool, NaN and infinity are not quantities
    with pytest.raises(UnitError, match="is not a voltage"):
        parse_quantity(value, "V")


@pytest.mark.parametrize(
    ("value", "unit"),
    [("-4k7", "ohm"), ("-1 uF", "F"), ("-1 mH", "H"), ("-50 Hz", "Hz"), ("-3 K/W", "K/W")],
)
def test_rejects_negative_passive_values(value, unit):
    # common practice, no source: passive part values and frequencies are not negative
    with pytest.raises(UnitError, match="cannot be negative"):
        parse_quantity(value, unit)


def test_rejects_below_absolute_zero():
    # SI Brochure 9th ed. 2019, 2.3.1 (from memory): 0 K = -273.15 degC is the lower bound
    with pytest.raises(UnitError, match="below absolute zero"):
        parse_quantity("-300 degC", "temperature")
    with pytest.raises(UnitError, match="below absolute zero"):
        parse_quantity("-1 K", "temperature")


def test_rejects_other_types_and_unknown_unit():
    # common practice, no source
    with pytest.raises(UnitError, match="got a list"):
        parse_quantity([1.0], "V")
    with pytest.raises(UnitError, match="unknown unit 'furlong'"):
        parse_quantity("1", "furlong")
    assert issubclass(UnitError, ValueError)


def test_error_message_has_no_context_prefix():
    # project brief: the caller adds file/key context, the message starts with the value
    with pytest.raises(UnitError) as info:
        parse_quantity("12 A", "V")
    assert str(info.value).startswith("'12 A' is not a voltage; write e.g.")


# ---------------------------------------------------------------------------------------------
# format_quantity
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("x", "unit", "expected"),
    [
        (4700.0, "ohm", "4.7 kOhm"),
        (3.2e-6, "s", "3.2 us"),
        (0.12, "A", "120 mA"),
        (12.0, "V", "12 V"),
        (1.5, "W", "1.5 W"),
        (62.0, "K/W", "62 K/W"),
        (358.15, "temperature", "85 degC"),
        (233.15, "temperature", "-40 degC"),
        (0.05, "1", "0.05"),
        (1e-4, "1/K", "100 ppm/K"),
        (10.0, "K", "10 K"),
        (math.nan, "V", "nan"),
        (0.0, "V", "0 V"),
        (-0.0047, "A", "-4.7 mA"),
        (999.9, "V", "1 kV"),
        (4.7e-7, "F", "470 nF"),
        (1e6, "ohm", "1 MOhm"),
        (2.2e9, "ohm", "2.2 GOhm"),
        (1e-15, "F", "1 fF"),
        (12345.0, "Hz", "12.3 kHz"),
        (0.1, "H", "100 mH"),
        (0.005, "J", "5 mJ"),
    ],
)
def test_format_quantity(x, unit, expected):
    # engineering notation with SI prefixes (SI Brochure 2019, Table 7, from memory);
    # label layout from the project brief
    assert format_quantity(x, unit) == expected


def test_format_ppm_one_decimal_and_missing_rates():
    # common practice, no source: 1 ppm = 1e-6; one decimal as the console and reports print
    assert format_ppm(1.844e-4) == "184.4"
    assert format_ppm(0) == "0.0"
    assert format_ppm(1.0) == "1000000.0"
    assert format_ppm(None) == "-"
    assert format_ppm(float("nan")) == "nan"


def test_format_ppm_keeps_rates_below_a_tenth_of_a_ppm():
    # common practice, no source: a bound of 0.03 ppm (zero failures in 1e8 units at 95 %,
    # -ln(0.05) / 1e8) must not read "0.0"; 3 significant digits below 1 ppm
    assert format_ppm(2.9957e-8) == "0.03"
    assert format_ppm(2.53178e-11) == "2.53e-05"
    assert format_ppm(4e-8) == "0.04"
    assert format_ppm(1e-6) == "1.0" and format_ppm(0.9997e-6) == "1.0"


def test_format_yield_never_rounds_a_failure_away():
    # common practice, no source: 1 failure in 1e7 units is a yield of 99.99999 %
    assert format_yield(1 - 1e-7) == "99.99999"
    assert format_yield(1.0) == "100.0000"
    assert format_yield(0.999816) == "99.9816"
    assert format_yield(1e-9) == "0.0000001"
    assert format_yield(0.0) == "0.0000"
    assert format_yield(None) == "-"
    assert format_yield(0.5, 3) == "50.000"

def test_format_digits():
    # common practice, no source: significant digits then trailing zeros trimmed
    assert format_quantity(4712.0, "ohm", digits=2) == "4.7 kOhm"
    assert format_quantity(4712.0, "ohm", digits=4) == "4.712 kOhm"
    assert format_quantity(4700.0, "ohm", digits=5) == "4.7 kOhm"
    with pytest.raises(UnitError, match="digits"):
        format_quantity(1.0, "V", digits=0)


@pytest.mark.parametrize(
    ("x", "unit"),
    [
        (4700.0, "ohm"),
        (0.47, "ohm"),
        (3.3e-6, "s"),
        (0.12, "A"),
        (2.2e-9, "F"),
        (1.5e5, "Hz"),
        (62.0, "K/W"),
        (358.15, "temperature"),
        (233.15, "temperature"),
        (0.05, "1"),
        (-2.5e-4, "1/K"),
        (10.0, "K"),
        (4.7e-3, "H"),
        (0.25, "W"),
        (1.2, "J"),
    ],
)
def test_format_parse_round_trip(x, unit):
    # common practice, no source: the report label reads back as the same value
    assert parse_quantity(format_quantity(x, unit), unit) == pytest.approx(x, rel=1e-12)


@pytest.mark.parametrize("x, unit", [
    *[(x, "1") for x in (2.1e301, -5e30, 1e12, 1.5e-30, 1e-300, -4.4e-16)],
    *[(x, u) for x in (2.1e301, 1e12, 1.5e-30, 1e-300) for u in ("K/W", "K")],
    (2.1e301, "1/K"), (1e-300, "1/K"), (-3e-25, "1/K"),
])
def test_extreme_plain_numbers_in_scientific_notation(x, unit):
    # common practice, no source: a margin of 2e301 (a limit typed as 1e-300) is written in
    # a few characters, not three hundred digits, as the prefixed units already are; it
    # still reads back
    text = format_quantity(x, unit)
    assert len(text) <= 16, text
    assert parse_quantity(text, unit) == pytest.approx(x, rel=5e-3)


@pytest.mark.parametrize(("x", "expected"), [
    (7.28e-10, "7.28e-10"), (1.71e-5, "1.71e-05"), (9.99e-5, "9.99e-05"), (1e-4, "0.0001"),
    (3.24e-3, "0.00324"), (-2.5e-7, "-2.5e-07"), (999_400.0, "999000"), (1.31e10, "1.31e+10"),
    (-2.5e6, "-2.5e+06"),
])
def test_small_plain_numbers_switch_to_scientific_where_printf_g_does(x, expected):
    # Python's format specification, "g" presentation (scientific below 1e-4), from memory:
    # an off-current fraction of 7e-10 reads in a few characters and still reads back; from
    # a million up (common practice, no source) a drive margin of 1.31e10 does too
    text = format_quantity(x, "1")
    assert text == expected
    assert parse_quantity(text, "1") == pytest.approx(x, rel=5e-3)


@settings(max_examples=200, deadline=None)
@given(
    x=st.floats(min_value=1e-14, max_value=1e11, allow_nan=False, allow_infinity=False),
    unit=st.sampled_from(["ohm", "V", "A", "W", "s", "Hz", "H", "F", "J"]),
)
def test_format_parse_round_trip_property(x, unit):
    # common practice, no source: rounding to 3 significant digits changes a value by < 0.05 %
    back = parse_quantity(format_quantity(x, unit), unit)
    assert back == pytest.approx(x, rel=5e-3)


# ---------------------------------------------------------------------------------------------
# IEC 60063 preferred numbers
# ---------------------------------------------------------------------------------------------


def test_series_lengths():
    # IEC 60063:2015: series En has n values per decade
    for name, values in E_SERIES.items():
        assert len(values) == int(name[1:])
        assert len(set(values)) == len(values)
        assert all(1.0 <= v < 10.0 for v in values)
        assert list(values) == sorted(values)


def test_e24_verbatim():
    # IEC 60063:2015, E24 series
    expected = [10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30, 33, 36, 39, 43, 47, 51, 56, 62,
                68, 75, 82, 91]  # fmt: skip
    assert list(E_SERIES["E24"]) == [v / 10 for v in expected]


def test_e3_e6_e12_verbatim():
    # IEC 60063:2015, E3, E6 and E12 series
    assert list(E_SERIES["E3"]) == [1.0, 2.2, 4.7]
    assert list(E_SERIES["E6"]) == [1.0, 1.5, 2.2, 3.3, 4.7, 6.8]
    assert list(E_SERIES["E12"]) == [1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2]


def test_e24_differs_from_plain_rounding_where_the_standard_does():
    # IEC 60063:2015 E24 values 2.7 .. 4.7 and 8.2 depart from round(10**(i/24), 1)
    rounded = [round(10 ** (i / 24), 1) for i in range(24)]
    differ = [e for e, r in zip(E_SERIES["E24"], rounded) if not math.isclose(e, r)]
    assert differ == [2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 8.2]


def test_e192_follows_rounding_rule_with_one_exception():
    # IEC 60063:2015: E192 = 10**(i/192) rounded to 3 significant digits, except 9.20 (rule: 9.19)
    rounded = [round(10 ** (i / 192), 2) for i in range(192)]
    differ = [(i, e, r) for i, (e, r) in enumerate(zip(E_SERIES["E192"], rounded))
              if not math.isclose(e, r)]  # fmt: skip
    assert len(differ) == 1
    index, standard, rule = differ[0]
    assert index == 185 and standard == 9.2 and rule == 9.19


def test_e48_e96_are_every_fourth_and_second_of_e192():
    # IEC 60063:2015: E48 and E96 are every fourth and every second term of E192
    assert E_SERIES["E96"] == E_SERIES["E192"][::2]
    assert E_SERIES["E48"] == E_SERIES["E192"][::4]


@pytest.mark.parametrize(
    ("small", "large"),
    [("E3", "E6"), ("E6", "E12"), ("E12", "E24"), ("E48", "E96"), ("E96", "E192")],
)
def test_series_nesting(small, large):
    # IEC 60063:2015: each series is contained in the next finer one of its family
    assert set(E_SERIES[small]) <= set(E_SERIES[large])


def test_e24_not_subset_of_e48():
    # IEC 60063:2015: the 2-digit and 3-digit families are distinct (E192 has 2.67 and 2.71,
    # not 2.7)
    assert not set(E_SERIES["E24"]) <= set(E_SERIES["E48"])
    assert 2.7 not in E_SERIES["E192"]


def test_preferred_values_e12_range():
    # IEC 60063:2015 E12 series, repeated per decade
    got = preferred_values("E12", 47, 1000)
    expected = [47, 56, 68, 82, 100, 120, 150, 180, 220, 270, 330, 390, 470, 560, 680, 820, 1000]
    np.testing.assert_array_equal(got, expected)


def test_preferred_values_inclusive_tolerance_and_small_decades():
    # IEC 60063:2015 E24 series; end tolerance 1e-9 relative per the project brief
    got = preferred_values("E24", 0.047 * (1 + 5e-10), 0.1 * (1 - 5e-10))
    np.testing.assert_array_equal(got, [0.047, 0.051, 0.056, 0.062, 0.068, 0.075, 0.082, 0.091,
                                        0.1])  # fmt: skip
    assert preferred_values("E24", 4.71, 5.0).size == 0
    assert preferred_values("E96", 1e3, 1e4).size == 97
    assert preferred_values("e6", 1.0, 1.0).tolist() == [1.0]


def test_preferred_values_rejects_bad_input():
    # common practice, no source
    with pytest.raises(UnitError, match="unknown preferred number series 'E7'"):
        preferred_values("E7", 1, 10)
    with pytest.raises(UnitError, match="not a range"):
        preferred_values("E12", 10, 1)
    with pytest.raises(UnitError, match="not a range"):
        preferred_values("E12", 0, 1)


@pytest.mark.parametrize(
    ("x", "series", "expected"),
    [
        (4600.0, "E24", 4700.0),
        (1.04, "E12", 1.0),
        (1.1, "E12", 1.2),
        (9.6, "E24", 10.0),
        (0.96e-6, "E12", 1.0e-6),
        (9.19, "E192", 9.2),
        (1234.0, "E96", 1240.0),
        (3.0e3, "E6", 3.3e3),
        (95.0, "E3", 100.0),
    ],
)
def test_snap_examples(x, series, expected):
    # IEC 60063:2015 series values; nearest in the logarithmic sense
    assert snap(x, series) == pytest.approx(expected, rel=1e-12)


def test_snap_vectorized_and_nan():
    # IEC 60063:2015 E24 series
    got = snap(np.array([[4600.0, 1.04], [np.nan, 26.0]]), "E24")
    assert got.shape == (2, 2)
    np.testing.assert_allclose(got[0], [4700.0, 1.0])
    assert math.isnan(got[1, 0]) and got[1, 1] == pytest.approx(27.0)
    assert isinstance(snap(4600.0, "E24"), float)


def test_snap_rejects_bad_input():
    # common practice, no source: a logarithmic distance needs positive values
    with pytest.raises(UnitError, match="positive"):
        snap(0.0, "E12")
    with pytest.raises(UnitError, match="positive"):
        snap([1.0, -2.0], "E12")
    with pytest.raises(UnitError, match="unknown preferred number series"):
        snap(1.0, "E5")


@settings(max_examples=300, deadline=None)
@given(
    x=st.floats(min_value=1e-9, max_value=1e12, allow_nan=False, allow_infinity=False),
    series=st.sampled_from(sorted(E_SERIES)),
)
def test_snap_is_nearest_in_log_terms(x, series):
    # definition of nearest preferred value (logarithmic distance), common practice, no source
    got = snap(x, series)
    around = preferred_values(series, x / 100.0, x * 100.0)
    assert np.any(np.isclose(around, got, rtol=1e-12, atol=0.0))
    best = np.min(np.abs(np.log(around / x)))
    assert abs(math.log(got / x)) <= best + 1e-12


# ---------------------------------------------------------------------------------------------
# parse_series_range
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "unit", "expected"),
    [
        ("E24:47..1k", "ohm", ("E24", 47.0, 1000.0)),
        ("E96:1k..10k", "ohm", ("E96", 1000.0, 10000.0)),
        ("e12 : 4k7 .. 1M0", "ohm", ("E12", 4700.0, 1e6)),
        ("E6:1n..100n", "F", ("E6", 1e-9, 1e-7)),
        ("E24:1.5..10", "V", ("E24", 1.5, 10.0)),
    ],
)
def test_parse_series_range(text, unit, expected):
    # format defined by the project brief; bounds as for parse_quantity
    name, low, high = parse_series_range(text, unit)
    assert name == expected[0]
    assert low == pytest.approx(expected[1], rel=1e-15)
    assert high == pytest.approx(expected[2], rel=1e-15)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("47..1k", "write e.g. E24:47..1k"),
        ("E24:47", "write e.g. E24:47..1k"),
        ("E24:47..", "write e.g. E24:47..1k"),
        ("E24:1..2..3", "write e.g. E24:47..1k"),
        ("E25:47..1k", "names no known series"),
        ("E24:47..1 V", "is not a resistance"),
        ("E24:1k..47", "low <= high"),
    ],
)
def test_parse_series_range_rejections(text, match):
    # format defined by the project brief
    with pytest.raises(UnitError, match=match):
        parse_series_range(text, "ohm")


def test_a_gain_range_takes_the_large_prefixes():
    # found by probing: --vary Q1.hfe=E12:1000..10k was refused ("'10k' is not a fraction");
    # a range of plain numbers takes k and M as a resistor's does (common practice, no
    # source), while a fraction outside a range still takes none
    assert parse_series_range("E12:1000..10k", "1") == ("E12", 1000.0, 10000.0)
    assert parse_series_range("E6:470..2.2M", "1")[2] == pytest.approx(2.2e6, rel=1e-15)
    assert parse_series_range("E6:0.1..0.47", "1")[1:] == (0.1, 0.47)
    with pytest.raises(UnitError, match="a bound is wrong"):
        parse_series_range("E12:1m..10", "1")
    with pytest.raises(UnitError, match="is not a fraction"):
        parse_quantity("10k", "1")


def test_digits_of_other_scripts_are_refused():
    # found by probing: Python's float() reads Arabic-Indic digits, so "١٢ V" was 12 V; a
    # quantity is written with 0-9 (common practice, no source), the micro and ohm signs
    # stay units
    with pytest.raises(UnitError, match="digits are written 0-9"):
        parse_quantity("\u0661\u0662 V", "V")
    with pytest.raises(UnitError, match="digits are written 0-9"):
        parse_quantity("4\u0667k", "ohm")
    assert parse_quantity("4.7 \u00b5V", "V") == pytest.approx(4.7e-6)
    assert parse_quantity("4.7 k\u03a9", "ohm") == pytest.approx(4700.0)
