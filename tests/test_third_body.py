"""Sun and Moon third-body kernels: cancellation-free form, partials, registry wiring.

References: the direct formula a = GM((s - r)/|s - r|^3 - s/|s|^3) (Montenbruck & Gill,
Satellite Orbits, 2000, sec. 3.3.1) evaluated in 60-digit decimal arithmetic (Python's
``decimal``) as the exact value; the first-order tidal approximation
a ~ GM/|s|^3 (3 (s_hat.r) s_hat - r) (same section) as an independent magnitude check.
"""

from __future__ import annotations

import decimal

import numpy as np
import pytest

from forcemodels import ephemeris as eph
from forcemodels import registry
from forcemodels.environment import ENV_MOON, ENV_SIZE, ENV_SUN
from forcemodels.models import moon_gravity, sun_gravity
from forcemodels.registry import CaseSetup
from propagator.constants import AU, GM_MOON, GM_SUN, J2000_JD

RNG = np.random.default_rng(8)


def _exact_direct(r: np.ndarray, s: np.ndarray, gm: float) -> np.ndarray:
    """GM((s - r)/|s - r|^3 - s/|s|^3) with 60 significant digits (decimal)."""
    with decimal.localcontext() as ctx:
        ctx.prec = 60
        R = [decimal.Decimal(float(x)) for x in r]
        S = [decimal.Decimal(float(x)) for x in s]
        G = decimal.Decimal(gm)
        D = [S[i] - R[i] for i in range(3)]
        dn = sum(x * x for x in D).sqrt()
        sn = sum(x * x for x in S).sqrt()
        out = [G * (D[i] / dn ** 3 - S[i] / sn ** 3) for i in range(3)]
        return np.array([float(x) for x in out])


def _env(t: float = 0.0, epoch=(J2000_JD + 8000.25, 0.0)) -> np.ndarray:
    table = eph.build_sun_moon_table(epoch, 0.0, 86400.0)
    env = np.zeros(ENV_SIZE)
    eph.sun_moon_nb(t, table, env[ENV_SUN:ENV_SUN + 3], env[ENV_MOON:ENV_MOON + 3])
    return env


def _random_unit() -> np.ndarray:
    u = RNG.normal(size=3)
    return u / np.linalg.norm(u)


@pytest.mark.parametrize("radius", [6.8e6, 2.656e7, 4.2164e7, 1.5e8])
def test_battin_form_matches_exact_direct(radius: float) -> None:
    """Kernel agrees with the 60-digit direct formula to 1e-14 of |a| (Sun and Moon)."""
    env = _env()
    for body, mod, gm in (("sun", sun_gravity, GM_SUN), ("moon", moon_gravity, GM_MOON)):
        s = env[ENV_SUN:ENV_SUN + 3] if body == "sun" else env[ENV_MOON:ENV_MOON + 3]
        for _ in range(10):
            r = radius * _random_unit()
            acc = np.zeros(3)
            mod.accel(0.0, r, np.zeros(3), env, np.array([gm]), np.zeros(0), acc)
            ref = _exact_direct(r, s, gm)
            assert np.linalg.norm(acc - ref) < 1e-14 * np.linalg.norm(ref), (body, radius)


def test_naive_double_formula_loses_digits() -> None:
    """Why the Battin form: the naive double formula is visibly worse for the Sun in LEO."""
    env = _env()
    s = env[ENV_SUN:ENV_SUN + 3].copy()
    worst_naive = worst_battin = 0.0
    for _ in range(20):
        r = 6.8e6 * _random_unit()
        d = s - r
        naive = GM_SUN * (d / np.linalg.norm(d) ** 3 - s / np.linalg.norm(s) ** 3)
        acc = np.zeros(3)
        sun_gravity.accel(0.0, r, np.zeros(3), env, np.array([GM_SUN]), np.zeros(0), acc)
        ref = _exact_direct(r, s, GM_SUN)
        worst_naive = max(worst_naive, np.linalg.norm(naive - ref) / np.linalg.norm(ref))
        worst_battin = max(worst_battin, np.linalg.norm(acc - ref) / np.linalg.norm(ref))
    # Each term is ~|s|/|r| = 2e4 times the result, so ~1e-16 * 2e4 = 2e-12 rounding.
    assert worst_naive > 1e-13
    assert worst_battin < 1e-14


