"""Broadcast-style element sets (propagator.fitting.broadcast).

Reference for the evaluator: IS-GPS-200 (Navstar GPS Space Segment / Navigation User
Interfaces), section 20.3.3.4.3, Table 20-IV "Elements of Coordinate Systems".  The test
re-transcribes that table with scalar ``math`` and a different Kepler solver
(bisection).  No published numerical worked example of Table 20-IV could be found to
cite, so none is used.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from propagator.constants import (ERA_RATE_TURNS_PER_UT1_DAY, GM_EARTH, J2_EARTH, R_EARTH_EQ,
                                  SECONDS_PER_DAY)
from propagator.elements import kep_to_cart, mean_to_true
from propagator.fitting import (BroadcastElements, NotEnoughSamplesError, OutOfScopeError,
                                WindowOutsideArcError, broadcast_position,
                                fit_broadcast_from_arrays)
from propagator.twobody import propagate_twobody

OMEGA_ERA = 2.0 * math.pi * ERA_RATE_TURNS_PER_UT1_DAY / SECONDS_PER_DAY  # IERS Conventions 2010 eq. 5.15


def _table_20_iv(eph: dict, t: float) -> tuple[float, float, float]:
    """IS-GPS-200 Table 20-IV, transcribed line by line (scalar math)."""
    mu = 3.986005e14               # IS-GPS-200 Table 20-IV: WGS 84 value of GM for GPS user
    Omega_e_dot = 7.2921151467e-5  # IS-GPS-200 Table 20-IV: WGS 84 Earth rotation rate
    A = eph["sqrt_a"] ** 2
    n0 = math.sqrt(mu / A ** 3)
    tk = t - eph["toe"]
    n = n0 + eph["delta_n"]
    Mk = eph["m0"] + n * tk
    e = eph["e"]
    lo, hi = Mk - 1.0, Mk + 1.0    # Kepler: Mk = Ek - e sin Ek, root within |Ek - Mk| <= e < 1
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if mid - e * math.sin(mid) - Mk > 0.0:
            hi = mid
        else:
            lo = mid
    Ek = 0.5 * (lo + hi)
    vk = math.atan2(math.sqrt(1 - e * e) * math.sin(Ek) / (1 - e * math.cos(Ek)),
                    (math.cos(Ek) - e) / (1 - e * math.cos(Ek)))
    Phik = vk + eph["omega"]
    duk = eph["cus"] * math.sin(2 * Phik) + eph["cuc"] * math.cos(2 * Phik)
    drk = eph["crs"] * math.sin(2 * Phik) + eph["crc"] * math.cos(2 * Phik)
    dik = eph["cis"] * math.sin(2 * Phik) + eph["cic"] * math.cos(2 * Phik)
    uk = Phik + duk
    rk = A * (1 - e * math.cos(Ek)) + drk
    ik = eph["i0"] + dik + eph["idot"] * tk
    xkp = rk * math.cos(uk)
    ykp = rk * math.sin(uk)
    Omegak = eph["omega0"] + (eph["omega_dot"] - Omega_e_dot) * tk - Omega_e_dot * eph["toe"]
    xk = xkp * math.cos(Omegak) - ykp * math.cos(ik) * math.sin(Omegak)
    yk = xkp * math.sin(Omegak) + ykp * math.cos(ik) * math.cos(Omegak)
    zk = ykp * math.sin(ik)
    return xk, yk, zk


def _random_set(rng: np.random.Generator) -> BroadcastElements:
    # Magnitudes typical of GPS LNAV sets (common practice), incl. large eccentricity.
    return BroadcastElements(
        toe=rng.uniform(-1e5, 5e5), sqrt_a=rng.uniform(5100.0, 5200.0), e=rng.uniform(0.0, 0.7),
        i0=rng.uniform(0.1, 3.0), omega0=rng.uniform(-np.pi, np.pi), omega=rng.uniform(-np.pi, np.pi),
        m0=rng.uniform(-np.pi, np.pi), delta_n=rng.normal(0, 5e-9), omega_dot=rng.normal(-8e-9, 1e-9),
        idot=rng.normal(0, 5e-10), cuc=rng.normal(0, 5e-6), cus=rng.normal(0, 5e-6),
        crc=rng.normal(0, 200.0), crs=rng.normal(0, 100.0), cic=rng.normal(0, 1e-7),
        cis=rng.normal(0, 1e-7))


def test_evaluator_matches_literal_transcription() -> None:
    rng = np.random.default_rng(20)
    worst = 0.0
    for _ in range(40):
        el = _random_set(rng)
        t = el.toe + rng.uniform(-3 * 3600, 3 * 3600, 7)
        got = broadcast_position(el, t)
        want = np.array([_table_20_iv(el.to_dict(), float(x)) for x in t])
        worst = max(worst, float(np.max(np.linalg.norm(got - want, axis=1))))
    assert worst < 1e-6  # both double precision; |r| ~ 2.7e7 m


def test_evaluator_hand_case() -> None:
    # Circular polar orbit, no corrections, node on the Greenwich meridian at toe:
    # at tk = 0 the satellite is at (A, 0, 0); a quarter period later over the pole.
    A = 26_560e3
    toe = 1000.0
    el = BroadcastElements(toe=toe, sqrt_a=math.sqrt(A), e=0.0, i0=math.pi / 2, omega0=7.2921151467e-5 * toe,
                           omega=0.0, m0=0.0)
    quarter = 0.5 * math.pi / math.sqrt(3.986005e14 / A ** 3)
    p = broadcast_position(el, [toe, toe + quarter])
    np.testing.assert_allclose(p[0], [A, 0.0, 0.0], atol=1e-6)
    np.testing.assert_allclose(p[1], [0.0, 0.0, A], atol=1e-6)


def _earth_fixed(r: np.ndarray, t: np.ndarray, theta0: float = 0.3) -> np.ndarray:
    """Rotate inertial vectors into a frame turning at the ERA rate about z."""
    th = theta0 + OMEGA_ERA * t
    c, s = np.cos(th), np.sin(th)
    return np.stack([c * r[:, 0] + s * r[:, 1], -s * r[:, 0] + c * r[:, 1], r[:, 2]], axis=1)


def test_fit_two_body_arc_is_exact() -> None:
    a, e, i = 26_560e3, 0.01, np.radians(55.0)
    s0 = kep_to_cart(np.array([a, e, i, 1.0, 2.0, float(mean_to_true(3.0, e))]), GM_EARTH)
    t = np.arange(0.0, 4 * 3600.0 + 1.0, 300.0) + 50_000.0
    r, _ = propagate_twobody(s0[:3], s0[3:], t - t[0], GM_EARTH)
    fit = fit_broadcast_from_arrays(t, _earth_fixed(r, t))
    el = fit.elements
    assert fit.converged and fit.toe == t[0] + 7200.0
    assert fit.rms_3d < 1e-6
    # The set must be the generating ellipse: A = a; the GM difference goes into Delta n,
    # the ERA rate minus the spec's OMEGA_e-dot into OMEGA-dot; corrections vanish.
    assert abs(el.sqrt_a ** 2 - a) < 1e-5
    assert abs(el.e - e) < 1e-12 and abs(el.i0 - i) < 1e-12
    assert abs(el.delta_n - (math.sqrt(GM_EARTH / a ** 3) - math.sqrt(3.986005e14 / a ** 3))) < 1e-18
    assert abs(el.omega_dot - (7.2921151467e-5 - OMEGA_ERA)) < 1e-17
    assert abs(el.idot) < 1e-17
    assert max(abs(el.cuc), abs(el.cus), abs(el.cic), abs(el.cis)) < 1e-13
    assert max(abs(el.crc), abs(el.crs)) < 1e-6


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


def _j2_arc(a: float, e: float, i: float, times: np.ndarray) -> np.ndarray:
    s0 = kep_to_cart(np.array([a, e, i, 1.0, 2.0, float(mean_to_true(3.0, e))]), GM_EARTH)
    sol = solve_ivp(_j2_rhs, (times[0], times[-1]), s0, method="DOP853", rtol=1e-12, atol=1e-6,
                    t_eval=times)
    assert sol.success
    return sol.y[:3].T


def test_fit_j2_meo_arc_cm_level() -> None:
    # Near-circular MEO (e = 0.001) with J2 over the 4-h window: cm-level fit.
    t = np.arange(0.0, 4 * 3600.0 + 1.0, 60.0)
    r = _earth_fixed(_j2_arc(26_560e3, 0.001, np.radians(55.0), t), t)
    fit = fit_broadcast_from_arrays(t, r)
    assert fit.converged
    assert fit.rms_3d < 0.03 and fit.max_3d < 0.10
    assert fit.initial_rms_3d > 100.0  # the harmonic terms did the work
    assert 100.0 < abs(fit.elements.crc) < 1000.0  # J2 2u radius term, hundreds of metres at MEO


def test_fit_rejects_bad_windows_and_equatorial_orbits() -> None:
    t = np.arange(0.0, 4 * 3600.0 + 1.0, 600.0)
    a = 26_560e3
    s0 = kep_to_cart(np.array([a, 0.01, np.radians(55.0), 1.0, 2.0, 0.0]), GM_EARTH)
    r = _earth_fixed(propagate_twobody(s0[:3], s0[3:], t, GM_EARTH)[0], t)
    with pytest.raises(WindowOutsideArcError, match="shorter than"):
        fit_broadcast_from_arrays(t, r, window_length=5 * 3600.0)
    with pytest.raises(WindowOutsideArcError, match="not inside the arc"):
        fit_broadcast_from_arrays(t, r, window=(3600.0, 6 * 3600.0))
    with pytest.raises(WindowOutsideArcError, match="toe"):
        fit_broadcast_from_arrays(t, r, toe=5 * 3600.0)
    with pytest.raises(NotEnoughSamplesError, match="4 position samples"):
        fit_broadcast_from_arrays(t, r, window=(0.0, 1800.0))
    s_eq = kep_to_cart(np.array([a, 0.01, np.radians(0.5), 1.0, 2.0, 0.0]), GM_EARTH)
    r_eq = _earth_fixed(propagate_twobody(s_eq[:3], s_eq[3:], t, GM_EARTH)[0], t)
    with pytest.raises(OutOfScopeError, match="inclination 0.5"):
        fit_broadcast_from_arrays(t, r_eq)


def test_to_dict_round_trip() -> None:
    el = _random_set(np.random.default_rng(5))
    el2 = BroadcastElements.from_dict(el.to_dict())
    assert el2 == el


def test_gcrf_path_uses_frames_at_each_sample() -> None:
    # Reference: propagator.frames.gcrf_to_itrf (IERS Conventions 2010 eq. 5.1 via pyerfa),
    # called sample by sample; the fitting stage's vectorised conversion must agree.
    from propagator.fitting import fit_broadcast_from_gcrf, gcrf_arc_to_itrf
    from propagator.frames import gcrf_to_itrf
    from propagator.timescales import Epoch

    a = 26_560e3
    s0 = kep_to_cart(np.array([a, 0.01, np.radians(55.0), 1.0, 2.0, 0.5]), GM_EARTH)
    t = np.arange(0.0, 4 * 3600.0 + 1.0, 600.0)
    r, v = propagate_twobody(s0[:3], s0[3:], t, GM_EARTH)
    epoch = Epoch.from_iso("2024-03-01T00:00:00", "UTC").to("TT")
    r_itrf, v_itrf = gcrf_arc_to_itrf(epoch, t, r, v)
    for k in (0, 7, len(t) - 1):
        rk, vk = gcrf_to_itrf(epoch + float(t[k]), r[k], v[k])
        assert np.max(np.abs(r_itrf[k] - rk)) < 1e-6 and np.max(np.abs(v_itrf[k] - vk)) < 1e-9
    fit = fit_broadcast_from_gcrf(epoch, t, r, v)
    # Limited by polar motion (module docstring: ~8 cm RMS); a time or frame mix-up would
    # give kilometres.
    assert fit.converged and fit.rms_3d < 0.3


def test_broadcast_non_convergence_is_reported() -> None:
    from propagator.fitting import FitNotConvergedError, FitNotConvergedWarning

    t = np.arange(0.0, 4 * 3600.0 + 1.0, 60.0)
    r = _earth_fixed(_j2_arc(26_560e3, 0.001, np.radians(55.0), t), t)
    with pytest.warns(FitNotConvergedWarning, match="broadcast-style fit did not converge"):
        fit = fit_broadcast_from_arrays(t, r, max_nfev=2)
    assert not fit.converged and fit.rms_3d > 0.03  # stopped early: worse than the converged fit
    with pytest.raises(FitNotConvergedError) as info:
        fit_broadcast_from_arrays(t, r, max_nfev=2, on_failure="raise")
    assert info.value.result.elements.sqrt_a > 0.0
