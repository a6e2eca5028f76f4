"""Mean elements and the first-order secular J2 theory (propagator.fitting.mean_elements).

References: Brouwer, Astron. J. 64 (1959) 378; Kozai, Astron. J. 64 (1959) 367 (secular
rates).  The J2 arc is integrated here with scipy.integrate.solve_ivp (DOP853, rtol
1e-12), independently of longarc's integrator.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from propagator.constants import GM_EARTH, J2_EARTH, R_EARTH_EQ
from propagator.elements import kep_to_cart
from propagator.fitting import NotEnoughSamplesError, j2_secular_rates, mean_elements
from propagator.twobody import propagate_twobody


def _j2_rhs(t: float, y: np.ndarray) -> np.ndarray:
    """Point mass + J2 about z (gradient of the J2 term of the geopotential; textbook
    formula, e.g. Vallado 2013 chapter 8, written from memory)."""
    r = y[:3]
    x, yy, z = r
    rn = math.sqrt(x * x + yy * yy + z * z)
    f = 1.5 * J2_EARTH * GM_EARTH * R_EARTH_EQ ** 2 / rn ** 5
    zr = 5.0 * z * z / (rn * rn)
    acc = -GM_EARTH * r / rn ** 3 + f * np.array([x * (zr - 1.0), yy * (zr - 1.0), z * (zr - 3.0)])
    return np.concatenate([y[3:], acc])


def test_j2_leo_mean_raan_rate_matches_secular_theory() -> None:
    # LEO, RAAN starting at 0.02 rad and regressing ~0.08 rad/day: crosses the 0 / 2 pi seam.
    s0 = kep_to_cart(np.array([7_000e3, 0.001, np.radians(50.0), 0.02, 2.0, 3.0]), GM_EARTH)
    t = np.arange(0.0, 86_400.0 + 1.0, 30.0)
    sol = solve_ivp(_j2_rhs, (0.0, t[-1]), s0, method="DOP853", rtol=1e-12, atol=1e-6, t_eval=t)
    assert sol.success
    me = mean_elements(t, sol.y[:3].T, sol.y[3:].T)
    assert me.raan.min() < 0.1 and me.raan.max() > 6.2       # the seam is crossed ...
    rate = me.rate("raan")                                     # ... and unwrapped
    theory = me.j2_rates()["raan_dot"]
    assert abs(rate / theory - 1.0) < 0.005                    # brief: within 0.5 %
    assert abs(me.rate("M") / me.j2_rates()["M_dot"] - 1.0) < 0.005
    assert me.period == pytest.approx(2 * math.pi / me.rate("u"), rel=1e-3)


def test_two_body_mean_equals_osculating() -> None:
    a, e, i, raan = 26_560e3, 0.01, 0.96, 6.28  # RAAN next to the seam
    s0 = kep_to_cart(np.array([a, e, i, raan, 2.0, 0.1]), GM_EARTH)
    t = np.arange(0.0, 2 * 43_082.0, 300.0)
    r, v = propagate_twobody(s0[:3], s0[3:], t, GM_EARTH)
    me = mean_elements(t, r, v)
    np.testing.assert_allclose(me.a, a, rtol=1e-12)
    np.testing.assert_allclose(me.e, e, atol=1e-12)
    np.testing.assert_allclose(me.i, i, atol=1e-12)
    assert np.max(np.abs(((me.raan - raan) + np.pi) % (2 * np.pi) - np.pi)) < 1e-12
    assert me.rate("M") == pytest.approx(math.sqrt(GM_EARTH / a ** 3), rel=1e-9)
    assert abs(me.rate("raan")) < 1e-15
    d = me.to_dict()
    assert d["period_s"] == me.period and len(d["a"]) == me.times.size


def test_secular_rates_sun_synchronous_orbit() -> None:
    # Sun-synchronous LEO: a = 7078.137 km (700 km altitude), e = 0, i = 98.19 deg regresses
    # the node by 360 deg per tropical year, 0.9856 deg/day (from memory; common textbook case).
    rates = j2_secular_rates(7_078_137.0, 0.0, np.radians(98.19))
    deg_per_day = math.degrees(float(rates["raan_dot"])) * 86_400.0
    assert deg_per_day == pytest.approx(0.9856, rel=0.005)


def test_mean_elements_bad_input() -> None:
    s0 = kep_to_cart(np.array([7_000e3, 0.001, 1.0, 1.0, 2.0, 3.0]), GM_EARTH)
    t = np.arange(0.0, 3_000.0, 30.0)  # about half a period
    r, v = propagate_twobody(s0[:3], s0[3:], t, GM_EARTH)
    with pytest.raises(NotEnoughSamplesError, match="shorter than one averaging period"):
        mean_elements(t, r, v)
    t2 = np.arange(0.0, 20_000.0, 1_000.0)  # < 8 samples per ~5,800 s period
    r2, v2 = propagate_twobody(s0[:3], s0[3:], t2, GM_EARTH)
    with pytest.raises(NotEnoughSamplesError, match="too coarse"):
        mean_elements(t2, r2, v2)