def test_tidal_approximation_magnitude() -> None:
    """First-order tide GM/|s|^3 (3 (s_hat.r) s_hat - r): agreement to O(|r|/|s|)."""
    env = _env()
    r = 2.656e7 * _random_unit()
    for s, gm, mod in ((env[ENV_SUN:ENV_SUN + 3], GM_SUN, sun_gravity), (env[ENV_MOON:ENV_MOON + 3], GM_MOON, moon_gravity)):
        sn = np.linalg.norm(s)
        sh = s / sn
        tide = gm / sn ** 3 * (3.0 * (sh @ r) * sh - r)
        acc = np.zeros(3)
        mod.accel(0.0, r, np.zeros(3), env, np.array([gm]), np.zeros(0), acc)
        assert np.linalg.norm(acc - tide) < 3.0 * 1.5 * (np.linalg.norm(r) / sn) * np.linalg.norm(tide) + 1e-15
    # Sun at GNSS radius: |a| <= 2 GM_sun r / AU^3 ~ 2.1e-6 m/s^2 (order of magnitude,
    # Montenbruck & Gill 2000 fig. 3.1 shows ~1e-6 .. 1e-5 for Sun and Moon at GPS; from memory).
    acc = np.zeros(3)
    sun_gravity.accel(0.0, r, np.zeros(3), env, np.array([GM_SUN]), np.zeros(0), acc)
    assert 1e-7 < np.linalg.norm(acc) < 2.2 * GM_SUN * 2.656e7 / AU ** 3


@pytest.mark.parametrize("mod,gm", [(sun_gravity, GM_SUN), (moon_gravity, GM_MOON)])
def test_partials_vs_finite_differences(mod, gm) -> None:
    env = _env()
    p = np.array([gm])
    for radius in (7.0e6, 2.656e7):
        r = radius * _random_unit()
        dadr = np.zeros((3, 3))
        dadv = np.zeros((3, 3))
        mod.partials(0.0, r, np.zeros(3), env, p, np.zeros(0), dadr, dadv)
        h = 10.0
        fd = np.zeros((3, 3))
        for j in range(3):
            rp, rm = r.copy(), r.copy()
            rp[j] += h
            rm[j] -= h
            ap, am = np.zeros(3), np.zeros(3)
            mod.accel(0.0, rp, np.zeros(3), env, p, np.zeros(0), ap)
            mod.accel(0.0, rm, np.zeros(3), env, p, np.zeros(0), am)
            fd[:, j] = (ap - am) / (2 * h)
        np.testing.assert_allclose(dadr, fd, rtol=0, atol=1e-8 * np.abs(fd).max())
        np.testing.assert_allclose(dadr, dadr.T, rtol=0, atol=4e-16 * np.abs(dadr).max())  # rounding only
        assert not dadv.any()


def test_registry_prepare_and_metadata() -> None:
    case = CaseSetup(epoch=(J2000_JD, 0.0), t_start=0.0, t_end=86400.0)
    pm = registry.prepare("sun_gravity", {}, case)
    assert pm.p[0] == GM_SUN and "sun" in pm.needs
    assert pm.metadata["ephemeris"] == "DE421"
    pm = registry.prepare("moon_gravity", {"gm_m3_s2": 4.9028e12}, case)
    assert pm.p[0] == 4.9028e12 and "moon" in pm.needs
    with pytest.raises(ValueError, match="gm_m3_s2"):
        registry.prepare("moon_gravity", {"gm_m3_s2": -1.0}, case)
    case_2300 = CaseSetup(epoch=(J2000_JD + 300 * 365.25, 0.0), t_start=0.0, t_end=86400.0)
    assert registry.prepare("sun_gravity", {}, case_2300).metadata["ephemeris"].startswith("analytic")
