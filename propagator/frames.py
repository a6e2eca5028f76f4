"""Reference frames: GCRF <-> ITRF, RIC (radial/in-track/cross-track), WGS84 geodetic.

GCRF -> ITRF follows the CIO-based IAU 2006/2000A procedure of IERS Conventions 2010,
chapter 5 (eq. 5.1: [ITRS] = W^T(t) R^T(t) Q^T(t) [GCRS]), evaluated with pyerfa:

* Q: CIP coordinates X, Y and CIO locator s from ``erfa.xys06a`` (IAU 2006
  precession + IAU 2000A nutation), plus the IERS celestial pole offsets dX, dY added
  to X, Y (IERS Conventions 2010 section 5.5.4); matrix from ``erfa.c2ixys``.
* R: Earth rotation angle ``erfa.era00`` (IERS Conventions 2010 eq. 5.15) of UT1.
* W: polar motion ``erfa.pom00`` with xp, yp from the EOP table and the TIO
  locator s' from ``erfa.sp00`` (eq. 5.13).

EOP (xp, yp, UT1-UTC, dX, dY) come from `propagator.eop` (daily values, cubic-spline
interpolation, no sub-daily tidal/libration terms).

Velocity: v_ITRF = R v_GCRF - omega x r_ITRF with omega = W ez * dERA/dt, where
dERA/dt = 2 pi 1.00273781191135448 / 86400 s x (1 - LOD/86400 s) [rad/s] (derivative of
IERS Conventions 2010 eq. 5.15; LOD from the UT1 interpolant).  The slow rotation of
the CIP (precession-nutation, < 2e-11 rad/s) and of the pole (polar motion, ~1e-13
rad/s) are neglected: at most 2e-11 rad/s x |r| (~0.5 mm/s at 26,600 km).
"""

from __future__ import annotations

import erfa
import numpy as np

from propagator import eop
from propagator.constants import (
    ERA_RATE_TURNS_PER_UT1_DAY,
    MJD_ZERO,
    SECONDS_PER_DAY,
    TWO_PI,
    WGS84_A,
    WGS84_F,
)
from propagator.timescales import Epoch, convert_jd, quiet_dubious_year

__all__ = [
    "ERA_RATE_RAD_S",
    "rotation_parts",
    "gcrf_to_itrf_matrices",
    "gcrf_to_itrf_matrix",
    "gcrf_to_itrf",
    "itrf_to_gcrf",
    "ric_matrix",
    "to_ric",
    "geodetic_to_itrf",
    "itrf_to_geodetic",
]

ERA_RATE_RAD_S: float = TWO_PI * ERA_RATE_TURNS_PER_UT1_DAY / SECONDS_PER_DAY
"""dERA/dUT1 [rad per UT1 second] (IERS Conventions 2010 eq. 5.15)."""


# --------------------------------------------------------------------------------------
# GCRF <-> ITRF
# --------------------------------------------------------------------------------------
def rotation_parts(tt_jd1, tt_jd2, eop_policy: str = "error", cip_offsets: bool = True) -> dict:
    """Slowly varying ingredients of the GCRF -> ITRF rotation at TT Julian dates.

    Vectorised over ``tt_jd1 + tt_jd2`` (two-part JD, TT).  Returns a dict of arrays:
    ``x, y`` (CIP coordinates incl. dX, dY if ``cip_offsets``) [rad], ``s`` (CIO
    locator) [rad], ``xp, yp`` [rad], ``sp`` (TIO locator s') [rad], ``era`` [rad],
    ``ut1_minus_tt`` [s], ``omega`` (Earth rotation rate, dERA/dTT) [rad/s],
    ``ut1_jd1, ut1_jd2`` [d].  ``cip_offsets=False`` omits dX, dY (the plain IAU
    2006/2000A model, as e.g. astropy's GCRS->ITRS uses).  Before the EOP table,
    ``eop_policy="error"`` raises `EOPRangeError`; with "zero"/"hold", epochs before 1960
    still raise ``ValueError`` because UTC (needed for the EOP lookup) is undefined.
    """
    if eop_policy not in eop.EOP_POLICIES:
        raise ValueError(
            f"unknown EOP policy {eop_policy!r}; expected one of {', '.join(eop.EOP_POLICIES)}"
        )
    tt1 = np.array(tt_jd1, dtype=np.float64, ndmin=1)
    tt2 = np.array(tt_jd2, dtype=np.float64, ndmin=1)
    tt1, tt2 = np.broadcast_arrays(tt1, tt2)
    tab = eop.get_eop_table()
    mjd_tt = (tt1 - MJD_ZERO) + tt2
    if eop_policy == "error" and np.any(mjd_tt < tab.first_mjd - 1.0):
        # Clearly before the table (TT - UTC < 1 d): report the EOP span rather than
        # failing later in the UTC conversion (UTC is undefined before 1960).
        eop.eop_at(mjd_tt, policy="error")
    utc1, utc2 = convert_jd(tt1, tt2, "TT", "UTC")
    mjd_utc = (utc1 - MJD_ZERO) + utc2
    xp, yp, dut1, dx, dy, lod = eop.eop_and_lod_at(mjd_utc, eop_policy)
    with quiet_dubious_year():  # see timescales.quiet_dubious_year
        ut1_1, ut1_2 = erfa.utcut1(utc1, utc2, dut1)
    x, y, s = erfa.xys06a(tt1, tt2)
    if cip_offsets:
        x = x + dx
        y = y + dy
    return {
        "x": x,
        "y": y,
        "s": s,
        "xp": np.asarray(xp, dtype=np.float64),
        "yp": np.asarray(yp, dtype=np.float64),
        "sp": erfa.sp00(tt1, tt2),
        "era": erfa.era00(ut1_1, ut1_2),
        "ut1_minus_tt": ((ut1_1 - tt1) + (ut1_2 - tt2)) * SECONDS_PER_DAY,
        "omega": ERA_RATE_RAD_S * (1.0 - np.asarray(lod) / SECONDS_PER_DAY),
        "ut1_jd1": ut1_1,
        "ut1_jd2": ut1_2,
    }


