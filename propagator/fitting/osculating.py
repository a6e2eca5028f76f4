"""Osculating Keplerian and equinoctial element histories (vectorised numpy).

Conventions (SI, radians):

* Keplerian set ``(a, e, i, raan, argp, M)`` and the true anomaly ``nu``; angles in
  ``[0, 2 pi)``.  Vallado, *Fundamentals of Astrodynamics and Applications*, 4th ed.
  (2013), Algorithm 9 (RV2COE) and Algorithm 10 (COE2RV).  For an equatorial orbit the
  node line is taken along +x (``raan = 0``); for a circular orbit the eccentric
  anomaly is taken from ``atan2`` of round-off-level numbers, so only ``argp + M`` is
  meaningful there.
* Equinoctial set ``(a, h, k, p, q, lam)`` with retrograde factor ``I`` (+1 direct,
  -1 retrograde), Broucke & Cefola, "On the equinoctial orbit elements", Celestial
  Mechanics 5 (1972) 303-310; frame vectors and conversions as in Danielson, Sagovac,
  Neta & Early, *Semianalytic Satellite Theory*, NPS-MA-95-002 (1995), section 2.1
  (section numbers here and below from memory; the formulas are verified in
  tests/test_fitting_osculating.py against the Keplerian definitions):

      h = e sin(argp + I raan)          k = e cos(argp + I raan)
      p = tan(i/2)^I sin(raan)          q = tan(i/2)^I cos(raan)
      lam = M + argp + I raan           (mean longitude)

  The direct set (I = +1) is singular only at i = 180 deg, the retrograde set only at
  i = 0.  Neither is singular at e = 0.

Only elliptic orbits are handled: a hyperbolic, parabolic or rectilinear state raises
:class:`~propagator.fitting.errors.DegenerateOrbitError` naming the sample index.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from propagator.constants import GM_EARTH, TWO_PI
from propagator.fitting.errors import DegenerateOrbitError, check_arc

__all__ = [
    "OsculatingHistory",
    "osculating_history",
    "keplerian_from_cartesian",
    "equinoctial_from_cartesian",
    "cartesian_from_equinoctial",
    "keplerian_to_equinoctial",
    "equinoctial_to_keplerian",
    "equinoctial_frame",
    "solve_equinoctial_kepler",
    "wrap_2pi",
]


def wrap_2pi(x: Any) -> np.ndarray:
    """Angles reduced to ``[0, 2 pi)``."""
    return np.mod(np.asarray(x, dtype=float), TWO_PI)


def _rows(x: Any) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    return a.reshape(1, 3) if a.ndim == 1 else a


def _check_elliptic(r: np.ndarray, v: np.ndarray, gm: float) -> tuple[np.ndarray, ...]:
    """Common quantities; raise DegenerateOrbitError for a non-elliptic sample."""
    rn = np.linalg.norm(r, axis=1)
    v2 = np.einsum("ij,ij->i", v, v)
    hvec = np.cross(r, v)
    hn = np.linalg.norm(hvec, axis=1)
    bad = np.flatnonzero(rn == 0.0)
    if bad.size:
        raise DegenerateOrbitError(f"position at index {bad[0]} is at the centre", int(bad[0]), 0.0)
    # Rectilinear: angular momentum negligible compared with |r||v| (common practice threshold).
    bad = np.flatnonzero(hn <= 1e-12 * rn * np.sqrt(v2))
    if bad.size:
        i = int(bad[0])
        raise DegenerateOrbitError(
            f"rectilinear state at index {i}: angular momentum {float(hn[i])!r} m^2/s", i, float(hn[i]))
    energy = 0.5 * v2 - gm / rn
    bad = np.flatnonzero(energy >= 0.0)
    if bad.size:
        i = int(bad[0])
        evec = ((v2[i] - gm / rn[i]) * r[i] - np.dot(r[i], v[i]) * v[i]) / gm
        ecc = float(np.linalg.norm(evec))
        raise DegenerateOrbitError(
            f"state at index {i} is not elliptic (specific energy {float(energy[i])!r} J/kg >= 0, "
            f"eccentricity {ecc!r})", i, ecc)
    return rn, v2, hvec, hn, energy


def keplerian_from_cartesian(r: Any, v: Any, gm: float = GM_EARTH) -> dict[str, np.ndarray]:
    """Osculating Keplerian elements of Cartesian states (Vallado 2013, Algorithm 9).

    Args:
        r, v: positions [m] and velocities [m/s], shape (n, 3) or (3,).
        gm: gravitational parameter [m^3/s^2].

    Returns:
        dict of float64[n] arrays: ``a`` [m], ``e`` [-], ``i``, ``raan``, ``argp``, ``M``,
        ``nu`` (true anomaly), ``E`` (eccentric anomaly), ``u`` (argument of latitude) [rad].
    """
    r, v = _rows(r), _rows(v)
    rn, v2, hvec, hn, energy = _check_elliptic(r, v, gm)
    a = -gm / (2.0 * energy)
    rv = np.einsum("ij,ij->i", r, v)
    evec = ((v2 - gm / rn)[:, None] * r - rv[:, None] * v) / gm
    e = np.linalg.norm(evec, axis=1)
    hxy = np.hypot(hvec[:, 0], hvec[:, 1])
    inc = np.arctan2(hxy, hvec[:, 2])
    equatorial = hxy <= 1e-15 * hn
    raan = np.where(equatorial, 0.0, np.arctan2(hvec[:, 0], -hvec[:, 1]))
    # Node unit vector and the in-plane vector 90 deg ahead of it (w x n).
    nvec = np.stack([np.cos(raan), np.sin(raan), np.zeros_like(raan)], axis=1)
    w = hvec / hn[:, None]
    mvec = np.cross(w, nvec)
    u = np.arctan2(np.einsum("ij,ij->i", r, mvec), np.einsum("ij,ij->i", r, nvec))
    # Eccentric anomaly from e cos E = 1 - r/a, e sin E = r.v / sqrt(gm a) (standard
    # two-body identities, e.g. Battin 1999 chapter 4; from memory).
    ecosE = 1.0 - rn / a
    esinE = rv / np.sqrt(gm * a)
    E = np.arctan2(esinE, ecosE)
    nu = np.arctan2(np.sqrt(1.0 - e * e) * np.sin(E), np.cos(E) - e)
    argp = u - nu
    M = E - e * np.sin(E)
    return {"a": a, "e": e, "i": inc, "raan": wrap_2pi(raan), "argp": wrap_2pi(argp),
            "M": wrap_2pi(M), "nu": wrap_2pi(nu), "E": wrap_2pi(E), "u": wrap_2pi(u)}


def equinoctial_frame(p: Any, q: Any, retro: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit vectors f, g, w of the equinoctial frame (Danielson et al. 1995, section 2.1.4).

    Returns three float64[n, 3] arrays.
    """
    p = np.atleast_1d(np.asarray(p, dtype=float))
    q = np.atleast_1d(np.asarray(q, dtype=float))
    ii = float(retro)
    c = 1.0 / (1.0 + p * p + q * q)
    f = np.stack([1.0 - p * p + q * q, 2.0 * p * q, -2.0 * ii * p], axis=1) * c[:, None]
    g = np.stack([2.0 * ii * p * q, (1.0 + p * p - q * q) * ii, 2.0 * q], axis=1) * c[:, None]
    w = np.stack([2.0 * p, -2.0 * q, (1.0 - p * p - q * q) * ii], axis=1) * c[:, None]
    return f, g, w


