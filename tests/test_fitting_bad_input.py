"""Bad input to the fitting stage: each case raises a FittingInputError (ValueError)
subclass whose message names the problem and, where there is one, the index/value."""

from __future__ import annotations

import numpy as np
import pytest

from propagator.constants import GM_EARTH
from propagator.elements import kep_to_cart
from propagator.fitting import (DegenerateOrbitError, FittingInputError, NonFiniteInputError,
                                NonMonotonicTimesError, NotEnoughSamplesError,
                                WindowOutsideArcError, fit_broadcast_from_arrays,
                                fit_keplerian_from_arrays, osculating_history)
from propagator.twobody import propagate_twobody


@pytest.fixture(scope="module")
def arc():
    s0 = kep_to_cart(np.array([26_560e3, 0.01, 0.96, 1.0, 2.0, 0.3]), GM_EARTH)
    t = np.arange(0.0, 4 * 3600.0 + 1.0, 600.0)
    r, v = propagate_twobody(s0[:3], s0[3:], t, GM_EARTH)
    return t, r, v


def test_errors_are_value_errors() -> None:
    for cls in (DegenerateOrbitError, NonFiniteInputError, NonMonotonicTimesError,
                NotEnoughSamplesError, WindowOutsideArcError):
        assert issubclass(cls, FittingInputError) and issubclass(cls, ValueError)


def test_fewer_samples_than_parameters(arc) -> None:
    t, r, v = arc
    with pytest.raises(NotEnoughSamplesError, match="1 position samples .* for 6 parameters"):
        fit_keplerian_from_arrays(t[:1], r[:1], v[:1])
    with pytest.raises(NotEnoughSamplesError, match="for 15 parameters"):
        fit_broadcast_from_arrays(t[:4], r[:4], window=(t[0], t[3]))


def test_window_outside_arc(arc) -> None:
    t, r, v = arc
    with pytest.raises(WindowOutsideArcError, match=r"not inside the arc"):
        fit_keplerian_from_arrays(t, r, v, window=(-100.0, 3600.0))
    with pytest.raises(WindowOutsideArcError, match="start < end"):
        fit_keplerian_from_arrays(t, r, v, window=(3600.0, 0.0))
    with pytest.raises(WindowOutsideArcError, match="reference time"):
        fit_keplerian_from_arrays(t, r, v, window=(0.0, 3600.0), t_ref=7200.0)


def test_non_monotonic_times(arc) -> None:
    t, r, v = arc
    t_bad = t.copy()
    t_bad[5] = t_bad[4]
    with pytest.raises(NonMonotonicTimesError, match=r"t\[5\] = 2400.0 <= t\[4\] = 2400.0") as info:
        fit_keplerian_from_arrays(t_bad, r, v)
    assert info.value.index == 5


def test_nan_positions_and_times(arc) -> None:
    t, r, v = arc
    r_bad = r.copy()
    r_bad[7, 1] = np.nan
    with pytest.raises(NonFiniteInputError, match="positions at index 7") as info:
        fit_keplerian_from_arrays(t, r_bad, v)
    assert info.value.index == 7
    t_bad = t.copy()
    t_bad[3] = np.inf
    with pytest.raises(NonFiniteInputError, match="time at index 3"):
        fit_broadcast_from_arrays(t_bad, r)
    v_bad = v.copy()
    v_bad[2, 0] = np.nan
    with pytest.raises(NonFiniteInputError, match="velocities at index 2"):
        osculating_history(t, r, v_bad)


def test_wrong_shapes(arc) -> None:
    t, r, v = arc
    with pytest.raises(FittingInputError, match=r"shape \(25, 3\)"):
        fit_keplerian_from_arrays(t, r[:, :2])


def test_hyperbolic_arc() -> None:
    # Hyperbolic flyby (e = 1.5): elements undefined for an ellipse fit.
    s0 = kep_to_cart(np.array([-20_000e3, 1.5, 0.5, 1.0, 2.0, 0.0]), GM_EARTH)
    t = np.arange(0.0, 3600.0 + 1.0, 120.0)
    r, v = propagate_twobody(s0[:3], s0[3:], t, GM_EARTH)
    with pytest.raises(DegenerateOrbitError, match="index 0 is not elliptic.*eccentricity 1.5") as info:
        fit_keplerian_from_arrays(t, r, v)
    assert info.value.index == 0 and info.value.value == pytest.approx(1.5)
    with pytest.raises(DegenerateOrbitError, match="not a usable ellipse"):
        fit_keplerian_from_arrays(t, r)  # positions only: caught at the interpolated guess
    with pytest.raises(DegenerateOrbitError, match="not elliptic"):
        osculating_history(t, r, v)


def test_degenerate_arcs() -> None:
    t = np.arange(0.0, 600.0, 60.0)
    # Radial (rectilinear) motion: zero angular momentum.
    r = np.outer(7e6 + 10.0 * t, [1.0, 0.0, 0.0])
    v = np.outer(np.full(t.size, 10.0), [1.0, 0.0, 0.0])
    with pytest.raises(DegenerateOrbitError, match="rectilinear state at index 0"):
        fit_keplerian_from_arrays(t, r, v)
    # A sample at the centre of attraction.
    r0 = np.tile([7e6, 0.0, 0.0], (t.size, 1))
    r0[4] = 0.0
    with pytest.raises(DegenerateOrbitError, match="index 4 is at the centre"):
        fit_keplerian_from_arrays(t, r0)