def _matrices_from_parts(p: dict) -> tuple[np.ndarray, np.ndarray]:
    """(R (n,3,3) with r_itrf = R r_gcrf, omega vector in ITRF (n,3) [rad/s])."""
    rc2i = erfa.c2ixys(p["x"], p["y"], p["s"])
    rpom = erfa.pom00(p["xp"], p["yp"], p["sp"])
    r = erfa.c2tcio(rc2i, p["era"], rpom)
    w_itrf = rpom[..., :, 2] * np.asarray(p["omega"])[..., None]  # W ez omega
    return r, w_itrf


def gcrf_to_itrf_matrices(
    tt_jd1, tt_jd2, eop_policy: str = "error", cip_offsets: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """Rotation matrices R (n,3,3) with r_ITRF = R r_GCRF at TT dates, and the Earth
    rotation vector in ITRF (n,3) [rad/s].  Vectorised form of `gcrf_to_itrf_matrix`."""
    return _matrices_from_parts(rotation_parts(tt_jd1, tt_jd2, eop_policy, cip_offsets))


def gcrf_to_itrf_matrix(
    epoch: Epoch, eop_policy: str = "error", cip_offsets: bool = True
) -> np.ndarray:
    """R (3,3) with r_ITRF = R r_GCRF at ``epoch`` (any scale); method in module docstring."""
    tt = epoch.to("TT", eop_policy=eop_policy)
    return gcrf_to_itrf_matrices(tt.jd1, tt.jd2, eop_policy, cip_offsets)[0][0]


def _as_vectors(a, name: str) -> np.ndarray:
    arr = np.asarray(a, dtype=np.float64)
    if arr.shape[-1:] != (3,) or arr.ndim > 2:
        raise ValueError(f"{name} must have shape (3,) or (n, 3), got {arr.shape}")
    return arr


def gcrf_to_itrf(
    epoch: Epoch, r, v=None, eop_policy: str = "error", cip_offsets: bool = True
) -> "np.ndarray | tuple[np.ndarray, np.ndarray]":
    """GCRF -> ITRF position [m] (and velocity [m/s]) at ``epoch`` (any scale).

    ``r``, ``v``: shape (3,) or (n, 3), all at the same epoch.  Returns ``r_itrf`` or
    ``(r_itrf, v_itrf)``; v_ITRF = R v - omega x r_ITRF (see module docstring).
    """
    r = _as_vectors(r, "r")
    tt = epoch.to("TT", eop_policy=eop_policy)
    rot, w = gcrf_to_itrf_matrices(tt.jd1, tt.jd2, eop_policy, cip_offsets)
    rot, w = rot[0], w[0]
    r_itrf = r @ rot.T
    if v is None:
        return r_itrf
    v = _as_vectors(v, "v")
    v_itrf = v @ rot.T - np.cross(w, r_itrf)
    return r_itrf, v_itrf


def itrf_to_gcrf(
    epoch: Epoch, r, v=None, eop_policy: str = "error", cip_offsets: bool = True
) -> "np.ndarray | tuple[np.ndarray, np.ndarray]":
    """ITRF -> GCRF position [m] (and velocity [m/s]); inverse of `gcrf_to_itrf`:
    r = R^T r_ITRF, v = R^T (v_ITRF + omega x r_ITRF)."""
    r = _as_vectors(r, "r")
    tt = epoch.to("TT", eop_policy=eop_policy)
    rot, w = gcrf_to_itrf_matrices(tt.jd1, tt.jd2, eop_policy, cip_offsets)
    rot, w = rot[0], w[0]
    r_gcrf = r @ rot
    if v is None:
        return r_gcrf
    v = _as_vectors(v, "v")
    v_gcrf = (v + np.cross(w, r)) @ rot
    return r_gcrf, v_gcrf


# --------------------------------------------------------------------------------------
# RIC
# --------------------------------------------------------------------------------------
def ric_matrix(r, v) -> np.ndarray:
    """Rows: radial R = r/|r|, in-track I = C x R, cross-track C = (r x v)/|r x v|.

    ``r``, ``v`` shape (3,) or (n, 3) (same frame); returns (3,3) or (n,3,3) such that
    ``x_ric = M @ x``.
    """
    r = _as_vectors(r, "r")
    v = _as_vectors(v, "v")
    h = np.cross(r, v)
    rn = np.linalg.norm(r, axis=-1, keepdims=True)
    hn = np.linalg.norm(h, axis=-1, keepdims=True)
    if np.any(rn == 0.0) or np.any(hn == 0.0):
        raise ValueError("RIC frame undefined: r is zero or r and v are parallel")
    e_r = r / rn
    e_c = h / hn
    e_i = np.cross(e_c, e_r)
    return np.stack([e_r, e_i, e_c], axis=-2)


def to_ric(dr, r_ref, v_ref) -> np.ndarray:
    """Components of ``dr`` (3,) or (n,3) in the RIC frame of (r_ref, v_ref) [same units]."""
    m = ric_matrix(r_ref, v_ref)
    dr = _as_vectors(dr, "dr")
    return np.einsum("...ij,...j->...i", m, dr)


# --------------------------------------------------------------------------------------
# WGS84 geodetic
# --------------------------------------------------------------------------------------
_E2 = WGS84_F * (2.0 - WGS84_F)
_B = WGS84_A * (1.0 - WGS84_F)
_EP2 = _E2 / (1.0 - _E2)


def geodetic_to_itrf(lat, lon, h) -> np.ndarray:
    """WGS84 geodetic latitude, longitude [rad], ellipsoidal height [m] -> ITRF xyz [m].

    Standard closed form (common practice; the ellipsoid is WGS84 per NIMA TR8350.2):
    N = a / sqrt(1 - e^2 sin^2 lat),
    x = (N+h) cos lat cos lon, y = (N+h) cos lat sin lon, z = (N(1-e^2)+h) sin lat.
    Broadcasts; output shape (..., 3).
    """
    lat, lon, h = np.broadcast_arrays(
        np.asarray(lat, dtype=np.float64), np.asarray(lon, dtype=np.float64),
        np.asarray(h, dtype=np.float64),
    )
    sl, cl = np.sin(lat), np.cos(lat)
    n = WGS84_A / np.sqrt(1.0 - _E2 * sl * sl)
    return np.stack(
        [(n + h) * cl * np.cos(lon), (n + h) * cl * np.sin(lon), (n * (1.0 - _E2) + h) * sl],
        axis=-1,
    )


def itrf_to_geodetic(r) -> tuple:
    """ITRF xyz [m] (shape (3,) or (n,3)) -> WGS84 (lat [rad], lon [rad], h [m]).

    Bowring's method (B. R. Bowring, "Transformation from spatial to geographical
    coordinates", Survey Review 23(181), 1976 -- citation from memory), iterated four
    times on the parametric latitude: the round trip is measured < 1e-14 rad in
    latitude and < 0.1 um in position for heights from -400 m to GEO
    (tests/test_frames.py); not meant for points deep inside the Earth.
    Height from h = p cos(lat) + z sin(lat) - a sqrt(1 - e^2 sin^2 lat), valid at the
    poles too.
    """
    r = _as_vectors(r, "r")
    x, y, z = r[..., 0], r[..., 1], r[..., 2]
    p = np.hypot(x, y)
    lon = np.arctan2(y, x)
    beta = np.arctan2(z, (1.0 - WGS84_F) * p)
    lat = beta
    for _ in range(4):
        sb, cb = np.sin(beta), np.cos(beta)
        lat = np.arctan2(z + _EP2 * _B * sb**3, p - _E2 * WGS84_A * cb**3)
        beta = np.arctan2((1.0 - WGS84_F) * np.sin(lat), np.cos(lat))
    sl = np.sin(lat)
    h = p * np.cos(lat) + z * sl - WGS84_A * np.sqrt(1.0 - _E2 * sl * sl)
    if r.ndim == 1:
        return float(lat), float(lon), float(h)
    return lat, lon, h