def equinoctial_from_cartesian(r: Any, v: Any, gm: float = GM_EARTH, retro: int = 1
                               ) -> dict[str, np.ndarray]:
    """Osculating equinoctial elements of Cartesian states (Danielson et al. 1995, section 2.1.5).

    Args:
        r, v: positions [m], velocities [m/s], shape (n, 3) or (3,).
        gm: gravitational parameter [m^3/s^2].
        retro: retrograde factor I, +1 (direct set) or -1 (retrograde set).

    Returns:
        dict of float64[n] arrays ``a`` [m], ``h``, ``k``, ``p``, ``q`` [-], ``lam`` (mean
        longitude) and ``F`` (eccentric longitude) [rad, in [0, 2 pi)].
    """
    if retro not in (1, -1):
        raise ValueError(f"retro must be +1 or -1, got {retro!r}")
    r, v = _rows(r), _rows(v)
    rn, v2, hvec, hn, energy = _check_elliptic(r, v, gm)
    a = -gm / (2.0 * energy)
    w = hvec / hn[:, None]
    den = 1.0 + retro * w[:, 2]
    bad = np.flatnonzero(den <= 1e-12)
    if bad.size:
        i = int(bad[0])
        raise DegenerateOrbitError(
            f"state at index {i}: the {'direct' if retro == 1 else 'retrograde'} equinoctial set is "
            f"singular at inclination {np.degrees(np.arccos(np.clip(w[i, 2], -1, 1)))!r} deg", i)
    p = w[:, 0] / den
    q = -w[:, 1] / den
    f, g, _ = equinoctial_frame(p, q, retro)
    rv = np.einsum("ij,ij->i", r, v)
    evec = ((v2 - gm / rn)[:, None] * r - rv[:, None] * v) / gm
    k = np.einsum("ij,ij->i", evec, f)
    h = np.einsum("ij,ij->i", evec, g)
    X1 = np.einsum("ij,ij->i", r, f)
    Y1 = np.einsum("ij,ij->i", r, g)
    beta = 1.0 / (1.0 + np.sqrt(1.0 - h * h - k * k))
    s = a * np.sqrt(1.0 - h * h - k * k)
    cosF = k + ((1.0 - k * k * beta) * X1 - h * k * beta * Y1) / s
    sinF = h + ((1.0 - h * h * beta) * Y1 - h * k * beta * X1) / s
    F = np.arctan2(sinF, cosF)
    lam = F + h * np.cos(F) - k * np.sin(F)
    return {"a": a, "h": h, "k": k, "p": p, "q": q, "lam": wrap_2pi(lam), "F": wrap_2pi(F)}


