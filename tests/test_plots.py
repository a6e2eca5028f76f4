"""Tests of the study plots (propagator.study.plots): each writes a non-empty PNG, and the
RIC difference behind the comparison plot is checked against the closed form of two
phase-shifted circular orbits."""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest

from propagator.constants import GM_EARTH
from propagator.study import hdf5_store as hs
from propagator.study import plots

A = 7.0e6  # m (invented LEO)
N = math.sqrt(GM_EARTH / A**3)  # rad/s, circular orbit (Kepler's third law)
INC = math.radians(97.8)
# 2020-03-01T00:00:00 UTC in TT (TT - UTC = 69.184 s, IERS Bulletin C 52 / Leap_Second.dat)
EPOCH = dict(epoch_iso="2020-03-01T00:00:00 UTC", epoch_jd1=2458909.5, epoch_jd2=69.184 / 86400.0,
             epoch_scale="TT")
DELTA = 2e-4  # rad, phase offset of the second orbit


def arc(t: np.ndarray, phase: float = 0.0) -> np.ndarray:
    u = N * t + phase
    ci, si = math.cos(INC), math.sin(INC)
    return np.column_stack([A * np.cos(u), A * np.sin(u) * ci, A * np.sin(u) * si,
                            -A * N * np.sin(u), A * N * np.cos(u) * ci, A * N * np.cos(u) * si])


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("plots") / "study.h5"
    t = np.arange(0.0, 0.5 * 86400.0 + 1, 30.0)
    t_shift = np.arange(-5.0, 0.5 * 86400.0 + 20, 10.0)  # other grid: offset by 5 s, 10 s step
    with hs.StudyStore(path, study_name="plots") as store:
        st = arc(t)
        r = st[:, :3]
        rn = np.linalg.norm(r, axis=1)[:, None]
        el = np.column_stack([np.full_like(t, A), np.full_like(t, 1e-4), np.full_like(t, INC), np.zeros_like(t),
                              np.zeros_like(t), np.mod(N * t, 2 * math.pi)])
        w = store.begin_case("leo-a", **EPOCH, case_config_toml="", force_models=[])
        w.append(t, st, states_itrf=st, elements=el,
                 accelerations={"central_gravity": -GM_EARTH * r / rn**3,
                                "third_body_moon": np.tile([1e-6, -2e-7, 3e-7], (t.size, 1)),
                                "srp": np.tile([4e-8, 0, 0], (t.size, 1))})
        ric = np.column_stack([0.3 * np.sin(N * t), 1.2 * np.cos(N * t), 0.05 * np.sin(2 * N * t)])
        w.add_fit("two_body", {"a": A}, residuals_ric=ric, residual_times=t)
        w.finish({"nfev": 10})
        w = store.begin_case("leo-b", **EPOCH, case_config_toml="", force_models=[])
        w.append(t_shift, arc(t_shift, DELTA))
        w.finish({"nfev": 10})
        w = store.begin_case("leo-b-same-grid", **EPOCH, case_config_toml="", force_models=[])
        w.append(t, arc(t, DELTA))
        w.finish({"nfev": 10})
    return path


def _check_png(p: Path) -> None:
    assert p.is_file() and p.stat().st_size > 5000
    img = mpimg.imread(p)
    assert img.ndim == 3 and img.shape[0] > 200 and img.shape[1] > 300 and img.shape[2] in (3, 4)
    assert float(np.std(img[..., :3])) > 0.01  # not a blank canvas


def test_ric_difference_closed_form(study: Path) -> None:
    # other orbit = same circle advanced by DELTA: in the RIC frame of the first,
    # radial = A (cos DELTA - 1), in-track = A sin DELTA, cross-track = 0 (plane geometry)
    expected = np.array([A * (math.cos(DELTA) - 1.0), A * math.sin(DELTA), 0.0])
    t, d = plots.ric_difference(study, "leo-a", "leo-b-same-grid")
    assert t.size == 1441
    assert np.max(np.abs(d - expected)) < 1e-6
    # different grid: cubic Hermite interpolation.  Per component the error is at most
    # h^4/384 max|x_k''''| (cubic Hermite error bound, e.g. Burden & Faires, Numerical
    # Analysis, Theorem 3.9 -- from memory); on this circle max|x''''| = A n^4,
    # max|y''''| = A n^4 |cos i|, max|z''''| = A n^4 sin i, so the error vector (RIC is a
    # rotation) is at most sqrt(2) h^4/384 A n^4, plus rounding of differences of 7e6 m
    # coordinates (a few ulp, ~1e-9 m each).  h = 10 s.
    t, d = plots.ric_difference(study, "leo-a", "leo-b")
    h4 = 10.0**4 / 384.0 * A * N**4
    err = np.max(np.linalg.norm(d - expected, axis=1))
    assert t.size == 1441
    assert err <= math.sqrt(2.0) * h4 + 8 * np.finfo(float).eps * A, (err, h4)
    assert err > 0.5 * h4  # the other case really was interpolated (its grid is offset by 5 s)


def test_each_plot_writes_png(study: Path, tmp_path: Path) -> None:
    outs = [
        plots.plot_elements(study, "leo-a", tmp_path / "el.png"),
        plots.plot_elements(study, "leo-b", tmp_path / "el-computed.png", max_points=500),
        plots.plot_ric_difference(study, "leo-a", tmp_path / "sub" / "ric.png", other_case="leo-b"),
        plots.plot_ground_track(study, "leo-a", tmp_path / "gt.png"),
        plots.plot_ground_track(study, "leo-b", tmp_path / "gt-rotated.png", max_points=300),
        plots.plot_accelerations(study, "leo-a", tmp_path / "acc.png"),
        plots.plot_fit_residuals(study, "leo-a", tmp_path / "res.png"),
    ]
    for p in outs:
        _check_png(p)
    with pytest.raises(ValueError, match="no per-model accelerations"):
        plots.plot_accelerations(study, "leo-b", tmp_path / "x.png")
    with pytest.raises(KeyError):
        plots.plot_fit_residuals(study, "leo-a", tmp_path / "x.png", fit_name="nope")
