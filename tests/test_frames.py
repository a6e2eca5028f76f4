"""Tests for propagator.frames (GCRF <-> ITRF, RIC, WGS84 geodetic)."""

from __future__ import annotations

import logging

import erfa
import numpy as np
import pytest

from propagator.constants import OMEGA_EARTH, WGS84_A
from propagator.eop import EOPRangeError, eop_at, lod_at
from propagator.frames import (
    ERA_RATE_RAD_S,
    geodetic_to_itrf,
    gcrf_to_itrf,
    gcrf_to_itrf_matrix,
    itrf_to_gcrf,
    itrf_to_geodetic,
    ric_matrix,
    rotation_parts,
    to_ric,
)
from propagator.timescales import Epoch

R_SURF = 6378137.0
# Points on the Earth's surface sphere along the axes and a generic direction.
SURFACE_POINTS = R_SURF * np.array(
    [[1.0, 0, 0], [0, 1.0, 0], [0, 0, 1.0], [0.6, 0.64, 0.48], [-0.48, 0.6, -0.64]]
)
# 0h UTC dates (EOP nodes, see test_gcrf_to_itrf_matches_astropy), 2000-2026
NODE_DATES = [
    "2000-01-01",
    "2004-03-15",
    "2008-08-08",
    "2012-07-01",
    "2016-12-31",
    "2017-01-01",
    "2020-02-29",
    "2024-09-10",
    "2026-11-20",
]


@pytest.fixture(scope="module")
def astropy_env():
    """astropy, offline, using the same finals2000A file (IERS_A: Bulletin B where
    present, else A) instead of IERS_Auto (which splices in EOP C04 values)."""
    pytest.importorskip("astropy")
    from astropy.utils import iers

    iers.conf.auto_download = False
    iers.earth_orientation_table.set(iers.IERS_A.open(iers.IERS_A_FILE))
    import astropy.units as u
    from astropy.coordinates import GCRS, ITRS, CartesianRepresentation
    from astropy.time import Time

    return u, GCRS, ITRS, CartesianRepresentation, Time


@pytest.mark.parametrize("date", NODE_DATES)
def test_gcrf_to_itrf_matches_astropy(astropy_env, date):
    """GCRF->ITRF vs astropy GCRS->ITRS (astropy as test-only cross-check, v6+).

    astropy applies no celestial pole offsets dX, dY (it uses erfa.c2i06a), hence
    cip_offsets=False here; and it interpolates EOP linearly while longarc uses a
    cubic spline, so the comparison is made at 0h UTC, where both return the
    tabulated values.  Requirement: < 1 mm at the Earth's surface (measured ~5e-5 mm).
    """
    u, GCRS, ITRS, CartesianRepresentation, Time = astropy_env
    e = Epoch.from_iso(f"{date}T00:00:00 UTC")
    mine = gcrf_to_itrf(e, SURFACE_POINTS, cip_offsets=False)
    t = Time(f"{date}T00:00:00", scale="utc")
    g = GCRS(CartesianRepresentation(SURFACE_POINTS.T * u.m), obstime=t)
    ref = g.transform_to(ITRS(obstime=t)).cartesian.xyz.to_value(u.m).T
    assert np.max(np.linalg.norm(mine - ref, axis=1)) < 1e-3
    # with dX, dY the result moves by the CPO (~0.1-0.5 mas: a few mm at 6378 km), so
    # this comparison would notice if they were dropped or doubled
    full = gcrf_to_itrf(e, SURFACE_POINTS)
    _, _, _, dx, dy = eop_at(e.mjd)
    cpo_m = np.hypot(dx, dy) * R_SURF
    assert np.max(np.linalg.norm(full - mine, axis=1)) == pytest.approx(cpo_m, rel=0.05)


def test_matrix_matches_erfa_c2t06a_with_same_eop():
    # ERFA c2t06a (IAU 2006/2000A, CIO based, no dX dY) with our EOP values, off-node
    e = Epoch.from_iso("2019-05-17T13:47:11.5 UTC")
    tt = e.to("TT")
    ut1 = e.to("UT1")
    xp, yp, _, _, _ = eop_at(e.mjd)
    ref = erfa.c2t06a(tt.jd1, tt.jd2, ut1.jd1, ut1.jd2, xp, yp)
    mine = gcrf_to_itrf_matrix(e, cip_offsets=False)
    assert np.max(np.abs(mine - ref)) < 1e-14
    # orthonormal
    np.testing.assert_allclose(mine @ mine.T, np.eye(3), atol=1e-15)


def test_epoch_scale_does_not_matter():
    e = Epoch.from_iso("2021-06-01T12:00:00 UTC")
    r = SURFACE_POINTS[3]
    a = gcrf_to_itrf(e, r)
    for sc in ("TT", "TAI", "TDB", "GPS", "UT1"):
        b = gcrf_to_itrf(e.to(sc), r)
        assert np.max(np.abs(a - b)) < 1e-7


