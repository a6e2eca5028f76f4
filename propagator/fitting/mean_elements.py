"""Mean elements: sliding one-period averages of osculating elements, and the
first-order secular J2 rates for comparison.

Averaging: for every sample time ``tc`` whose window ``[tc - T/2, tc + T/2]`` lies
inside the arc, the mean of an element x is ``(1/T) * integral of x(t) dt`` over that
window, with x(t) the not-a-knot cubic spline through the samples (integral from the
spline's antiderivative, scipy.interpolate.CubicSpline).  Angles are unwrapped first
(numpy.unwrap), so averages across the 0/2 pi seam are right; this needs at least
``MIN_SAMPLES_PER_PERIOD`` samples per period.  Averaging over one period T removes
every short-period term that is periodic in T: by default T is the *draconitic* period
(from the mean rate of the argument of latitude, least-squares slope over the arc),
whose harmonics the J2 short-period terms in the argument of latitude are (Kozai 1959).

Secular J2 theory (first order): Brouwer, "Solution of the problem of artificial
satellite theory without drag", Astron. J. 64 (1959) 378-397, and Kozai, "The motion of
a close earth satellite", Astron. J. 64 (1959) 367-377:

    dOMEGA/dt = -3/2 n J2 (R/p)^2 cos i
    domega/dt =  3/4 n J2 (R/p)^2 (5 cos^2 i - 1)
    dM/dt     =  n [1 + 3/4 J2 (R/p)^2 sqrt(1 - e^2) (3 cos^2 i - 1)]

with n = sqrt(gm / a^3), p = a (1 - e^2), evaluated with mean elements.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.interpolate import CubicSpline

from propagator.constants import GM_EARTH, J2_EARTH, R_EARTH_EQ, TWO_PI
from propagator.fitting.errors import FittingInputError, NotEnoughSamplesError, check_arc
from propagator.fitting.osculating import osculating_history, wrap_2pi

__all__ = ["MeanElements", "mean_elements", "j2_secular_rates", "linear_rate",
           "MIN_SAMPLES_PER_PERIOD"]

MIN_SAMPLES_PER_PERIOD: int = 8
"""Fewest samples per averaging period accepted (unwrapping needs > 2; common practice margin)."""

_ANGLES = ("i", "raan", "argp", "M", "u", "lam")
_PLAIN = ("a", "e", "h", "k", "p", "q")


def linear_rate(times: Any, values: Any) -> tuple[float, float]:
    """Least-squares straight line through (times, values): returns (slope, rms of the fit)."""
    t = np.asarray(times, dtype=float)
    y = np.asarray(values, dtype=float)
    if t.size < 2:
        raise NotEnoughSamplesError(f"a rate needs at least 2 samples, got {t.size}")
    tc = t - t.mean()
    coef = np.polyfit(tc, y, 1)
    resid = y - np.polyval(coef, tc)
    return float(coef[0]), float(np.sqrt(np.mean(resid ** 2)))


def j2_secular_rates(a: Any, e: Any, i: Any, gm: float = GM_EARTH, j2: float = J2_EARTH,
                     r_eq: float = R_EARTH_EQ) -> dict[str, np.ndarray]:
    """First-order secular J2 rates [rad/s] of RAAN, argument of perigee and mean anomaly.

    Brouwer (1959) / Kozai (1959), formulas in the module docstring; ``a`` [m], ``e``,
    ``i`` [rad] are mean elements.  Returns ``{"raan_dot", "argp_dot", "M_dot", "n"}``.
    """
    a, e, i = (np.asarray(x, dtype=float) for x in (a, e, i))
    n = np.sqrt(gm / a ** 3)
    p = a * (1.0 - e * e)
    k = j2 * (r_eq / p) ** 2
    c = np.cos(i)
    return {"raan_dot": -1.5 * n * k * c,
            "argp_dot": 0.75 * n * k * (5.0 * c * c - 1.0),
            "M_dot": n * (1.0 + 0.75 * k * np.sqrt(1.0 - e * e) * (3.0 * c * c - 1.0)),
            "n": n}


@dataclass
class MeanElements:
    """One-period sliding averages of osculating elements (SI, radians).

    ``times`` are the window centres (samples whose full window fits in the arc).
    Keplerian ``a, e, i, raan, argp, M`` and equinoctial ``h, k, p, q, lam`` plus the
    argument of latitude ``u``; angles are given *unwrapped* (continuous) in
    ``unwrapped`` and reduced to [0, 2 pi) in the attributes.  ``period`` is the
    averaging period [s].
    """

    times: np.ndarray
    period: float
    a: np.ndarray
    e: np.ndarray
    i: np.ndarray
    raan: np.ndarray
    argp: np.ndarray
    M: np.ndarray
    u: np.ndarray
    h: np.ndarray
    k: np.ndarray
    p: np.ndarray
    q: np.ndarray
    lam: np.ndarray
    gm: float = GM_EARTH
    unwrapped: dict[str, np.ndarray] = field(default_factory=dict)

    def rate(self, name: str) -> float:
        """Least-squares secular rate of a mean element [unit/s] over the averaged span."""
        y = self.unwrapped.get(name, getattr(self, name))
        return linear_rate(self.times, y)[0]

    def j2_rates(self, j2: float = J2_EARTH, r_eq: float = R_EARTH_EQ) -> dict[str, float]:
        """First-order secular J2 rates from the averaged mean a, e, i (see module docstring)."""
        out = j2_secular_rates(float(np.mean(self.a)), float(np.mean(self.e)),
                               float(np.mean(self.i)), self.gm, j2, r_eq)
        return {k: float(v) for k, v in out.items()}

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"period_s": self.period, "gm_m3_s2": self.gm}
        for name in ("times", "a", "e", "i", "raan", "argp", "M", "u", "h", "k", "p", "q", "lam"):
            out[name] = np.asarray(getattr(self, name)).tolist()
        out["rates_rad_s"] = {n: self.rate(n) for n in ("raan", "argp", "M", "u")}
        return out


def mean_elements(times: Any, r: Any, v: Any, gm: float = GM_EARTH,
                  period: float | None = None) -> MeanElements:
    """Sliding one-period mean elements of an inertial arc.

    Args:
        times: sample times [s], strictly increasing (uniform spacing not required).
        r, v: inertial positions [m] and velocities [m/s], shape (n, 3).
        gm: gravitational parameter [m^3/s^2].
        period: averaging period [s]; default the draconitic period of the arc.

    Raises:
        NotEnoughSamplesError if the arc is shorter than one period (no full window) or
        sampled more coarsely than ``MIN_SAMPLES_PER_PERIOD`` per period.
    """
    t, r, v = check_arc(times, r, v)
    osc = osculating_history(t, r, v, gm)
    if t.size < 4:
        raise NotEnoughSamplesError(f"mean elements need at least 4 samples, got {t.size}")
    n_kepler = float(np.sqrt(gm / np.median(osc.a) ** 3))
    max_step = float(np.max(np.diff(t)))
    if max_step > TWO_PI / n_kepler / MIN_SAMPLES_PER_PERIOD:
        raise NotEnoughSamplesError(
            f"sampling step {max_step:.6g} s is too coarse for averaging: need at least "
            f"{MIN_SAMPLES_PER_PERIOD} samples per orbital period ({TWO_PI / n_kepler:.6g} s)")
    unwrapped = {name: np.unwrap(getattr(osc, name)) for name in _ANGLES}
    if period is None:
        u_rate, _ = linear_rate(t, unwrapped["u"])
        if not u_rate > 0.0:
            raise FittingInputError(f"argument of latitude does not advance (rate {u_rate!r} rad/s)")
        period = TWO_PI / u_rate
    period = float(period)
    if not (np.isfinite(period) and period > 0.0):
        raise FittingInputError(f"averaging period must be positive and finite, got {period!r}")
    half = 0.5 * period
    centres = (t - half >= t[0]) & (t + half <= t[-1])
    if not np.any(centres):
        raise NotEnoughSamplesError(
            f"arc of {t[-1] - t[0]:.6g} s is shorter than one averaging period ({period:.6g} s)")
    tc = t[centres]
    means: dict[str, np.ndarray] = {}
    for name in _PLAIN + _ANGLES:
        y = unwrapped[name] if name in unwrapped else getattr(osc, name)
        anti = CubicSpline(t, y).antiderivative()
        means[name] = (anti(tc + half) - anti(tc - half)) / period
    mean_unwrapped = {name: means[name] for name in _ANGLES}
    return MeanElements(times=tc, period=period, a=means["a"], e=means["e"], i=means["i"],
                        raan=wrap_2pi(means["raan"]), argp=wrap_2pi(means["argp"]),
                        M=wrap_2pi(means["M"]), u=wrap_2pi(means["u"]), h=means["h"],
                        k=means["k"], p=means["p"], q=means["q"], lam=wrap_2pi(means["lam"]),
                        gm=float(gm), unwrapped=mean_unwrapped)
