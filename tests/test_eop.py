"""Tests for propagator.eop (finals2000A parsing, interpolation, out-of-span policies)."""

from __future__ import annotations

import logging

import numpy as np
import pytest

from propagator import eop
from propagator.constants import ARCSEC_TO_RAD
from propagator.eop import EOPRangeError, default_eop_file, eop_at, get_eop_table, lod_at

MAS = ARCSEC_TO_RAD / 1000.0


def _raw_rows() -> dict[float, str]:
    """The finals2000A.all records keyed by MJD, read independently of the module."""
    rows = {}
    for line in default_eop_file().read_text().splitlines():
        if line.strip():
            rows[float(line[7:15])] = line.ljust(187)
    return rows


@pytest.fixture(scope="module")
def rows():
    return _raw_rows()


def test_table_span_and_layout(rows):
    tab = get_eop_table()
    # "all EOP values since 02 January 1973" (ReadMe.finals2000A) = MJD 41684
    assert tab.first_mjd == 41684.0
    assert np.all(np.diff(tab.mjd) == 1.0)
    # the span ends at the last record with a UT1-UTC value (bytes 59-68)
    last_ut1 = max(m for m, line in rows.items() if line[58:68].strip())
    assert tab.last_mjd == last_ut1
    assert tab.predicted_from_mjd < tab.last_mjd  # predictions exist at the end
    assert tab.cpo_last_mjd <= tab.last_mjd


def test_node_values_use_bulletin_b_then_a(rows):
    # 2017-01-01 (MJD 57754) has Bulletin B values; bytes per ReadMe.finals2000A
    line = rows[57754.0]
    xp, yp, dut1, dx, dy = eop_at(57754.0)
    assert xp == pytest.approx(float(line[134:144]) * ARCSEC_TO_RAD, abs=1e-18)
    assert yp == pytest.approx(float(line[144:154]) * ARCSEC_TO_RAD, abs=1e-18)
    assert dut1 == pytest.approx(float(line[154:165]), abs=1e-12)
    assert dx == pytest.approx(float(line[165:175]) * MAS, abs=1e-20)
    assert dy == pytest.approx(float(line[175:185]) * MAS, abs=1e-20)
    # a predicted row (no Bulletin B): Bulletin A values
    tab = get_eop_table()
    m = tab.predicted_from_mjd + 20.0
    line = rows[m]
    assert line[154:165].strip() == ""
    xp, yp, dut1, dx, dy = eop_at(m)
    assert xp == pytest.approx(float(line[18:27]) * ARCSEC_TO_RAD, abs=1e-18)
    assert yp == pytest.approx(float(line[37:46]) * ARCSEC_TO_RAD, abs=1e-18)
    assert dut1 == pytest.approx(float(line[58:68]), abs=1e-12)


def test_leap_second_jump_is_in_utc_not_in_ut1():
    # 2017-01-01 leap second (IERS Bulletin C 52): UT1-UTC jumps by +1 s, UT1-TAI is smooth
    eps = 1e-7  # d, ~9 ms
    before = eop_at(57754.0 - eps)[2]
    after = eop_at(57754.0)[2]
    assert after - before == pytest.approx(1.0, abs=1e-6)
    # away from the jump, UT1-UTC changes by ~LOD per day (~1 ms), not by seconds
    d = np.diff(eop_at(np.linspace(57750.0, 57753.99, 50))[2])
    assert np.max(np.abs(d)) < 1e-4


def test_vectorised_shapes():
    m = np.array([[58000.25, 58001.5], [59000.0, 60000.75]])
    out = eop_at(m)
    assert len(out) == 5 and all(a.shape == m.shape for a in out)
    scal = eop_at(58000.25)
    assert all(isinstance(a, float) for a in scal)
    assert scal[2] == out[2][0, 0]
    assert lod_at(m).shape == m.shape


