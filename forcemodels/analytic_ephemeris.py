"""Low-precision analytic geocentric Sun and Moon positions (fallback for DE421).

Method: the truncated series of Montenbruck & Gill, *Satellite Orbits* (Springer, 2000),
section 3.3.2 ("low precision solar and lunar coordinates"): the Sun from a Keplerian
orbit of the Earth with the two largest terms of the equation of the centre, the Moon
from the largest periodic
terms of Brown's lunar theory in longitude, latitude and distance).  Both give ecliptic
coordinates referred to the mean equinox and ecliptic of J2000; they are rotated to the
equator by R_x(-eps) with the J2000 obliquity eps = 23.43929111 deg (IAU 1976).

Frame: the result is in the mean equator and equinox of J2000 (EME2000).  GCRF differs
from EME2000 by the frame bias (about 23 mas, IERS Conventions 2010 section 5.5.2),
far below the accuracy of these series, so the result is used as GCRF unchanged.

Time argument: T = Julian centuries of TT since J2000.0 (TT and TDB differ by < 2 ms,
irrelevant at this accuracy).

Accuracy (documented bounds, checked against DE421 over 1900-2100 in
tests/test_ephemeris.py; measured maxima in brackets):

    Sun direction   < ANALYTIC_SUN_DIR_DEG  = 0.02 deg   (0.0143 deg)
    Sun distance    < ANALYTIC_SUN_REL_DIST = 2e-4 rel.  (1.1e-4)
    Moon direction  < ANALYTIC_MOON_DIR_ARCMIN = 6 arcmin (5.2 arcmin)
    Moon distance   < ANALYTIC_MOON_DIST_M = 600 km      (492 km)

(The book quotes roughly 0.1-1 % for these series, from memory.)  Effect on orbits:
a 0.02 deg Sun error changes the solar tide at GNSS radius by ~1e-9 m/s^2 and shifts
shadow entry by ~3 s; the Moon error changes the lunar tide by ~2e-8 m/s^2 at GNSS
radius -- adequate for a fallback, not for precise work.

Validity: the mean arguments are linear in T (quadratic and higher terms dropped), so
the errors grow away from J2000.  longarc accepts the series only for
|T| <= ANALYTIC_VALID_CENTURIES (5 centuries: years 1500-2500) and refuses other dates
at table-build time (see :func:`forcemodels.ephemeris.build_sun_moon_table`).  The
limit is our own choice (common practice: a few centuries around the fit epoch).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from propagator.constants import ARCSEC_TO_RAD, OBLIQUITY_J2000_IAU1976_ARCSEC

ANALYTIC_VALID_CENTURIES: float = 5.0
"""Accepted |T| (Julian centuries TT from J2000) for the analytic series (our choice)."""
ANALYTIC_SUN_DIR_DEG: float = 0.02
ANALYTIC_SUN_REL_DIST: float = 2e-4
ANALYTIC_MOON_DIR_ARCMIN: float = 6.0
ANALYTIC_MOON_DIST_M: float = 600e3

_EPS = OBLIQUITY_J2000_IAU1976_ARCSEC * ARCSEC_TO_RAD
_COS_EPS = math.cos(_EPS)
_SIN_EPS = math.sin(_EPS)
_TWO_PI = 2.0 * math.pi

# ---- data: Montenbruck & Gill (2000) sec. 3.3.2 ----------------------------------------
# Sun: mean anomaly [rev] = M0 + M1 T; Omega + omega = 282.9400 deg.
_SUN_M0, _SUN_M1 = 0.9931267, 99.9973583
_SUN_OMEGA_PLUS_OMEGA_REV = 0.7859453
# Sidereal motion of the Earth's perihelion (w.r.t. the fixed J2000 equinox) [rev/century]:
# 0.32327364 deg/cy, E. M. Standish, "Keplerian Elements for Approximate Positions of the
# Major Planets", JPL Solar System Dynamics, Table 1, EM barycentre (from memory).  The book
# keeps Omega + omega fixed, which costs 0.32 deg per century away from J2000; adding the
# drift keeps the Sun direction at the 0.01 deg level over 1900-2100.
_SUN_PERIHELION_RATE_REV = 0.32327364 / 360.0
_SUN_EQC = (6892.0, 72.0)                          # equation of centre [arcsec]: sin M, sin 2M
_SUN_R = (149.619e9, -2.499e9, -0.021e9)           # distance [m]: 1, cos M, cos 2M

# Moon: mean arguments [rev] = a + b T.
# L0: mean longitude (referred to the J2000 equinox), l: Moon's mean anomaly,
# lp: Sun's mean anomaly, F: mean argument of latitude, D: mean elongation Moon-Sun.
_MOON_L0 = (0.606433, 1336.851344)
_MOON_L = (0.374897, 1325.552410)
_MOON_LP = (0.993133, 99.997361)
_MOON_F = (0.259086, 1342.227825)
_MOON_D = (0.827361, 1236.853086)
# Longitude perturbation [arcsec]: coefficient, multipliers of (l, lp, F, D).
_MOON_DLON = np.array([
    [22640.0, 1, 0, 0, 0],
    [-4586.0, 1, 0, 0, -2],
    [2370.0, 0, 0, 0, 2],
    [769.0, 2, 0, 0, 0],
    [-668.0, 0, 1, 0, 0],
    [-412.0, 0, 0, 2, 0],
    [-212.0, 2, 0, 0, -2],
    [-206.0, 1, 1, 0, -2],
    [192.0, 1, 0, 0, 2],
    [-165.0, 0, 1, 0, -2],
    [-125.0, 0, 0, 0, 1],
    [-110.0, 1, 1, 0, 0],
    [148.0, 1, -1, 0, 0],
    [-55.0, 0, 0, 2, -2],
])
# Latitude: 18520" sin(S) with S = F + (dlon + 412" sin 2F + 541" sin lp),
# plus N [arcsec]: coefficient, multipliers of (l, lp, F, D).
_MOON_LAT_MAIN = 18520.0
_MOON_LAT_S = (412.0, 541.0)
_MOON_DLAT = np.array([
    [-526.0, 0, 0, 1, -2],
    [44.0, 1, 0, 1, -2],
    [-31.0, -1, 0, 1, -2],
    [-23.0, 0, 1, 1, -2],
    [11.0, 0, -1, 1, -2],
    [-25.0, -2, 0, 1, 0],
    [21.0, -1, 0, 1, 0],
])
# Distance [m]: constant, then coefficient, multipliers of (l, lp, F, D) (cosines).
_MOON_R0 = 385000e3
_MOON_DR = np.array([
    [-20905e3, 1, 0, 0, 0],
    [-3699e3, -1, 0, 0, 2],
    [-2956e3, 0, 0, 0, 2],
    [-570e3, 2, 0, 0, 0],
    [246e3, 2, 0, 0, -2],
    [-205e3, 0, 1, 0, -2],
    [-171e3, 1, 0, 0, 2],
    [-152e3, 1, 1, 0, -2],
])


@njit
def _frac(x):
    return x - math.floor(x)


@njit
def _ecliptic_to_gcrf(r, lon, lat, out):
    """out = R_x(-eps) (r cos(lat) cos(lon), r cos(lat) sin(lon), r sin(lat)) [m]."""
    cb = math.cos(lat)
    x = r * cb * math.cos(lon)
    y = r * cb * math.sin(lon)
    z = r * math.sin(lat)
    out[0] = x
    out[1] = _COS_EPS * y - _SIN_EPS * z
    out[2] = _SIN_EPS * y + _COS_EPS * z


@njit
def sun_position_analytic_nb(T, out):
    """Geocentric Sun position [m], EME2000 ~ GCRF, at T Julian centuries TT from J2000.

    Montenbruck & Gill (2000) sec. 3.3.2: M = mean anomaly,
    lambda = (Omega + omega) + M + 6892" sin M + 72" sin 2M (ecliptic latitude 0), with the
    perihelion's sidereal drift 0.3233 deg/century added to Omega + omega (see data section),
    r = 149.619e9 - 2.499e9 cos M - 0.021e9 cos 2M m, then R_x(-eps).
    """
    M = _TWO_PI * _frac(_SUN_M0 + _SUN_M1 * T)
    lon = _TWO_PI * _frac(_SUN_OMEGA_PLUS_OMEGA_REV + _SUN_PERIHELION_RATE_REV * T + M / _TWO_PI
                          + (_SUN_EQC[0] * math.sin(M) + _SUN_EQC[1] * math.sin(2.0 * M)) / 1296.0e3)
    r = _SUN_R[0] + _SUN_R[1] * math.cos(M) + _SUN_R[2] * math.cos(2.0 * M)
    _ecliptic_to_gcrf(r, lon, 0.0, out)


@njit
def moon_position_analytic_nb(T, out):
    """Geocentric Moon position [m], EME2000 ~ GCRF, at T Julian centuries TT from J2000.

    Montenbruck & Gill (2000) sec. 3.3.2 (mean arguments, 14 longitude terms,
    8 latitude terms, 9 distance terms), then R_x(-eps).
    """
    L0 = _frac(_MOON_L0[0] + _MOON_L0[1] * T)
    args = np.empty(4)
    args[0] = _TWO_PI * _frac(_MOON_L[0] + _MOON_L[1] * T)
    args[1] = _TWO_PI * _frac(_MOON_LP[0] + _MOON_LP[1] * T)
    args[2] = _TWO_PI * _frac(_MOON_F[0] + _MOON_F[1] * T)
    args[3] = _TWO_PI * _frac(_MOON_D[0] + _MOON_D[1] * T)
    dlon = 0.0
    for i in range(_MOON_DLON.shape[0]):
        ang = 0.0
        for j in range(4):
            ang += _MOON_DLON[i, j + 1] * args[j]
        dlon += _MOON_DLON[i, 0] * math.sin(ang)
    lon = _TWO_PI * _frac(L0 + dlon / 1296.0e3)
    S = args[2] + (dlon + _MOON_LAT_S[0] * math.sin(2.0 * args[2])
                   + _MOON_LAT_S[1] * math.sin(args[1])) * ARCSEC_TO_RAD
    lat = _MOON_LAT_MAIN * math.sin(S)
    for i in range(_MOON_DLAT.shape[0]):
        ang = 0.0
        for j in range(4):
            ang += _MOON_DLAT[i, j + 1] * args[j]
        lat += _MOON_DLAT[i, 0] * math.sin(ang)
    lat *= ARCSEC_TO_RAD
    r = _MOON_R0
    for i in range(_MOON_DR.shape[0]):
        ang = 0.0
        for j in range(4):
            ang += _MOON_DR[i, j + 1] * args[j]
        r += _MOON_DR[i, 0] * math.cos(ang)
    _ecliptic_to_gcrf(r, lon, lat, out)
