"""Checks of the TDB epoch conversions in optimizer.timescales."""

import datetime as dt
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from optimizer.timescales import epoch_from_jd_tdb, format_epoch, jd_tdb, parse_epoch

J2000 = dt.datetime(2000, 1, 1, 12)
MEEUS_TABLE = (
    "Meeus, Astronomical Algorithms, 2nd ed., ch. 7, list of test Julian Days (from memory)"
)


def exact_epoch(moment: dt.datetime) -> float:
    """Independent oracle: integer microseconds from datetime, one correctly rounded division."""
    return ((moment - J2000) // dt.timedelta(microseconds=1)) / 10**6


def test_j2000_is_zero():
    # J2000.0 = 2000 January 1, 12h = JD 2451545.0 (Astronomical Almanac, definition of the
    # standard epoch J2000.0; from memory).
    assert parse_epoch("2000-01-01T12:00:00 TDB") == 0.0
    assert format_epoch(0.0) == "2000-01-01T12:00:00.000"
    assert jd_tdb(0.0) == 2451545.0
    assert epoch_from_jd_tdb(2451545.0) == 0.0


@pytest.mark.parametrize(
    ("text", "jd", "source"),
    [
        # Calendar date -> JD is the same arithmetic in any uniform time scale, so the UT
        # examples below check the TDB conversion too.  Tolerance 1e-8 d (< 1 ms): the books
        # print 8 and 2 decimals respectively and the float JD itself resolves ~5e-10 d.
        ("1996-10-26T14:20:00", 2450383.09722222,
         "Vallado, Fundamentals of Astrodynamics and Applications, 4th ed., Example 3-4 "
         "(from memory)"),
        ("1957-10-04T19:26:24", 2436116.31,
         "Meeus, Astronomical Algorithms, 2nd ed., Example 7.a, 1957 Oct 4.81 (from memory)"),
        ("1987-01-27T00:00:00", 2446822.5, MEEUS_TABLE),
        ("1988-06-19T12:00:00", 2447332.0, MEEUS_TABLE),
        ("1900-01-01T00:00:00", 2415020.5, MEEUS_TABLE),
        ("1600-01-01T00:00:00", 2305447.5, MEEUS_TABLE),
    ],
)
def test_published_julian_dates(text, jd, source):
    assert jd_tdb(parse_epoch(text)) == pytest.approx(jd, abs=1e-8), source


@pytest.mark.parametrize(
    ("text", "microseconds"),
    [
        ("2027-03-14T06:30:00", 0),
        ("2027-03-14T06:30:00.125 TDB", 125000),
        ("2027-03-14 06:30:00 TDB", 0),
        ("2027-03-14T06:30:00.125TDB", 125000),
        ("  2027-03-14T06:30:00.125000000 TDB  ", 125000),
    ],
)
def test_accepted_forms(text, microseconds):
    assert parse_epoch(text) == exact_epoch(dt.datetime(2027, 3, 14, 6, 30, 0, microseconds))


def test_fraction_beyond_microseconds_is_exact():
    # 0.1234567 s: nearest float to the exact decimal, within half a unit in the last place.
    t = parse_epoch("2000-01-01T12:00:00.1234567")
    assert t == 0.1234567


@given(st.datetimes(min_value=dt.datetime(1900, 1, 1), max_value=dt.datetime(2100, 1, 1)))
def test_parse_matches_exact_arithmetic(moment):
    text = moment.isoformat(timespec="microseconds") + " TDB"
    assert parse_epoch(text) == exact_epoch(moment)


@given(st.datetimes(min_value=dt.datetime(1900, 1, 1), max_value=dt.datetime(2100, 1, 1)))
def test_string_round_trip_to_the_microsecond(moment):
    # Below 2**32 s (years 1864-2136) a float resolves better than 0.5 us, so the string survives.
    text = moment.isoformat(timespec="microseconds")
    assert format_epoch(parse_epoch(text), digits=6) == text


@given(st.floats(min_value=-3e9, max_value=3e9))
def test_float_round_trip(t):
    for digits in (3, 6, 9):
        back = parse_epoch(format_epoch(t, digits))
        assert abs(back - t) <= 0.5 * 10.0**-digits + math.ulp(t)


def test_rounding_carries_into_minutes_and_years():
    minute = parse_epoch("2027-03-14T06:30:00")
    assert format_epoch(minute - 0.0004) == "2027-03-14T06:30:00.000"  # 59.9996 s
    assert format_epoch(minute - 0.0006) == "2027-03-14T06:29:59.999"
    year_end = parse_epoch("2026-12-31T23:59:59.9996")
    assert format_epoch(year_end) == "2027-01-01T00:00:00.000"
    assert format_epoch(-0.0004) == "2000-01-01T12:00:00.000"
    assert format_epoch(-0.0006) == "2000-01-01T11:59:59.999"


def test_whole_seconds_and_half_even():
    assert format_epoch(0.4, digits=0) == "2000-01-01T12:00:00"
    assert format_epoch(0.5, digits=0) == "2000-01-01T12:00:00"  # exact half: to even
    assert format_epoch(1.5, digits=0) == "2000-01-01T12:00:02"


def test_leap_day():
    assert format_epoch(parse_epoch("2028-02-29T00:00:00"), 0) == "2028-02-29T00:00:00"


def test_julian_dates_vectorised():
    t = np.array([[0.0, 86400.0], [-43200.0, 1e9]])
    jd = jd_tdb(t)
    assert jd.shape == (2, 2)
    np.testing.assert_array_equal(jd[0], [2451545.0, 2451546.0])
    assert jd[1, 0] == 2451544.5
    # A float JD near 2.46e6 d resolves ~40 us, hence the tolerance.
    np.testing.assert_allclose(epoch_from_jd_tdb(jd), t, rtol=0, atol=1e-4)


@pytest.mark.parametrize(
    "text",
    [
        "2027-03-14T06:30:00Z",
        "2027-03-14T06:30:00 UTC",
        "2027-03-14T06:30:00 TT",
        "2027-03-14T06:30:00+00:00",
        "2027-03-14T06:30:00 TDB TDB",
        "2027-03-14",
        "2027-03-14T06:30",
        "2027-3-14T06:30:00",
        "2027-03-14T06:30:00.",
        "2027-03-14T24:00:00",
        "2027-03-14T23:59:60",  # leap second: TDB has none
        "2027-02-29T00:00:00",
        "",
        "TDB",
    ],
)
def test_rejected_strings_say_what_was_expected(text):
    with pytest.raises(ValueError) as err:
        parse_epoch(text)
    assert "expected an ISO-8601 TDB epoch like 2027-03-14T06:30:00 TDB" in str(err.value)
    assert repr(text) in str(err.value)


@pytest.mark.parametrize(("t", "digits"), [(math.nan, 3), (math.inf, 3), (0.0, -1), (1e12, 3)])
def test_format_rejects(t, digits):
    with pytest.raises(ValueError, match="expected|outside"):
        format_epoch(t, digits)