def test_interpolation_passes_through_nodes_and_is_smooth():
    tab = get_eop_table()
    i = np.arange(100, tab.mjd.size - 100, 997)
    xp, yp, dut1, dx, dy = eop_at(tab.mjd[i])
    np.testing.assert_allclose(xp, tab.xp[i], rtol=0, atol=1e-18)
    np.testing.assert_allclose(dut1, tab.ut1_utc[i], rtol=0, atol=1e-12)
    # mid-day values stay between sensible bounds of neighbouring nodes (no ringing):
    # |value - mean of the two neighbours| < 0.1 ms in UT1 over 1995-2026
    sel = (tab.mjd > 50000) & (tab.mjd < tab.predicted_from_mjd - 1)
    m = tab.mjd[sel][:-1] + 0.5
    ut1_tai = eop_at(m)[2] - eop._tai_minus_utc(m)
    k = np.flatnonzero(sel)[:-1]
    mean = 0.5 * (tab.ut1_tai[k] + tab.ut1_tai[k + 1])
    assert np.max(np.abs(ut1_tai - mean)) < 1e-4


def test_lod_from_ut1_interpolant_matches_tabulated_lod(rows):
    # LOD = -d(UT1-UTC)/dt (IERS definition of excess length of day); the tabulated
    # Bulletin A LOD (bytes 80-86, ms; an independent GNSS-based series) agrees with
    # the derivative of UT1 to a few 0.01 ms rms (measured 0.023 ms rms, 2000-2026).
    tab = get_eop_table()
    mjd, lod_tab = [], []
    for m, line in rows.items():
        if 51544.0 <= m <= tab.predicted_from_mjd - 1 and line[79:86].strip():
            mjd.append(m)
            lod_tab.append(float(line[79:86]) * 1e-3)
    mjd = np.array(mjd)
    d = lod_at(mjd) - np.array(lod_tab)
    assert mjd.size > 5000
    assert np.sqrt(np.mean(d**2)) < 0.05e-3
    # a sign or unit error would be of the size of LOD itself (~1 ms)
    assert np.sqrt(np.mean(np.array(lod_tab) ** 2)) > 0.3e-3


@pytest.mark.parametrize("mjd, date", [(33282.0, "1950-01-01"), (88069.0, "2100-01-01")])
def test_out_of_span_raises_with_epoch_and_span(mjd, date):
    with pytest.raises(EOPRangeError) as info:
        eop_at(mjd)
    msg = str(info.value)
    assert f"{mjd:.6f}" in msg and date in msg
    assert "1973-01-02" in msg  # table start
    tab = get_eop_table()
    assert f"MJD {tab.last_mjd:.1f}" in msg  # table end
    assert isinstance(info.value, ValueError)
    with pytest.raises(EOPRangeError):
        lod_at(mjd)


def test_policies_zero_and_hold_log(caplog):
    tab = get_eop_table()
    m = np.array([30000.0, 50000.0, 90000.0])
    with caplog.at_level(logging.WARNING, logger="propagator.eop"):
        xp, yp, dut1, dx, dy = eop_at(m, policy="zero")
    assert "policy 'zero'" in caplog.text and "2 epoch(s)" in caplog.text
    assert xp[0] == yp[0] == dut1[0] == dx[0] == dy[0] == 0.0
    assert dut1[2] == 0.0 and dut1[1] != 0.0
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="propagator.eop"):
        xp, yp, dut1, dx, dy = eop_at(m, policy="hold")
    assert "policy 'hold'" in caplog.text
    assert xp[0] == tab.xp[0] and dut1[0] == tab.ut1_utc[0]
    assert yp[2] == tab.yp[-1] and dut1[2] == tab.ut1_utc[-1] and dx[2] == tab.dx[-1]
    # inside the span no warning, identical results for every policy
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="propagator.eop"):
        a = eop_at(55000.3, policy="zero")
    assert a == eop_at(55000.3) and caplog.text == ""


def test_bad_policy_and_nan():
    with pytest.raises(ValueError, match="unknown EOP policy 'ignore'"):
        eop_at(55000.0, policy="ignore")
    with pytest.raises(ValueError, match="finite"):
        eop_at(float("nan"))
