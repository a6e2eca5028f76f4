"""Tests for propagator.timescales (Epoch, scale conversions, leap seconds, ISO text)."""

from __future__ import annotations

import logging
import warnings

import erfa
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from propagator import timescales
from propagator.constants import SECONDS_PER_DAY
from propagator.timescales import LEAP_SECONDS_EXPIRE, SCALES, Epoch, tdb_minus_tt_seconds


def raw_offset_s(a: Epoch, b: Epoch) -> float:
    """(a.jd - b.jd) in seconds, ignoring the scales (to measure scale offsets)."""
    return ((a.jd1 - b.jd1) + (a.jd2 - b.jd2)) * SECONDS_PER_DAY


EPOCHS = [
    "1985-07-01T00:00:00 UTC",
    "2000-01-01T12:00:00 UTC",
    "2016-12-31T23:59:59 UTC",
    "2024-02-29T06:30:15.25 UTC",
    "2031-03-20T12:00:00 UTC",
]


# --- fixed offsets ----------------------------------------------------------------------
@pytest.mark.parametrize("iso", EPOCHS)
def test_tt_minus_tai_is_32_184_s(iso):
    # TT - TAI = 32.184 s exactly (IERS Conventions 2010, section 10.1)
    e = Epoch.from_iso(iso)
    assert raw_offset_s(e.to("TT"), e.to("TAI")) == pytest.approx(32.184, abs=1e-9)


@pytest.mark.parametrize("iso", EPOCHS)
def test_gps_is_tai_minus_19_s(iso):
    # GPS time = TAI - 19 s (IS-GPS-200, section 3.3.4)
    e = Epoch.from_iso(iso)
    assert raw_offset_s(e.to("GPS"), e.to("TAI")) == pytest.approx(-19.0, abs=1e-9)


def test_tai_minus_utc_across_2017_leap_second():
    # TAI - UTC = 36 s before and 37 s after 2017-01-01T00:00:00 UTC
    # (IERS Bulletin C 52, July 2016: leap second at the end of 2016-12-31).
    before = Epoch.from_iso("2016-12-31T23:59:59 UTC")
    after = Epoch.from_iso("2017-01-01T00:00:00 UTC")
    # (raw JD offsets are not usable here: on a leap-second day the UTC "quasi-JD"
    # fraction counts 86401 s per day, ERFA convention)
    assert before.to("TAI").iso(6) == "2017-01-01T00:00:35.000000 TAI"  # 23:59:59 + 36 s
    assert after.to("TAI").iso(6) == "2017-01-01T00:00:37.000000 TAI"  # 00:00:00 + 37 s
    day_before = Epoch.from_iso("2016-12-30T12:00:00 UTC")
    assert raw_offset_s(day_before.to("TAI"), day_before) == pytest.approx(36.0, abs=1e-9)
    assert raw_offset_s(after.to("TAI"), after) == pytest.approx(37.0, abs=1e-9)
    # two SI seconds elapse between them (23:59:59 -> 23:59:60 -> 00:00:00)
    assert after - before == pytest.approx(2.0, abs=1e-9)
    leap = Epoch.from_iso("2016-12-31T23:59:60.5 UTC")
    assert leap - before == pytest.approx(1.5, abs=1e-9)
    assert leap.iso(3) == "2016-12-31T23:59:60.500 UTC"
    assert abs((before + 1.5) - leap) < 1e-9
    assert (before + 1.5).iso(3) == "2016-12-31T23:59:60.500 UTC"
    # the leap second only exists on that day
    with pytest.raises(ValueError, match="2016-12-30T23:59:60"):
        Epoch.from_iso("2016-12-30T23:59:60 UTC")


def test_leap_second_table_installed_from_astropy_iers_data():
    # Leap_Second.dat (IERS) is installed into ERFA with its stated expiry
    assert erfa.leap_seconds.expires.date() == LEAP_SECONDS_EXPIRE
    assert erfa.dat(2017, 1, 1, 0.0) == 37.0  # IERS Bulletin C 52
    assert timescales.LEAP_SECOND_FILE.name == "Leap_Second.dat"