def test_round_trip_position_velocity():
    e = Epoch.from_iso("2023-03-03T03:03:03 TT")
    rng = np.random.default_rng(7)
    r = rng.normal(size=(20, 3)) * 1e7
    v = rng.normal(size=(20, 3)) * 3e3
    ri, vi = gcrf_to_itrf(e, r, v)
    rb, vb = itrf_to_gcrf(e, ri, vi)
    np.testing.assert_allclose(rb, r, rtol=0, atol=1e-8)
    np.testing.assert_allclose(vb, v, rtol=0, atol=1e-11)
    # the other way round too
    rg, vg = itrf_to_gcrf(e, r, v)
    r2, v2 = gcrf_to_itrf(e, rg, vg)
    np.testing.assert_allclose(r2, r, rtol=0, atol=1e-8)
    np.testing.assert_allclose(v2, v, rtol=0, atol=1e-11)
    # a single vector keeps its shape
    assert gcrf_to_itrf(e, r[0]).shape == (3,)


@pytest.mark.parametrize("radius", [R_SURF, 26.6e6])
def test_velocity_matches_finite_differences(radius):
    """v_ITRF from the omega x r formula vs central differences of r_ITRF(t) for a
    body moving uniformly in GCRF.  The formula neglects the rotation of the CIP
    (precession-nutation) and of the pole: IAU 2006 precession moves X by ~2004"/century
    (3e-12 rad/s, IERS Conventions 2010 eq. 5.16), nutation terms add < 1.2e-11 rad/s
    (0.2" at 13.66 d, 1.3" at 182.6 d, 17" at 18.6 yr; amplitudes from memory), so the
    difference must stay below 2e-11 rad/s x |r|.  The Earth-rotation term itself is
    omega |r| = 465 m/s at the surface."""
    e = Epoch.from_iso("2024-05-01T03:17:00 UTC")
    d = np.array([0.6, 0.64, 0.48])
    r0 = radius * d
    v0 = np.array([-5000.0, 4000.0, 3000.0]) * np.sqrt(R_SURF / radius)  # ~circular speed
    ri, vi = gcrf_to_itrf(e, r0, v0)
    h = 1.0
    rp = gcrf_to_itrf(e + h, r0 + v0 * h)
    rm = gcrf_to_itrf(e - h, r0 - v0 * h)
    fd = (rp - rm) / (2 * h)
    assert np.linalg.norm(fd - vi) < 2e-11 * radius + 1e-7
    # the Earth-rotation term is really there (sign and size)
    assert np.linalg.norm(vi - gcrf_to_itrf_matrix(e) @ v0) == pytest.approx(
        OMEGA_EARTH * np.linalg.norm(np.cross([0, 0, 1.0], ri)), rel=1e-4
    )


def test_rotation_rate_includes_lod():
    e = Epoch.from_iso("2018-10-10T00:00:00 UTC")
    tt = e.to("TT")
    p = rotation_parts(tt.jd1, tt.jd2)
    lod = lod_at(e.mjd)
    # d(ERA)/dt = 2 pi 1.00273781191135448 / 86400 (1 - LOD/86400) (IERS Conventions 2010
    # eq. 5.15 differentiated)
    assert p["omega"][0] == pytest.approx(ERA_RATE_RAD_S * (1 - lod / 86400.0), rel=1e-15)
    # close to the IERS nominal value 7.292115e-5 rad/s (IERS Conventions 2010 Table 1.1)
    assert abs(p["omega"][0] - OMEGA_EARTH) < 5e-12
    assert lod != 0.0


def test_eop_out_of_span_from_frames(caplog):
    r = SURFACE_POINTS[0]
    with pytest.raises(EOPRangeError, match=r"1950-01-01.*1973-01-02"):
        gcrf_to_itrf(Epoch.from_iso("1950-01-01T00:00:00 TT"), r)
    with pytest.raises(EOPRangeError, match=r"2100-06-01.*1973-01-02"):
        gcrf_to_itrf(Epoch.from_iso("2100-06-01T00:00:00 UTC"), r)
    with caplog.at_level(logging.WARNING):
        a = gcrf_to_itrf(Epoch.from_iso("2100-01-01T00:00:00 TT"), r, eop_policy="zero")
    assert "policy 'zero'" in caplog.text
    assert np.linalg.norm(a) == pytest.approx(R_SURF, abs=1e-6)
    b = gcrf_to_itrf(Epoch.from_iso("2100-01-01T00:00:00 TT"), r, eop_policy="hold")
    assert np.linalg.norm(a - b) > 1.0  # held EOP differ from zero EOP


def test_bad_vector_shapes():
    e = Epoch.from_iso("2020-01-01T00:00:00 TT")
    with pytest.raises(ValueError, match="shape"):
        gcrf_to_itrf(e, np.zeros(4))
    with pytest.raises(ValueError, match="shape"):
        gcrf_to_itrf(e, np.zeros((2, 2, 3)))