def solve_equinoctial_kepler(lam: Any, h: Any, k: Any, tol: float = 1e-15, max_iter: int = 50
                             ) -> np.ndarray:
    """Eccentric longitude F from Kepler's equation in equinoctial form.

    Solves ``lam = F + h cos F - k sin F`` by Newton's method (Danielson et al. 1995,
    section 2.1.4); converges for any e < 1.  Returns F [rad] (same shape as ``lam``).
    """
    lam = np.asarray(lam, dtype=float)
    h = np.broadcast_to(np.asarray(h, dtype=float), lam.shape)
    k = np.broadcast_to(np.asarray(k, dtype=float), lam.shape)
    F = lam.copy()
    for _ in range(max_iter):
        sF, cF = np.sin(F), np.cos(F)
        dF = (F + h * cF - k * sF - lam) / (1.0 - h * sF - k * cF)
        F = F - dF
        if np.all(np.abs(dF) <= tol * np.maximum(1.0, np.abs(F))):
            break
    return F


def cartesian_from_equinoctial(a: Any, h: Any, k: Any, p: Any, q: Any, lam: Any,
                               gm: float = GM_EARTH, retro: int = 1
                               ) -> tuple[np.ndarray, np.ndarray]:
    """Cartesian position [m] and velocity [m/s] from equinoctial elements.

    Danielson et al. (1995), section 2.1.4: with ``beta = 1 / (1 + sqrt(1 - h^2 - k^2))``
    and the eccentric longitude ``F``,

        X1 = a [(1 - h^2 beta) cos F + h k beta sin F - k]
        Y1 = a [(1 - k^2 beta) sin F + h k beta cos F - h]
        X1' = n a^2 / r [h k beta cos F - (1 - h^2 beta) sin F]
        Y1' = n a^2 / r [(1 - k^2 beta) cos F - h k beta sin F]

    and ``r = X1 f + Y1 g``, ``v = X1' f + Y1' g``.  All arguments broadcast; returns
    two float64[n, 3] arrays.
    """
    a, h, k, p, q, lam = np.broadcast_arrays(*(np.atleast_1d(np.asarray(x, dtype=float))
                                               for x in (a, h, k, p, q, lam)))
    F = solve_equinoctial_kepler(lam, h, k)
    sF, cF = np.sin(F), np.cos(F)
    beta = 1.0 / (1.0 + np.sqrt(1.0 - h * h - k * k))
    X1 = a * ((1.0 - h * h * beta) * cF + h * k * beta * sF - k)
    Y1 = a * ((1.0 - k * k * beta) * sF + h * k * beta * cF - h)
    rn = a * (1.0 - k * cF - h * sF)
    nfac = np.sqrt(gm / a) * a / rn  # n a^2 / r with n = sqrt(gm / a^3)
    dX1 = nfac * (h * k * beta * cF - (1.0 - h * h * beta) * sF)
    dY1 = nfac * ((1.0 - k * k * beta) * cF - h * k * beta * sF)
    f, g, _ = equinoctial_frame(p, q, retro)
    r = X1[:, None] * f + Y1[:, None] * g
    v = dX1[:, None] * f + dY1[:, None] * g
    return r, v


