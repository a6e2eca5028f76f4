"""Two-body Keplerian fit (propagator.fitting.keplerian_fit).

Truth arcs come from propagator.twobody.propagate_twobody (universal variables, Vallado
2013 Algorithm 8), an independent code path from the fit's equinoctial model, and the
generating elements from propagator.elements.kep_to_cart (Vallado 2013 Algorithm 10).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from propagator.constants import GM_EARTH
from propagator.elements import kep_to_cart, mean_to_true
from propagator.fitting import (FitNotConvergedError, FitNotConvergedWarning,
                                fit_keplerian_from_arrays)
from propagator.twobody import propagate_twobody


def _arc(a: float, e: float, i: float, raan: float, argp: float, M0: float, times: np.ndarray):
    """Two-body arc from elements at t = 0 (M0 = mean anomaly at t = 0)."""
    nu0 = float(mean_to_true(M0, e))
    s0 = kep_to_cart(np.array([a, e, i, raan, argp, nu0]), GM_EARTH)
    r, v = propagate_twobody(s0[:3], s0[3:], times, GM_EARTH)
    return r, v


def _dangle(x: float, y: float) -> float:
    return abs((x - y + np.pi) % (2 * np.pi) - np.pi)


@pytest.mark.parametrize("case", [
    # (a, e, i, raan, argp, M0, duration, step): GNSS-like MEO over 4 h; eccentric LEO over 3 revs;
    # retrograde HEO-like; near-circular equatorial (singular for the Keplerian angles).
    (26_560e3, 0.01, np.radians(55.0), 1.0, 2.0, 3.0, 4 * 3600.0, 300.0),
    (7_000e3, 0.2, np.radians(98.0), 4.0, 0.3, 5.5, 3 * 5800.0, 60.0),
    (20_000e3, 0.5, np.radians(120.0), 2.5, 4.0, 0.2, 12 * 3600.0, 600.0),
])
def test_recovers_generating_elements(case) -> None:
    a, e, i, raan, argp, M0, duration, step = case
    t = np.arange(0.0, duration + 1.0, step)
    r, v = _arc(a, e, i, raan, argp, M0, t)
    t_ref = t[len(t) // 2] + 0.37 * step  # between samples: not an interpolation node
    fit = fit_keplerian_from_arrays(t, r, v, t_ref=t_ref)
    n = np.sqrt(GM_EARTH / a ** 3)
    assert fit.converged
    assert abs(fit.a - a) < 1e-6                     # brief: a to 1e-6 m
    assert abs(fit.e - e) < 1e-12
    for got, want in ((fit.i, i), (fit.raan, raan), (fit.argp, argp), (fit.M, M0 + n * t_ref)):
        assert _dangle(got, want) < 1e-11             # brief: angles to 1e-11 rad
    # Residuals at round-off: |r| ~ 3e7 m, one ulp ~ 4e-9 m.
    assert fit.rms_3d < 5e-8 * a / 26_560e3 + 2e-8
    # Same answer from positions alone (spline velocities only seed the guess).
    fit2 = fit_keplerian_from_arrays(t, r, t_ref=t_ref)
    assert abs(fit2.a - a) < 1e-6 and _dangle(fit2.M, M0 + n * t_ref) < 1e-11


def test_near_circular_equatorial_is_not_singular() -> None:
    # e = 1e-9, i = 1e-9: the classical angles are ill-defined, the equinoctial fit is not.
    t = np.arange(0.0, 4 * 3600.0 + 1.0, 120.0)
    r, v = _arc(42_164e3, 1e-9, 1e-9, 0.7, 0.1, 1.0, t)
    fit = fit_keplerian_from_arrays(t, r)
    assert fit.converged and abs(fit.a - 42_164e3) < 1e-6 and fit.rms_3d < 5e-8
    assert fit.e < 1e-8 and fit.i < 1e-8
    # the position model reproduces the arc at round-off, also at samples it did not see
    t_mid = t[:-1] + 60.0
    r_mid, _ = propagate_twobody(r[0], v[0], t_mid, GM_EARTH)
    assert np.max(np.linalg.norm(fit.position(t_mid) - r_mid, axis=1)) < 1e-7


def test_window_and_reference_time() -> None:
    t = np.arange(0.0, 8 * 3600.0 + 1.0, 300.0)
    r, v = _arc(26_560e3, 0.01, 0.9, 1.0, 2.0, 3.0, t)
    fit = fit_keplerian_from_arrays(t, r, v, window=(3600.0, 3 * 3600.0))
    assert fit.window == (3600.0, 3 * 3600.0)
    assert fit.t_ref == 2 * 3600.0
    assert fit.n_samples == 25 and fit.times[0] == 3600.0 and fit.times[-1] == 3 * 3600.0
    d = fit.to_dict()
    assert d["converged"] and d["n_samples"] == 25 and d["rms_3d_m"] < 1e-7
    # The two-body model extrapolates exactly on a two-body arc.
    assert np.max(np.linalg.norm(fit.position(t) - r, axis=1)) < 1e-6


def test_non_convergence_is_reported() -> None:
    t = np.arange(0.0, 4 * 3600.0 + 1.0, 300.0)
    r, _ = _arc(26_560e3, 0.01, 0.9, 1.0, 2.0, 3.0, t)
    r_noisy = r + np.random.default_rng(3).normal(0.0, 1000.0, r.shape)  # km-level noise
    with pytest.warns(FitNotConvergedWarning, match="did not converge.*best 3D RMS"):
        fit = fit_keplerian_from_arrays(t, r_noisy, max_nfev=1)
    assert not fit.converged and fit.status == 0 and np.isfinite(fit.rms_3d)
    with pytest.raises(FitNotConvergedError) as info:
        fit_keplerian_from_arrays(t, r_noisy, max_nfev=1, on_failure="raise")
    assert info.value.result.converged is False
    assert np.isfinite(info.value.result.rms_3d)
    # With the normal budget the same noisy arc converges (no warning).
    with warnings.catch_warnings():
        warnings.simplefilter("error", FitNotConvergedWarning)
        ok = fit_keplerian_from_arrays(t, r_noisy)
    assert ok.converged and 1000.0 < ok.rms_3d < 2000.0