# --- RIC -----------------------------------------------------------------------------------
def test_ric_frame():
    r = np.array([7000e3, 100e3, -200e3])
    v = np.array([100.0, 7.5e3, 1.0e3])
    m = ric_matrix(r, v)
    np.testing.assert_allclose(m @ m.T, np.eye(3), atol=1e-15)
    assert np.linalg.det(m) == pytest.approx(1.0, abs=1e-15)
    np.testing.assert_allclose(m[0], r / np.linalg.norm(r), atol=1e-15)
    h = np.cross(r, v)
    np.testing.assert_allclose(m[2], h / np.linalg.norm(h), atol=1e-15)
    # v lies in the R-I plane with a positive in-track component
    assert m[2] @ v == pytest.approx(0.0, abs=1e-9)
    assert m[1] @ v == pytest.approx(np.sqrt(v @ v - (m[0] @ v) ** 2), rel=1e-14)
    # displacements along r, v-ish, h map to the axes
    np.testing.assert_allclose(to_ric(2.0 * r / np.linalg.norm(r), r, v), [2.0, 0, 0], atol=1e-12)
    np.testing.assert_allclose(to_ric(3.0 * h / np.linalg.norm(h), r, v), [0, 0, 3.0], atol=1e-12)
    # vectorised
    rr = np.stack([r, -r])
    vv = np.stack([v, v])
    out = to_ric(np.stack([r, r]), rr, vv)
    np.testing.assert_allclose(out[:, 0], [np.linalg.norm(r), -np.linalg.norm(r)], rtol=1e-14)
    with pytest.raises(ValueError, match="parallel"):
        ric_matrix(r, 2 * r)


# --- geodetic ------------------------------------------------------------------------------
LATS = np.radians([-90.0, -89.999, -45.0, -10.0, 0.0, 0.001, 33.3, 60.0, 89.99, 90.0])
LONS = np.radians([-180.0, -120.0, -45.0, 0.0, 10.0, 90.0, 135.0, 179.9, 30.0, 0.0])
HS = np.array([-400.0, 0.0, 10.0, 1500.0, 8848.0, 400e3, 20200e3, 35786e3, -5.0, 123.0])


def test_geodetic_round_trip():
    x = geodetic_to_itrf(LATS, LONS, HS)
    lat, lon, h = itrf_to_geodetic(x)
    np.testing.assert_allclose(lat, LATS, rtol=0, atol=1e-14)
    np.testing.assert_allclose(h, HS, rtol=0, atol=1e-6)
    # longitude is undefined at the poles; compare elsewhere
    ok = np.abs(np.abs(LATS) - np.pi / 2) > 1e-9
    dl = np.angle(np.exp(1j * (lon[ok] - LONS[ok])))
    assert np.max(np.abs(dl)) < 1e-14


def test_geodetic_against_erfa():
    # ERFA gd2gc / gc2gd with ellipsoid 1 = WGS84 (same a, f: NIMA TR8350.2)
    x = geodetic_to_itrf(LATS, LONS, HS)
    ref = erfa.gd2gc(1, LONS, LATS, HS)
    np.testing.assert_allclose(x, ref, rtol=0, atol=1e-6)
    rng = np.random.default_rng(3)
    # near the surface (h from -30 km to 1000 km) ERFA gc2gd is accurate to < 1e-12 rad
    # (measured here: 6e-13 rad, 3 nm in h)
    pts = rng.normal(size=(300, 3))
    pts *= (rng.uniform(6.35e6, 7.4e6, 300) / np.linalg.norm(pts, axis=1))[:, None]
    lat, lon, h = itrf_to_geodetic(pts)
    e_lon, e_lat, e_h = erfa.gc2gd(1, pts)
    np.testing.assert_allclose(lat, e_lat, rtol=0, atol=1e-12)
    np.testing.assert_allclose(lon, e_lon, rtol=0, atol=1e-14)
    np.testing.assert_allclose(h, e_h, rtol=0, atol=1e-6)
    # up to GEO ERFA's own latitude error grows to ~2.6e-11 rad (its result misses the
    # input point by ~0.8 mm, measured); ours reproduces the point to < 0.1 um
    pts = rng.normal(size=(300, 3))
    pts *= (rng.uniform(7.4e6, 4.3e7, 300) / np.linalg.norm(pts, axis=1))[:, None]
    lat, lon, h = itrf_to_geodetic(pts)
    e_lon, e_lat, e_h = erfa.gc2gd(1, pts)
    np.testing.assert_allclose(lat, e_lat, rtol=0, atol=5e-11)
    np.testing.assert_allclose(h, e_h, rtol=0, atol=1e-6)
    np.testing.assert_allclose(geodetic_to_itrf(lat, lon, h), pts, rtol=0, atol=1e-7)
    # a surface point at the equator is at a
    assert np.linalg.norm(geodetic_to_itrf(0.0, 0.0, 0.0)) == pytest.approx(WGS84_A, abs=1e-9)
