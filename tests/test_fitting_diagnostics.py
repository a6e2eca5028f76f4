"""Fit diagnostics: RIC residual statistics, extrapolation error, sliding windows, plots.

Truth arcs: propagator.twobody.propagate_twobody (Vallado 2013 Algorithm 8).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from propagator.constants import ERA_RATE_TURNS_PER_UT1_DAY, GM_EARTH, SECONDS_PER_DAY
from propagator.elements import kep_to_cart
from propagator.fitting import (WindowOutsideArcError, extrapolation_error, fit_keplerian_from_arrays,
                                fit_residuals, plot_residuals_ric, plot_sliding_windows,
                                residual_stats, ric_residuals, sliding_window_fits)
from propagator.twobody import propagate_twobody

OMEGA_ERA = 2.0 * math.pi * ERA_RATE_TURNS_PER_UT1_DAY / SECONDS_PER_DAY  # IERS Conventions 2010 eq. 5.15


def test_residual_stats_by_hand() -> None:
    res = np.array([[3.0, 0.0, 4.0], [0.0, -1.0, 0.0], [-3.0, 1.0, 0.0], [0.0, 0.0, 0.0]])
    st = residual_stats(res)
    assert st.n == 4
    assert st.rms_r == pytest.approx(math.sqrt(18.0 / 4))
    assert st.rms_i == pytest.approx(math.sqrt(2.0 / 4))
    assert st.rms_c == pytest.approx(2.0)
    assert st.rms_3d == pytest.approx(math.sqrt((25.0 + 1.0 + 10.0) / 4))
    assert (st.max_r, st.max_i, st.max_c, st.max_3d) == (3.0, 1.0, 4.0, 5.0)
    assert st.to_dict()["rms_c"] == 2.0


def test_ric_axes() -> None:
    # Circular equatorial orbit at (r, 0, 0) moving along +y: R = x, I = y, C = z.
    r = np.array([[7e6, 0.0, 0.0]])
    v = np.array([[0.0, 7.5e3, 0.0]])
    d = np.array([[1.0, 2.0, 3.0]])
    np.testing.assert_allclose(ric_residuals(d, r, v), d)
    # Earth-fixed: v_itrf = v - OMEGA x r keeps the direction here, RIC unchanged.
    v_itrf = v - np.array([[0.0, 7.2921151467e-5 * 7e6, 0.0]])
    np.testing.assert_allclose(ric_residuals(d, r, v_itrf, frame="itrf"), d, atol=1e-12)


def _arc(t: np.ndarray):
    s0 = kep_to_cart(np.array([26_560e3, 0.01, 0.96, 1.0, 2.0, 0.3]), GM_EARTH)
    return propagate_twobody(s0[:3], s0[3:], t, GM_EARTH)


def test_fit_residuals_and_extrapolation() -> None:
    t = np.arange(0.0, 6 * 3600.0 + 1.0, 300.0)
    r, v = _arc(t)
    fit = fit_keplerian_from_arrays(t, r, v, window=(0.0, 4 * 3600.0))
    ric, st = fit_residuals(fit, fit.times, r[:49], v[:49])
    assert ric.shape == (49, 3) and st.rms_3d < 1e-7
    ex_ric, ex = extrapolation_error(fit, t, r, v, after=3600.0)
    assert ex.n == 12 and ex.max_3d < 1e-6   # exact model: no growth
    with pytest.raises(WindowOutsideArcError, match="before window end"):
        extrapolation_error(fit, t, r, v, after=3 * 3600.0)


def test_extrapolation_detects_model_error() -> None:
    # Truth with a constant 1e-7 m/s^2 extra radial acceleration is not two-body: the
    # extrapolation error must grow well beyond the in-window residual.
    from scipy.integrate import solve_ivp

    def rhs(_t: float, y: np.ndarray) -> np.ndarray:
        r = y[:3]
        rn = np.linalg.norm(r)
        return np.concatenate([y[3:], -GM_EARTH * r / rn ** 3 + 1e-7 * r / rn])

    s0 = kep_to_cart(np.array([26_560e3, 0.01, 0.96, 1.0, 2.0, 0.3]), GM_EARTH)
    t = np.arange(0.0, 6 * 3600.0 + 1.0, 300.0)
    sol = solve_ivp(rhs, (0.0, t[-1]), s0, method="DOP853", rtol=1e-12, atol=1e-6, t_eval=t)
    r, v = sol.y[:3].T, sol.y[3:].T
    fit = fit_keplerian_from_arrays(t, r, v, window=(0.0, 4 * 3600.0))
    _, ex = extrapolation_error(fit, t, r, v, after=2 * 3600.0)
    assert ex.max_3d > 3.0 * fit.max_3d > 0.0


def test_sliding_windows_broadcast(tmp_path) -> None:
    t = np.arange(0.0, 12 * 3600.0 + 1.0, 300.0)
    r, v = _arc(t)
    th = 0.3 + OMEGA_ERA * t
    c, s = np.cos(th), np.sin(th)
    r_ef = np.stack([c * r[:, 0] + s * r[:, 1], -s * r[:, 0] + c * r[:, 1], r[:, 2]], axis=1)
    table = sliding_window_fits(t, r_ef, kind="broadcast", window_s=4 * 3600.0, step_s=2 * 3600.0,
                                extrapolate_s=3600.0)
    assert len(table.rows) == 5 and table.all_converged
    assert [row["t_start_s"] for row in table.rows] == [0.0, 7200.0, 14400.0, 21600.0, 28800.0]
    assert table.worst_rms_3d < 1e-6 and table.median_rms_3d <= table.worst_rms_3d
    assert table.rows[-1]["extrap_rms_3d_m"] != table.rows[-1]["extrap_rms_3d_m"]  # NaN: past the arc
    assert table.rows[0]["extrap_max_3d_m"] < 1e-5
    d = table.to_dict()
    assert d["n_windows"] == 5 and "rms_r_m" in d["rows"][0]
    assert "RMS 3D" in table.format()
    p = plot_sliding_windows(table, tmp_path / "sliding.png")
    assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    ric, _ = fit_residuals(fit_keplerian_from_arrays(t, r), t, r)
    p2 = plot_residuals_ric(t, ric, tmp_path / "res.png", title="two-body", window=(0.0, t[-1]))
    assert p2.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_sliding_windows_keplerian_arc_too_short() -> None:
    t = np.arange(0.0, 3 * 3600.0 + 1.0, 300.0)
    r, v = _arc(t)
    with pytest.raises(WindowOutsideArcError, match="shorter than"):
        sliding_window_fits(t, r, v, kind="keplerian", window_s=4 * 3600.0)
    table = sliding_window_fits(t, r, v, kind="keplerian", window_s=3600.0)
    assert len(table.rows) == 3 and table.worst_rms_3d < 1e-7