# --- TDB ---------------------------------------------------------------------------------
def _tdb_tt_usno179(jd_tt: np.ndarray) -> np.ndarray:
    """TDB - TT [s], USNO Circular 179 (Kaplan 2005) eq. 2.6 (from memory), stated
    accurate to ~10 us over 1600-2200; an independent check of erfa.dtdb."""
    t = (jd_tt - 2451545.0) / 36525.0
    return (
        0.001657 * np.sin(628.3076 * t + 6.2401)
        + 0.000022 * np.sin(575.3385 * t + 4.2970)
        + 0.000014 * np.sin(1256.6152 * t + 6.1969)
        + 0.000005 * np.sin(606.9777 * t + 4.0212)
        + 0.000005 * np.sin(52.9691 * t + 0.4444)
        + 0.000002 * np.sin(21.3299 * t + 5.5431)
        + 0.000010 * t * np.sin(628.3076 * t + 4.2490)
    )


def test_tdb_minus_tt_bounded_and_matches_erfa():
    starts = Epoch.from_iso("1990-01-01T00:00:00 TT")
    for k in range(0, 50 * 365, 37):  # 1990-2040
        e = starts + k * SECONDS_PER_DAY
        d = tdb_minus_tt_seconds(e)
        # |TDB - TT| < 2 ms (IERS Conventions 2010, chapter 10)
        assert abs(d) < 2e-3
        # erfa.dtdb at the geocentre (ERFA/pyerfa)
        assert d == erfa.dtdb(e.jd1, e.jd2, 0.0, 0.0, 0.0, 0.0)
        # independent series (USNO Circular 179 eq. 2.6, from memory; ~10 us)
        assert abs(d - _tdb_tt_usno179(np.array(e.jd))) < 10e-6
        # Epoch.to("TDB") applies it
        assert raw_offset_s(e.to("TDB"), e) == pytest.approx(d, abs=1e-9)


# --- arithmetic and round trips -----------------------------------------------------------
@pytest.mark.parametrize("scale", ["TT", "TAI", "TDB", "GPS", "UTC"])
def test_sub_microsecond_arithmetic_over_a_year(scale):
    e = Epoch.from_iso("2016-06-15T07:08:09.123456", scale=scale)
    dt = 3.15e7
    assert (e + dt) - e == pytest.approx(dt, abs=1e-7)
    assert ((e + dt) - dt) - e == pytest.approx(0.0, abs=1e-7)
    # elapsed seconds accumulate consistently in many small steps
    x = e
    for _ in range(1000):
        x = x + dt / 1000
    assert x - e == pytest.approx(dt, abs=1e-7)


def test_utc_arithmetic_counts_the_leap_second():
    e = Epoch.from_iso("2016-12-31T12:00:00 UTC")
    later = e + 86400.0
    # one day of SI seconds later is 11:59:59 because the day had 86401 s
    assert later.iso(0) == "2017-01-01T11:59:59 UTC"


@settings(max_examples=60, deadline=None)
@given(
    mjd=st.floats(min_value=41700.0, max_value=61700.0),
    dt=st.floats(min_value=-4e8, max_value=4e8),
    scale=st.sampled_from(["TT", "TAI", "GPS", "TDB", "UTC"]),
)
def test_property_add_then_subtract(mjd, dt, scale):
    e = Epoch.from_mjd(mjd, scale="TT").to(scale)
    assert (e + dt) - e == pytest.approx(dt, abs=1e-6)
    back = (e + dt) - dt
    assert abs(back - e) < 1e-6


@pytest.mark.parametrize("scale", SCALES)
@pytest.mark.parametrize(
    "iso", ["2003-04-05T06:07:08.5", "2016-12-31T23:59:30", "2024-09-10T12:00:00"]
)
def test_conversion_round_trips(scale, iso):
    e = Epoch.from_iso(iso, scale="UTC")
    there = e.to(scale)
    back = there.to("UTC")
    assert abs(back - e) < 1e-9
    assert back.scale == "UTC" and there.scale == scale


def test_ut1_matches_finals_table_at_a_node():
    # UT1 - UTC on 2017-01-01 0h UTC, Bulletin B column of finals2000A.all
    # (IERS; read here directly from the file, bytes 155-165, ReadMe.finals2000A).
    from propagator.eop import default_eop_file

    for line in default_eop_file().read_text().splitlines():
        if line[7:15].strip() == "57754.00":
            dut1_b = float(line[154:165])
            break
    e = Epoch.from_iso("2017-01-01T00:00:00 UTC")
    assert raw_offset_s(e.to("UT1"), e) == pytest.approx(dut1_b, abs=1e-9)


