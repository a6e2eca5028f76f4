"""Schwarzschild relativistic correction (IERS Conventions 2010, eq. 10.12, beta = gamma = 1).

For a circular orbit (r.v = 0, v^2 = GM/r) eq. 10.12 reduces to a radial, outward
a = 3 (GM)^2 / (c^2 r^3) (derived by hand from 10.12).  Orders of magnitude: ~3e-10 m/s^2
at GNSS radius and ~1e-8 m/s^2 in LEO (Montenbruck & Gill, Satellite Orbits, 2000,
fig. 3.1; from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from forcemodels import registry
from forcemodels.environment import ENV_SIZE
from forcemodels.models import relativity
from forcemodels.registry import CaseSetup
from propagator.constants import C_LIGHT, GM_EARTH, J2000_JD

P = np.array([GM_EARTH, C_LIGHT])
ENV = np.zeros(ENV_SIZE)
CASE = CaseSetup(epoch=(J2000_JD, 0.0), t_start=0.0, t_end=86400.0)


def _acc(r, v) -> np.ndarray:
    acc = np.zeros(3)
    relativity.accel(0.0, np.asarray(r, float), np.asarray(v, float), ENV, P, np.zeros(0), acc)
    return acc


def _circular(radius: float, incl: float = 0.7) -> tuple[np.ndarray, np.ndarray]:
    vc = math.sqrt(GM_EARTH / radius)
    r = np.array([radius, 0.0, 0.0])
    v = vc * np.array([0.0, math.cos(incl), math.sin(incl)])
    return r, v


@pytest.mark.parametrize("radius,lo,hi", [(2.656e7, 1e-10, 1e-9), (6.878e6, 5e-9, 3e-8)])
def test_circular_magnitude(radius: float, lo: float, hi: float) -> None:
    r, v = _circular(radius)
    a = _acc(r, v)
    exact = 3.0 * GM_EARTH ** 2 / (C_LIGHT ** 2 * radius ** 3)
    assert np.linalg.norm(a) == pytest.approx(exact, rel=1e-12)
    np.testing.assert_allclose(a / np.linalg.norm(a), r / radius, atol=1e-12)   # radial, outward
    assert lo < np.linalg.norm(a) < hi          # orders of magnitude, M&G fig. 3.1 (from memory)


def test_gnss_and_leo_numbers() -> None:
    # Hand-computed 3 GM^2/(c^2 r^3), 3 GM^2 = 4.76646e29 m^6/s^4, c^2 = 8.98755e16 m^2/s^2:
    #   r = 26560 km: r^3 = 1.87361e22 m^3 -> 4.76646e29 / 1.68392e39 = 2.8306e-10 m/s^2
    #   r =  6878 km: r^3 = 3.25377e20 m^3 -> 4.76646e29 / 2.92434e37 = 1.6299e-8 m/s^2
    assert np.linalg.norm(_acc(*_circular(2.656e7))) == pytest.approx(2.8306e-10, rel=1e-4)
    assert np.linalg.norm(_acc(*_circular(6.878e6))) == pytest.approx(1.6299e-8, rel=1e-4)


def test_eccentric_orbit_has_velocity_term() -> None:
    """Off perigee r.v != 0: the 4 (r.v) v term appears; compare with the formula in numpy."""
    r = np.array([1.2e7, 3.0e6, -2.0e6])
    v = np.array([-1.0e3, 5.5e3, 2.0e3])
    rn = np.linalg.norm(r)
    ref = GM_EARTH / (C_LIGHT ** 2 * rn ** 3) * ((4 * GM_EARTH / rn - v @ v) * r + 4 * (r @ v) * v)
    np.testing.assert_allclose(_acc(r, v), ref, rtol=1e-13)


def test_partials_vs_finite_differences() -> None:
    r = np.array([1.2e7, 3.0e6, -2.0e6])
    v = np.array([-1.0e3, 5.5e3, 2.0e3])
    dadr = np.zeros((3, 3))
    dadv = np.zeros((3, 3))
    relativity.partials(0.0, r, v, ENV, P, np.zeros(0), dadr, dadv)
    fdr = np.zeros((3, 3))
    fdv = np.zeros((3, 3))
    for j in range(3):
        e = np.zeros(3)
        e[j] = 1.0
        fdr[:, j] = (_acc(r + 10.0 * e, v) - _acc(r - 10.0 * e, v)) / 20.0
        fdv[:, j] = (_acc(r, v + 0.01 * e) - _acc(r, v - 0.01 * e)) / 0.02
    np.testing.assert_allclose(dadr, fdr, rtol=0, atol=1e-7 * np.abs(fdr).max())
    np.testing.assert_allclose(dadv, fdv, rtol=0, atol=1e-7 * np.abs(fdv).max())


def test_registration() -> None:
    model = registry.get("relativity")
    assert model.uses_velocity and model.partials is not None
    pm = registry.prepare("relativity", {}, CASE)
    np.testing.assert_array_equal(pm.p, P)
    assert "10.12" in pm.metadata["method"]
    with pytest.raises(ValueError, match="gm_m3_s2"):
        registry.prepare("relativity", {"gm_m3_s2": 0.0}, CASE)
