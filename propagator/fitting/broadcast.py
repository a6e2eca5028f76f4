"""Broadcast-style element sets (GPS LNAV and CNAV forms): literal user algorithms and fit.

Two parameter sets of IS-GPS-200 (Navstar GPS Space Segment / Navigation User
Interfaces) are available (``parameter_set``):

``"lnav16"`` (default)
    The LNAV set of section 20.3.3.4.3, Table 20-IV: ``toe``, ``sqrt(A), e, i0, OMEGA0,
    omega, M0``, ``Delta n, OMEGA-dot, IDOT`` and the six harmonic amplitudes ``Cuc, Cus,
    Crc, Crs, Cic, Cis`` (16 numbers).  :func:`broadcast_position` is a literal,
    line-by-line transcription of the Table 20-IV user algorithm.
``"cnav18"``
    The CNAV set of section 30.3.3.1.3, Table 30-II (table number from memory):
    ``Delta A`` relative to ``A_REF = 26,559,710 m``, its rate ``A-dot``, the mean-motion
    difference ``Delta n0`` and its rate ``Delta n0-dot``, ``Delta OMEGA-dot`` relative
    to ``OMEGA-dot_REF = -2.6e-9 semicircles/s``, and otherwise the LNAV elements (18
    numbers with ``toe``).  :func:`cnav_position` transcribes Table 30-II line by line:
    ``A0 = A_REF + Delta A``, ``Ak = A0 + A-dot tk``, ``n0 = sqrt(mu / A0^3)``,
    ``Delta n_A = Delta n0 + Delta n0-dot tk / 2``, ``Mk = M0 + (n0 + Delta n_A) tk``,
    ``rk = Ak (1 - e cos Ek) + delta rk``, ``OMEGA-dot = OMEGA-dot_REF + Delta OMEGA-dot``.

Both use the spec's ``mu = 3.986005e14 m^3/s^2`` and ``OMEGA_e-dot = 7.2921151467e-5
rad/s`` (:mod:`propagator.constants`); results are Earth-fixed.  Angles are radians
here (the spec transmits semicircles; ``OMEGA-dot_REF`` is converted with the spec's pi,
``GPS_PI``).

Time argument
-------------
``t`` and ``toe`` are seconds on one continuous scale measured from a *time origin* of
the user's choice (longarc: TT seconds since the case epoch; a constant offset between
TT and GPS time does not change differences).  ``tk = t - toe`` exactly as in the spec,
but with no week-crossover correction (our time is not a time of week).  Because the
spec's ascending-node equation is ``OMEGA_k = OMEGA0 + (OMEGA-dot - OMEGA_e-dot) tk -
OMEGA_e-dot toe`` (both tables), ``OMEGA0`` here is the Earth-fixed longitude of the
ascending node at ``toe`` *plus* ``OMEGA_e-dot * toe``: it plays the role of the GPS
"longitude of the ascending node at the weekly epoch", with our time origin in place of
the start of the GPS week.  Re-basing the origin by ``d`` seconds changes ``toe`` by
``-d`` and ``OMEGA0`` by ``-OMEGA_e-dot d``.

Fit
---
:func:`fit_broadcast_from_arrays` fits the set to Earth-fixed (ITRF) positions over a
window (default 4 h) by nonlinear least squares (``scipy.optimize.least_squares``, see
:mod:`propagator.fitting.keplerian_fit`), with ``toe`` at the window centre.  Internally
``e, omega, M0`` are replaced by ``e cos omega, e sin omega, M0 + omega`` (non-singular
at e = 0); every unknown is scaled to metres of position.  Stage 1 is a two-body fit to
the positions rotated into a frame that does not rotate with the Earth (rotation
``OMEGA_e-dot (t - toe)`` about z); stage 2 the LNAV fit from it; for ``"cnav18"`` a
stage 3 starts from the LNAV optimum (exactly representable in the CNAV set with
``A-dot = Delta n0-dot = 0``), so the CNAV residual is never larger.

The solution was checked to be the least-squares optimum (tests and
validation/check_fitting.py): an independent Gauss-Newton iteration on the Table 20-IV
parameters themselves, and 12 random restarts of it (A +- 2 km, Crc/Crs +- 500 m, ...),
reach no lower RMS (relative gain < 1e-8); a complex-step Jacobian gave the same; the
column-scaled Jacobian has condition number ~270; ``toe`` at the window start instead
of the centre changes the RMS by < 1e-8 relative.

Representation limits (measured: a = 26,560 km, e = 0.01, i = 55 deg, 4-h windows,
LNAV / CNAV 3D RMS; the validation scenario of validation/check_fitting.py):

* J2 short-period terms of first order in e (once- and three-per-revolution) have no
  counterpart in either set.  A J2-only arc fits with LNAV to 1.6 mm at e = 0, 2.1 cm
  at e = 0.001 and 4-22 cm at e = 0.01 (proportional to e; the range is over the
  orbital phase of the window); the CNAV rates absorb most of it (1.6-3.4 cm).
* The sets rotate the orbit about the ITRF z-axis, while the Earth turns about the CIP,
  which polar motion tilts by ~0.3 arcsec from that axis.  A pole offset that is
  constant in the Earth-fixed frame is a tilt of the orbit that *rotates* once a day in
  inertial space; over 4 h its quadratic part is not absorbed.  A two-body arc rotated
  about z and then tilted by a 0.3 arcsec pole offset fits to 1.3-19 cm (LNAV,
  depending on the orbit/pole geometry); the same tilt applied in the inertial frame is
  absorbed exactly (< 1e-6 m).  The two-body arc of the validation scenario converted
  GCRF -> ITRF fits to 2-12 cm (LNAV) and 0.3-1.0 cm (CNAV); 0.2 mm / 0.02 mm with
  polar motion removed.
* The LNAV mean anomaly is only linear in time and ``A`` constant: the along-track drift
  from the 2:1 resonant tesseral terms and the lunisolar tides (|a| ~ 3e-6 m/s^2 at
  MEO) is not represented.  With the full GNSS force model (12x12 field, Sun, Moon,
  SRP) the 4-h LNAV RMS is 0.06-0.73 m (median 0.23 m over 83 windows in 7 days), the
  CNAV RMS 1.7-11 cm (median 4.8 cm).  Over the first window (LNAV / CNAV, polar
  motion removed): J2 18 / 1.7 cm, 12x12 field 32 / 1.8 cm, Sun + Moon 31 / 2.7 cm,
  SRP 2.3 / 0.4 cm, all together 63 / 3.8 cm.

Near-equatorial orbits: the sets degenerate as i -> 0 (OMEGA0 and omega merge; the
Jacobian column of OMEGA0 tends to that of M0 + omega).  The remedy of
BDS-SIS-ICD-2.0 (2013), section 5.2.4.12 (fit in a frame rotated by -5 deg about x) is
*not* implemented: a fit whose inclination is below ``min_inclination_deg`` (default
1 deg, or within that of 180 deg) raises
:class:`~propagator.fitting.errors.OutOfScopeError`.  The default is a longarc choice:
J2-only MEO arcs (e = 0.001) were measured to fit normally down to 1 deg (4 h RMS 5.6
cm at 1 deg against 2.1 cm at 55 deg).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from propagator.constants import (GPS_BROADCAST_MU, GPS_BROADCAST_OMEGA_E_DOT, GPS_CNAV_A_REF,
                                  GPS_CNAV_OMEGA_DOT_REF, SECONDS_PER_DAY)
from propagator.fitting.errors import (FitNotConvergedError, OutOfScopeError, WindowOutsideArcError, check_arc,
                                       check_sample_count, window_mask)
from propagator.fitting.keplerian_fit import (fit_keplerian_from_arrays,
                                              report_convergence, solve_scaled_least_squares)

__all__ = ["BroadcastElements", "CnavElements", "BroadcastFit", "broadcast_position",
           "cnav_position", "fit_broadcast_from_arrays", "fit_broadcast_from_gcrf",
           "gcrf_arc_to_itrf", "MU", "OMEGA_E_DOT", "A_REF", "OMEGA_DOT_REF", "PARAMETER_SETS",
           "DEFAULT_WINDOW_S", "DEFAULT_MIN_INCLINATION_DEG"]

MU: float = GPS_BROADCAST_MU
"""mu of the IS-GPS-200 Table 20-IV / 30-II user algorithms [m^3/s^2]."""
OMEGA_E_DOT: float = GPS_BROADCAST_OMEGA_E_DOT
"""OMEGA_e-dot of the IS-GPS-200 Table 20-IV / 30-II user algorithms [rad/s]."""
A_REF: float = GPS_CNAV_A_REF
"""CNAV reference semi-major axis [m] (IS-GPS-200 Table 30-II)."""
OMEGA_DOT_REF: float = GPS_CNAV_OMEGA_DOT_REF
"""CNAV reference rate of right ascension [rad/s] (IS-GPS-200 Table 30-II)."""
PARAMETER_SETS: tuple[str, ...] = ("lnav16", "cnav18")
"""Accepted values of ``parameter_set`` (see module docstring)."""
DEFAULT_WINDOW_S: float = 4.0 * 3600.0
"""Default fit window [s] (4 h, the normal GPS LNAV curve-fit interval, IS-GPS-200
section 20.3.4.4; section number from memory)."""
DEFAULT_MIN_INCLINATION_DEG: float = 1.0
"""Smallest inclination accepted by the fit [deg] (longarc choice, see module docstring)."""

_PARAM_NAMES = ("toe", "sqrt_a", "e", "i0", "omega0", "omega", "m0", "delta_n", "omega_dot",
                "idot", "cuc", "cus", "crc", "crs", "cic", "cis")
_CNAV_NAMES = ("toe", "delta_a", "a_dot", "delta_n0", "delta_n0_dot", "m0", "e", "omega",
               "omega0", "delta_omega_dot", "i0", "idot", "cuc", "cus", "crc", "crs", "cic", "cis")


@dataclass
class BroadcastElements:
    """One LNAV broadcast-style element set (IS-GPS-200 Table 20-IV names; SI units).

    ``toe`` [s] (from the set's time origin), ``sqrt_a`` [m^0.5], ``e`` [-], ``i0``,
    ``omega0``, ``omega``, ``m0`` [rad], ``delta_n``, ``omega_dot``, ``idot`` [rad/s],
    ``cuc``, ``cus``, ``cic``, ``cis`` [rad], ``crc``, ``crs`` [m].  Angles in radians
    (the spec transmits semicircles; multiply by pi).
    """

    toe: float
    sqrt_a: float
    e: float
    i0: float
    omega0: float
    omega: float
    m0: float
    delta_n: float = 0.0
    omega_dot: float = 0.0
    idot: float = 0.0
    cuc: float = 0.0
    cus: float = 0.0
    crc: float = 0.0
    crs: float = 0.0
    cic: float = 0.0
    cis: float = 0.0

    parameter_set = "lnav16"

    def position(self, t: Any) -> np.ndarray:
        """Earth-fixed positions [m] at times ``t`` [s], shape (n, 3)."""
        return broadcast_position(self, t)

    def to_dict(self) -> dict[str, float]:
        return {k: float(v) for k, v in asdict(self).items()}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "BroadcastElements":
        return cls(**{k: float(d[k]) for k in _PARAM_NAMES if k in d})


@dataclass
class CnavElements:
    """One CNAV broadcast-style element set (IS-GPS-200 Table 30-II; SI units).

    ``toe`` [s]; ``delta_a`` [m] (A0 = A_REF + delta_a), ``a_dot`` [m/s]; ``delta_n0``
    [rad/s], ``delta_n0_dot`` [rad/s^2]; ``m0``, ``omega``, ``omega0``, ``i0`` [rad];
    ``e`` [-]; ``delta_omega_dot`` [rad/s] (OMEGA-dot = OMEGA-dot_REF + delta_omega_dot);
    ``idot`` [rad/s] (the spec's i0-n-DOT); ``cuc, cus, cic, cis`` [rad], ``crc, crs`` [m].
    """

    toe: float
    delta_a: float
    a_dot: float
    delta_n0: float
    delta_n0_dot: float
    m0: float
    e: float
    omega: float
    omega0: float
    delta_omega_dot: float
    i0: float
    idot: float = 0.0
    cuc: float = 0.0
    cus: float = 0.0
    crc: float = 0.0
    crs: float = 0.0
    cic: float = 0.0
    cis: float = 0.0

    parameter_set = "cnav18"

    @property
    def a0(self) -> float:
        """Semi-major axis at toe, A_REF + delta_a [m]."""
        return A_REF + self.delta_a

    @property
    def omega_dot(self) -> float:
        """Rate of right ascension OMEGA-dot_REF + delta_omega_dot [rad/s]."""
        return OMEGA_DOT_REF + self.delta_omega_dot

    def position(self, t: Any) -> np.ndarray:
        """Earth-fixed positions [m] at times ``t`` [s], shape (n, 3)."""
        return cnav_position(self, t)

    def to_dict(self) -> dict[str, float]:
        return {k: float(v) for k, v in asdict(self).items()}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "CnavElements":
        return cls(**{k: float(d[k]) for k in _CNAV_NAMES if k in d})


def _solve_kepler_spec(Mk: np.ndarray, e: float) -> np.ndarray:
    """Kepler's equation ``Mk = Ek - e sin Ek`` by the iteration the spec gives,
    ``E_j = E_{j-1} + (Mk - E_{j-1} + e sin E_{j-1}) / (1 - e cos E_{j-1})`` from
    ``E_0 = Mk`` (at least three iterations, continued to convergence) [rad]."""
    Ek = np.array(Mk, dtype=float, copy=True)
    for j in range(30):
        dE = (Mk - Ek + e * np.sin(Ek)) / (1.0 - e * np.cos(Ek))
        Ek = Ek + dE
        if j >= 2 and np.all(np.abs(dE) <= 1e-15 * np.maximum(1.0, np.abs(Ek))):
            break
    return Ek


def broadcast_position(el: BroadcastElements | CnavElements, t: Any) -> np.ndarray:
    """Earth-fixed satellite position [m] by the IS-GPS-200 Table 20-IV user algorithm.

    Literal transcription, vectorised over ``t`` [s] (same time origin as ``el.toe``);
    no week-crossover correction of ``tk`` (see module docstring).  A
    :class:`CnavElements` set is passed on to :func:`cnav_position`.  Returns
    float64[n, 3].
    """
    if isinstance(el, CnavElements):
        return cnav_position(el, t)
    t = np.atleast_1d(np.asarray(t, dtype=float))
    e = el.e
    A = el.sqrt_a ** 2                                   # semi-major axis
    n0 = np.sqrt(MU / A ** 3)                            # computed mean motion [rad/s]
    tk = t - el.toe                                      # time from ephemeris reference epoch
    n = n0 + el.delta_n                                  # corrected mean motion
    Mk = el.m0 + n * tk                                  # mean anomaly
    Ek = _solve_kepler_spec(Mk, e)                       # Kepler's equation Mk = Ek - e sin Ek
    nuk = np.arctan2(np.sqrt(1.0 - e * e) * np.sin(Ek) / (1.0 - e * np.cos(Ek)),
                     (np.cos(Ek) - e) / (1.0 - e * np.cos(Ek)))   # true anomaly
    Phik = nuk + el.omega                                # argument of latitude
    duk = el.cus * np.sin(2.0 * Phik) + el.cuc * np.cos(2.0 * Phik)   # argument of latitude correction
    drk = el.crs * np.sin(2.0 * Phik) + el.crc * np.cos(2.0 * Phik)   # radius correction
    dik = el.cis * np.sin(2.0 * Phik) + el.cic * np.cos(2.0 * Phik)   # inclination correction
    uk = Phik + duk                                      # corrected argument of latitude
    rk = A * (1.0 - e * np.cos(Ek)) + drk                # corrected radius
    ik = el.i0 + dik + el.idot * tk                      # corrected inclination
    xk_p = rk * np.cos(uk)                               # position in orbital plane
    yk_p = rk * np.sin(uk)
    Omegak = el.omega0 + (el.omega_dot - OMEGA_E_DOT) * tk - OMEGA_E_DOT * el.toe  # corrected longitude of node
    xk = xk_p * np.cos(Omegak) - yk_p * np.cos(ik) * np.sin(Omegak)   # Earth-fixed coordinates
    yk = xk_p * np.sin(Omegak) + yk_p * np.cos(ik) * np.cos(Omegak)
    zk = yk_p * np.sin(ik)
    return np.stack([xk, yk, zk], axis=1)


def cnav_position(el: CnavElements, t: Any) -> np.ndarray:
    """Earth-fixed satellite position [m] by the IS-GPS-200 Table 30-II (CNAV) user algorithm.

    Literal transcription, vectorised over ``t`` [s] (same time origin as ``el.toe``), no
    week-crossover correction; Kepler's equation as in :func:`broadcast_position`.
    Returns float64[n, 3].
    """
    t = np.atleast_1d(np.asarray(t, dtype=float))
    e = el.e
    A0 = A_REF + el.delta_a                              # semi-major axis at reference time
    tk = t - el.toe                                      # time from ephemeris reference time
    Ak = A0 + el.a_dot * tk                              # semi-major axis
    n0 = np.sqrt(MU / A0 ** 3)                           # computed mean motion [rad/s]
    dnA = el.delta_n0 + 0.5 * el.delta_n0_dot * tk       # mean motion difference from computed value
    nA = n0 + dnA                                        # corrected mean motion
    Mk = el.m0 + nA * tk                                 # mean anomaly
    Ek = _solve_kepler_spec(Mk, e)                       # Kepler's equation Mk = Ek - e sin Ek
    nuk = np.arctan2(np.sqrt(1.0 - e * e) * np.sin(Ek) / (1.0 - e * np.cos(Ek)),
                     (np.cos(Ek) - e) / (1.0 - e * np.cos(Ek)))   # true anomaly
    Phik = nuk + el.omega                                # argument of latitude
    duk = el.cus * np.sin(2.0 * Phik) + el.cuc * np.cos(2.0 * Phik)   # argument of latitude correction
    drk = el.crs * np.sin(2.0 * Phik) + el.crc * np.cos(2.0 * Phik)   # radius correction
    dik = el.cis * np.sin(2.0 * Phik) + el.cic * np.cos(2.0 * Phik)   # inclination correction
    uk = Phik + duk                                      # corrected argument of latitude
    rk = Ak * (1.0 - e * np.cos(Ek)) + drk               # corrected radius
    ik = el.i0 + el.idot * tk + dik                      # corrected inclination
    xk_p = rk * np.cos(uk)                               # position in orbital plane
    yk_p = rk * np.sin(uk)
    Omega_dot = OMEGA_DOT_REF + el.delta_omega_dot       # rate of right ascension
    Omegak = el.omega0 + (Omega_dot - OMEGA_E_DOT) * tk - OMEGA_E_DOT * el.toe  # corrected longitude of node
    xk = xk_p * np.cos(Omegak) - yk_p * np.cos(ik) * np.sin(Omegak)   # Earth-fixed coordinates
    yk = xk_p * np.sin(Omegak) + yk_p * np.cos(ik) * np.cos(Omegak)
    zk = yk_p * np.sin(ik)
    return np.stack([xk, yk, zk], axis=1)


@dataclass
class BroadcastFit:
    """A broadcast-style set fitted to Earth-fixed positions over ``window`` [s].

    ``elements`` is a :class:`BroadcastElements` (``parameter_set='lnav16'``) or a
    :class:`CnavElements` (``'cnav18'``).  ``residuals`` = model - given ITRF positions
    [m] at ``times`` (window samples); ``converged`` False means the solver stopped early
    and ``elements`` is the best set found.  ``initial_rms_3d`` is the 3D RMS of the
    two-body initial guess [m].
    """

    elements: BroadcastElements | CnavElements
    window: tuple[float, float]
    times: np.ndarray
    residuals: np.ndarray
    converged: bool
    status: int
    message: str
    nfev: int
    initial_rms_3d: float = float("nan")
    frame: str = "itrf"
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def parameter_set(self) -> str:
        return self.elements.parameter_set

    @property
    def toe(self) -> float:
        return self.elements.toe

    @property
    def n_samples(self) -> int:
        return int(self.times.size)

    @property
    def rms_3d(self) -> float:
        return float(np.sqrt(np.mean(np.sum(self.residuals ** 2, axis=1))))

    @property
    def max_3d(self) -> float:
        return float(np.max(np.linalg.norm(self.residuals, axis=1)))

    def position(self, t: Any) -> np.ndarray:
        """Earth-fixed positions [m] of the fitted set at ``t`` [s]."""
        return self.elements.position(t)

    def to_dict(self) -> dict[str, Any]:
        kind = ("broadcast-style (IS-GPS-200 Table 20-IV, LNAV)" if self.parameter_set == "lnav16"
                else "broadcast-style (IS-GPS-200 Table 30-II, CNAV)")
        out = {"kind": kind, "parameter_set": self.parameter_set, "frame": self.frame,
               "elements": self.elements.to_dict(), "mu_m3_s2": MU,
               "omega_e_dot_rad_s": OMEGA_E_DOT, "window_s": list(self.window),
               "n_samples": self.n_samples, "converged": self.converged,
               "solver_status": self.status, "solver_message": self.message, "nfev": self.nfev,
               "rms_3d_m": self.rms_3d, "max_3d_m": self.max_3d,
               "initial_rms_3d_m": self.initial_rms_3d}
        if self.parameter_set == "cnav18":
            out["a_ref_m"] = A_REF
            out["omega_dot_ref_rad_s"] = OMEGA_DOT_REF
        return out


def _rotz_vectors(angle: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Rotate vectors x (n, 3) counter-clockwise about z by angle (n,) [rad]."""
    c, s = np.cos(angle), np.sin(angle)
    return np.stack([c * x[:, 0] - s * x[:, 1], s * x[:, 0] + c * x[:, 1], x[:, 2]], axis=1)


# Internal unknowns (before scaling to metres):
#   LNAV (15): A, e cos w, e sin w, M0 + w, i0, OMEGA0, Delta n, OMEGA-dot, IDOT, Cuc, Cus, Crc, Crs, Cic, Cis
#   CNAV (17): Delta A, e cos w, e sin w, M0 + w, i0, OMEGA0, Delta n0, Delta OMEGA-dot, IDOT,
#              Cuc, Cus, Crc, Crs, Cic, Cis, A-dot, Delta n0-dot

def _params_to_elements(p: np.ndarray, toe: float) -> BroadcastElements:
    a, xi, eta, lam0, i0, om0, dn, omdot, idot, cuc, cus, crc, crs, cic, cis = p
    omega = np.arctan2(eta, xi)
    return BroadcastElements(toe=toe, sqrt_a=float(np.sqrt(a)), e=float(np.hypot(xi, eta)),
                             i0=float(i0), omega0=float(om0), omega=float(omega),
                             m0=float(lam0 - omega), delta_n=float(dn), omega_dot=float(omdot),
                             idot=float(idot), cuc=float(cuc), cus=float(cus), crc=float(crc),
                             crs=float(crs), cic=float(cic), cis=float(cis))


def _params_to_cnav(p: np.ndarray, toe: float) -> CnavElements:
    da, xi, eta, lam0, i0, om0, dn0, domdot, idot, cuc, cus, crc, crs, cic, cis, adot, dndot = p
    omega = np.arctan2(eta, xi)
    return CnavElements(toe=toe, delta_a=float(da), a_dot=float(adot), delta_n0=float(dn0),
                        delta_n0_dot=float(dndot), m0=float(lam0 - omega), e=float(np.hypot(xi, eta)),
                        omega=float(omega), omega0=float(om0), delta_omega_dot=float(domdot),
                        i0=float(i0), idot=float(idot), cuc=float(cuc), cus=float(cus),
                        crc=float(crc), crs=float(crs), cic=float(cic), cis=float(cis))


def _wrap_pi(x: float) -> float:
    return float((x + np.pi) % (2.0 * np.pi) - np.pi)


def fit_broadcast_from_arrays(times: Any, positions_itrf: Any, velocities_itrf: Any | None = None,
                              *, window: tuple[float, float] | None = None,
                              window_length: float = DEFAULT_WINDOW_S, toe: float | None = None,
                              parameter_set: str = "lnav16",
                              min_inclination_deg: float = DEFAULT_MIN_INCLINATION_DEG,
                              max_nfev: int = 100, on_failure: str = "warn") -> BroadcastFit:
    """Fit a broadcast-style element set to Earth-fixed positions.

    Args:
        times: sample times [s] (strictly increasing), the set's time origin is theirs.
        positions_itrf: Earth-fixed positions [m], shape (n, 3).
        velocities_itrf: optional Earth-fixed velocities [m/s] (initial guess only).
        window: ``(t_start, t_end)`` [s]; default ``(times[0], times[0] + window_length)``.
        window_length: default window length [s] (4 h).
        toe: reference time [s] inside the window; default its centre.
        parameter_set: ``'lnav16'`` (IS-GPS-200 Table 20-IV) or ``'cnav18'`` (Table 30-II).
        min_inclination_deg: below this (or above 180 deg minus this) raise OutOfScopeError.
        max_nfev, on_failure: as in :func:`~propagator.fitting.keplerian_fit.fit_keplerian_from_arrays`
            (``max_nfev`` per least-squares stage).

    Returns:
        :class:`BroadcastFit`.
    """
    if on_failure not in ("warn", "raise"):
        raise ValueError(f"on_failure must be 'warn' or 'raise', got {on_failure!r}")
    if parameter_set not in PARAMETER_SETS:
        raise ValueError(f"parameter_set must be one of {PARAMETER_SETS}, got {parameter_set!r}")
    n_unknowns = 15 if parameter_set == "lnav16" else 17
    t, r, v = check_arc(times, positions_itrf, velocities_itrf)
    if window is None:
        if not window_length > 0.0:
            raise WindowOutsideArcError(f"window_length must be positive, got {window_length!r}")
        window = (float(t[0]), float(t[0]) + float(window_length))
        if window[1] > t[-1] * (1.0 + 1e-12) + 1e-9:
            raise WindowOutsideArcError(
                f"the arc ({float(t[0])!r}, {float(t[-1])!r}) s is shorter than the {window_length!r} s window")
    mask = window_mask(t, window)
    w = (float(window[0]), float(window[1]))
    toe = 0.5 * (w[0] + w[1]) if toe is None else float(toe)
    if not (np.isfinite(toe) and w[0] <= toe <= w[1]):
        raise WindowOutsideArcError(f"toe {toe!r} s is not inside the window {w} s")
    tw, rw = t[mask], r[mask]
    vw = None if v is None else v[mask]
    check_sample_count(tw.size, n_unknowns, "broadcast-style fit")
    tk = tw - toe

    # Stage 1: two-body fit in a frame that does not rotate with the Earth (z-rotation by
    # OMEGA_e-dot * tk); its elements at toe are the initial guess.
    rq = _rotz_vectors(OMEGA_E_DOT * tk, rw)
    if vw is None:
        vq = None
    else:
        wxr = np.stack([-OMEGA_E_DOT * rw[:, 1], OMEGA_E_DOT * rw[:, 0], np.zeros(tw.size)], axis=1)
        vq = _rotz_vectors(OMEGA_E_DOT * tk, vw + wxr)
    try:
        kep = fit_keplerian_from_arrays(tw, rq, vq, t_ref=toe, gm=MU, max_nfev=max_nfev,
                                        on_failure="raise")
    except FitNotConvergedError as exc:  # only a starting point: stage 2 reports convergence
        kep = exc.result
    inc_deg = float(np.degrees(kep.i))
    if min(inc_deg, 180.0 - inc_deg) < min_inclination_deg:
        raise OutOfScopeError(
            f"inclination {inc_deg:.6g} deg is within {min_inclination_deg} deg of the equator: "
            "the broadcast-style parametrisation degenerates there (the rotated-frame remedy of "
            "BDS-SIS-ICD-2.0 section 5.2.4.12 is not implemented)")
    a0 = kep.a
    half = max(0.5 * (w[1] - w[0]), 1.0)

    # Stage 2: LNAV set.
    p0 = np.zeros(15)
    p0[:6] = [kep.a, kep.e * np.cos(kep.argp), kep.e * np.sin(kep.argp), kep.M + kep.argp, kep.i,
              kep.raan + OMEGA_E_DOT * toe]
    scale = np.array([1.0, a0, a0, a0, a0, a0, a0 * half, a0 * half, a0 * half,
                      a0, a0, 1.0, 1.0, a0, a0])

    def fun(x: np.ndarray) -> np.ndarray:
        p = x / scale
        if not (p[0] > 0.0 and np.hypot(p[1], p[2]) < 1.0):
            return np.full(rw.size, 1e20)
        return (broadcast_position(_params_to_elements(p, toe), tw) - rw).ravel()

    initial_rms = float(np.sqrt(np.mean(np.sum(fun(p0 * scale).reshape(-1, 3) ** 2, axis=1))))
    out = solve_scaled_least_squares(fun, p0 * scale, max_nfev=max_nfev)
    nfev = out.nfev + kep.nfev
    el: BroadcastElements | CnavElements = _params_to_elements(out.x / scale, toe)
    extra: dict[str, Any] = {"twobody_initial_guess": kep.to_dict()}

    if parameter_set == "cnav18":
        # Stage 3: CNAV set from the LNAV optimum (same ellipse with A-dot = Delta n0-dot = 0).
        extra["lnav16_stage"] = {"rms_3d_m": float(np.sqrt(np.mean(np.sum(
            out.residuals.reshape(-1, 3) ** 2, axis=1)))), "converged": out.converged,
            "nfev": out.nfev}
        pl = out.x / scale
        pc = np.concatenate([pl, [0.0, 0.0]])
        pc[0] = pl[0] - A_REF
        pc[7] = pl[7] - OMEGA_DOT_REF
        scale_c = np.concatenate([scale, [half, 0.5 * a0 * half * half]])
        scale_c[0] = 1.0

        def fun_c(x: np.ndarray) -> np.ndarray:
            p = x / scale_c
            if not (A_REF + p[0] > 0.0 and np.hypot(p[1], p[2]) < 1.0):
                return np.full(rw.size, 1e20)
            return (cnav_position(_params_to_cnav(p, toe), tw) - rw).ravel()

        out = solve_scaled_least_squares(fun_c, pc * scale_c, max_nfev=max_nfev)
        nfev += out.nfev
        el = _params_to_cnav(out.x / scale_c, toe)

    el.omega0, el.omega, el.m0 = _wrap_pi(el.omega0), _wrap_pi(el.omega), _wrap_pi(el.m0)
    residuals = el.position(tw) - rw
    res = BroadcastFit(elements=el, window=w, times=tw, residuals=residuals,
                       converged=out.converged, status=out.status, message=out.message,
                       nfev=nfev, initial_rms_3d=initial_rms, extra=extra)
    report_convergence(res, "broadcast-style fit", on_failure)
    return res


def gcrf_arc_to_itrf(epoch: Any, times: Any, r_gcrf: Any, v_gcrf: Any | None = None,
                     eop_policy: str = "error") -> tuple[np.ndarray, np.ndarray | None]:
    """Convert a GCRF arc to ITRF sample by sample (``propagator.frames``).

    ``times`` are TT seconds since ``epoch`` (longarc's convention, whatever the epoch's
    own scale).  Uses the vectorised :func:`propagator.frames.gcrf_to_itrf_matrices`
    (same rotation as
    :func:`propagator.frames.gcrf_to_itrf`, IERS Conventions 2010 eq. 5.1); velocities
    get ``v_ITRF = R v - omega x r_ITRF``.  Returns ``(r_itrf, v_itrf or None)``.
    """
    from propagator.frames import gcrf_to_itrf_matrices

    t, r, v = check_arc(times, r_gcrf, v_gcrf)
    tt = epoch.to("TT", eop_policy=eop_policy)
    jd1 = np.full(t.size, tt.jd1)
    jd2 = tt.jd2 + t / SECONDS_PER_DAY
    rot, wvec = gcrf_to_itrf_matrices(jd1, jd2, eop_policy)
    r_itrf = np.einsum("nij,nj->ni", rot, r)
    if v is None:
        return r_itrf, None
    v_itrf = np.einsum("nij,nj->ni", rot, v) - np.cross(wvec, r_itrf)
    return r_itrf, v_itrf


def fit_broadcast_from_gcrf(epoch: Any, times: Any, r_gcrf: Any, v_gcrf: Any | None = None,
                            eop_policy: str = "error", **kwargs: Any) -> BroadcastFit:
    """Convert a GCRF arc (TT seconds since ``epoch``) to ITRF, then
    :func:`fit_broadcast_from_arrays` (keyword arguments passed on, e.g.
    ``parameter_set``).  The set's time origin is ``epoch``: ``toe`` is TT seconds since it."""
    r_itrf, v_itrf = gcrf_arc_to_itrf(epoch, times, r_gcrf, v_gcrf, eop_policy)
    return fit_broadcast_from_arrays(times, r_itrf, v_itrf, **kwargs)