# --- ISO text ----------------------------------------------------------------------------
def test_iso_forms():
    a = Epoch.from_iso("2031-03-20T12:00:00 UTC")
    assert Epoch.from_iso("2031-03-20 12:00:00 utc") == a
    assert Epoch.from_iso("2031-03-20T12:00:00Z") == a
    assert Epoch.from_iso("2031-03-20T12:00:00", scale="UTC") == a
    assert Epoch.from_iso("2031-03-20T12:00", scale="UTC") == a
    assert Epoch.from_iso("2031-03-20 TT") == Epoch.from_jd(2462945.5, 0.0, "TT")
    # J2000.0 = JD 2451545.0 TT (IERS Conventions 2010, section 5)
    j2000 = Epoch.from_iso("2000-01-01T12:00:00 TT")
    assert j2000.jd == 2451545.0 and j2000.mjd == 51544.5
    # nanoseconds survive the text round trip
    b = Epoch.from_iso("2024-02-29T23:59:59.123456789 TDB")
    assert b.iso(9) == "2024-02-29T23:59:59.123456789 TDB"
    assert Epoch.from_iso(b.iso(9)) == b
    assert str(a) == "2031-03-20T12:00:00.000000 UTC"


def test_far_future_utc_no_erfa_warning_but_logged(monkeypatch, caplog):
    # ERFA flags UTC years > release+5 as "dubious"; longarc silences that one warning
    # and instead logs (once) that no leap seconds are known past the table expiry.
    monkeypatch.setattr(timescales, "_warned_beyond_leap_table", False)
    with warnings.catch_warnings():
        warnings.simplefilter("error", erfa.ErfaWarning)
        with caplog.at_level(logging.WARNING, logger="propagator.timescales"):
            e = Epoch.from_iso("2031-03-20T12:00:00 UTC")
            tai = e.to("TAI")
            assert e.iso(0) == "2031-03-20T12:00:00 UTC"
    assert raw_offset_s(tai, e) == pytest.approx(37.0, abs=1e-6)
    assert "leap-second table expiry" in caplog.text


# --- bad input ---------------------------------------------------------------------------
@pytest.mark.parametrize(
    "text, fragment",
    [
        ("2031-03-20T12:00:00 UTX", "'UTX'"),
        ("2031/03/20 12:00:00 UTC", "'2031/03/20 12:00:00 UTC'"),
        ("2031-13-20T12:00:00 UTC", "2031-13-20"),
        ("2031-02-30T12:00:00 UTC", "2031-02-30"),
        ("2031-03-20T25:00:00 UTC", "2031-03-20T25"),
        ("2031-03-20T12:00:00", "no time scale"),
        ("yesterday", "'yesterday'"),
        ("1955-01-01T00:00:00 UTC", "1960"),
    ],
)
def test_bad_iso_raises_valueerror_naming_text(text, fragment):
    with pytest.raises(ValueError) as info:
        Epoch.from_iso(text)
    assert fragment in str(info.value)


def test_bad_scale_and_conflicts():
    with pytest.raises(ValueError, match="'XYZ'.*expected one of UTC, TAI, TT, TDB, GPS, UT1"):
        Epoch.from_jd(2451545.0, 0.0, "XYZ")
    with pytest.raises(ValueError, match="'TCB'"):
        Epoch.from_iso("2020-01-01T00:00:00 TT").to("TCB")
    with pytest.raises(ValueError, match="names scale TT"):
        Epoch.from_iso("2020-01-01T00:00:00 TT", scale="UTC")
    with pytest.raises(ValueError, match="finite"):
        Epoch.from_jd(float("nan"), 0.0, "TT")
    with pytest.raises(TypeError):
        Epoch.from_iso("2020-01-01T00:00:00 TT") + "10"


def test_epoch_is_immutable_and_normalised():
    e = Epoch.from_jd(2451545.0, 0.25, "TT")
    assert e.jd1 == 2451544.5 and e.jd2 == 0.75
    with pytest.raises(AttributeError):
        e.jd1 = 0.0  # type: ignore[misc]
    assert e == Epoch.from_jd(2451544.5, 0.75, "TT")
    assert hash(e) == hash(Epoch.from_jd(2451544.5, 0.75, "TT"))