def keplerian_to_equinoctial(a: Any, e: Any, i: Any, raan: Any, argp: Any, M: Any, retro: int = 1
                             ) -> dict[str, np.ndarray]:
    """Keplerian -> equinoctial elements (Broucke & Cefola 1972, eqs. in section 2)."""
    a, e, i, raan, argp, M = (np.asarray(x, dtype=float) for x in (a, e, i, raan, argp, M))
    zeta = argp + retro * raan
    t = np.tan(0.5 * i) if retro == 1 else 1.0 / np.tan(0.5 * i)
    return {"a": a, "h": e * np.sin(zeta), "k": e * np.cos(zeta), "p": t * np.sin(raan),
            "q": t * np.cos(raan), "lam": wrap_2pi(M + zeta)}


def equinoctial_to_keplerian(a: Any, h: Any, k: Any, p: Any, q: Any, lam: Any, retro: int = 1
                             ) -> dict[str, np.ndarray]:
    """Equinoctial -> Keplerian elements (inverse of :func:`keplerian_to_equinoctial`).

    For e = 0 the argument of perigee is set to 0; for i = 0 (direct set) the RAAN is 0.
    """
    a, h, k, p, q, lam = (np.asarray(x, dtype=float) for x in (a, h, k, p, q, lam))
    e = np.hypot(h, k)
    t = np.hypot(p, q)
    i = 2.0 * np.arctan(t) if retro == 1 else np.pi - 2.0 * np.arctan(t)
    raan = np.arctan2(p, q)
    zeta = np.arctan2(h, k)
    argp = zeta - retro * raan
    M = lam - zeta
    return {"a": a, "e": e, "i": i, "raan": wrap_2pi(raan), "argp": wrap_2pi(argp),
            "M": wrap_2pi(M)}


@dataclass
class OsculatingHistory:
    """Osculating elements along an arc (all arrays float64[n]; SI, radians).

    Keplerian: ``a, e, i, raan, argp, M, nu``; equinoctial (direct or retrograde set as
    ``retro`` says): ``h, k, p, q, lam``.
    """

    times: np.ndarray
    gm: float
    retro: int
    a: np.ndarray
    e: np.ndarray
    i: np.ndarray
    raan: np.ndarray
    argp: np.ndarray
    M: np.ndarray
    nu: np.ndarray
    u: np.ndarray
    h: np.ndarray
    k: np.ndarray
    p: np.ndarray
    q: np.ndarray
    lam: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python dict (lists of floats), JSON-serialisable."""
        out: dict[str, Any] = {"gm": self.gm, "retro": self.retro}
        for name in ("times", "a", "e", "i", "raan", "argp", "M", "nu", "u", "h", "k", "p", "q", "lam"):
            out[name] = np.asarray(getattr(self, name)).tolist()
        return out


def osculating_history(times: Any, r: Any, v: Any, gm: float = GM_EARTH, retro: int | None = None
                       ) -> OsculatingHistory:
    """Osculating Keplerian and equinoctial elements at every sample of an arc.

    Args:
        times: sample times [s] (strictly increasing).
        r, v: positions [m] and velocities [m/s], shape (n, 3), in an inertial frame.
        gm: gravitational parameter [m^3/s^2] (default IERS 2010 GM_EARTH).
        retro: equinoctial retrograde factor; default +1 if the first sample is direct
            (i < 90 deg), else -1.
    """
    t, r, v = check_arc(times, r, v)
    kep = keplerian_from_cartesian(r, v, gm)
    if retro is None:
        retro = 1 if kep["i"][0] < 0.5 * np.pi else -1
    eq = equinoctial_from_cartesian(r, v, gm, retro)
    return OsculatingHistory(times=t, gm=float(gm), retro=int(retro), a=kep["a"], e=kep["e"],
                             i=kep["i"], raan=kep["raan"], argp=kep["argp"], M=kep["M"],
                             nu=kep["nu"], u=kep["u"], h=eq["h"], k=eq["k"], p=eq["p"], q=eq["q"],
                             lam=eq["lam"])
