"""Osculating element histories (propagator.fitting.osculating).

Cross-checks against an independent implementation, propagator.elements (numba, scalar,
Vallado 2013 Algorithm 9 / Broucke & Cefola 1972), and round trips through both
equinoctial sets (Broucke & Cefola 1972 retrograde factor I = +1 and -1).
"""

from __future__ import annotations

import numpy as np
import pytest

from propagator.constants import GM_EARTH
from propagator.elements import cart_to_equinoctial, cart_to_kep, kep_to_cart
from propagator.fitting.osculating import (cartesian_from_equinoctial, equinoctial_from_cartesian,
                                           equinoctial_to_keplerian, keplerian_from_cartesian,
                                           keplerian_to_equinoctial, osculating_history)


def _random_elements(rng: np.random.Generator, n: int, i_lo: float, i_hi: float) -> np.ndarray:
    a = rng.uniform(6.8e6, 4.5e7, n)
    e = rng.uniform(0.0, 0.8, n)
    i = rng.uniform(i_lo, i_hi, n)
    raan, argp, nu = (rng.uniform(0.0, 2 * np.pi, n) for _ in range(3))
    return np.stack([a, e, i, raan, argp, nu], axis=1)


def _angle_diff(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return np.abs((np.asarray(x) - np.asarray(y) + np.pi) % (2 * np.pi) - np.pi)


def test_keplerian_matches_elements_module() -> None:
    # Reference: propagator.elements.cart_to_kep (separate scalar numba code path).
    rng = np.random.default_rng(7)
    el = _random_elements(rng, 200, 0.05, np.pi - 0.05)
    states = kep_to_cart(el)
    ref = cart_to_kep(states)
    got = keplerian_from_cartesian(states[:, :3], states[:, 3:])
    np.testing.assert_allclose(got["a"], ref[:, 0], rtol=1e-12)
    np.testing.assert_allclose(got["e"], ref[:, 1], atol=1e-12)
    assert np.max(np.abs(got["i"] - ref[:, 2])) < 1e-12
    for name, col in (("raan", 3), ("argp", 4), ("nu", 5)):
        assert np.max(_angle_diff(got[name], ref[:, col])) < 1e-9, name


def test_equinoctial_direct_matches_elements_module() -> None:
    # Reference: propagator.elements.cart_to_equinoctial (I = +1, Broucke & Cefola 1972).
    rng = np.random.default_rng(8)
    states = kep_to_cart(_random_elements(rng, 200, 0.0, 2.5))
    ref = cart_to_equinoctial(states)
    got = equinoctial_from_cartesian(states[:, :3], states[:, 3:], retro=1)
    np.testing.assert_allclose(got["a"], ref[:, 0], rtol=1e-12)
    for name, col in (("h", 1), ("k", 2), ("p", 3), ("q", 4)):
        np.testing.assert_allclose(got[name], ref[:, col], atol=1e-12, err_msg=name)
    assert np.max(_angle_diff(got["lam"], ref[:, 5])) < 1e-11


@pytest.mark.parametrize("retro, i_lo, i_hi", [(1, 0.0, 2.8), (-1, 0.4, np.pi)])
def test_equinoctial_round_trip_and_keplerian_consistency(retro: int, i_lo: float, i_hi: float) -> None:
    rng = np.random.default_rng(9 + retro)
    states = kep_to_cart(_random_elements(rng, 300, i_lo, i_hi))
    r, v = states[:, :3], states[:, 3:]
    eq = equinoctial_from_cartesian(r, v, retro=retro)
    r2, v2 = cartesian_from_equinoctial(eq["a"], eq["h"], eq["k"], eq["p"], eq["q"], eq["lam"],
                                        retro=retro)
    assert np.max(np.linalg.norm(r2 - r, axis=1) / np.linalg.norm(r, axis=1)) < 1e-13
    assert np.max(np.linalg.norm(v2 - v, axis=1) / np.linalg.norm(v, axis=1)) < 1e-13
    # The equinoctial definitions (Broucke & Cefola 1972) against the Keplerian ones.
    kep = keplerian_from_cartesian(r, v)
    back = equinoctial_to_keplerian(eq["a"], eq["h"], eq["k"], eq["p"], eq["q"], eq["lam"], retro)
    np.testing.assert_allclose(back["e"], kep["e"], atol=1e-12)
    assert np.max(np.abs(back["i"] - kep["i"])) < 1e-12
    assert np.max(_angle_diff(back["raan"], kep["raan"])) < 1e-10
    good = kep["e"] > 1e-3  # argp and M individually defined
    assert np.max(_angle_diff(back["argp"][good], kep["argp"][good])) < 1e-9
    assert np.max(_angle_diff(back["M"][good], kep["M"][good])) < 1e-9
    fwd = keplerian_to_equinoctial(kep["a"], kep["e"], kep["i"], kep["raan"], kep["argp"], kep["M"], retro)
    for name in ("h", "k", "p", "q"):
        np.testing.assert_allclose(fwd[name], eq[name], atol=1e-11, err_msg=name)


def test_history_shapes_and_to_dict() -> None:
    el = np.array([7.0e6, 0.01, 1.0, 0.5, 0.3, 0.0])
    states = kep_to_cart(np.tile(el, (5, 1)))
    hist = osculating_history(np.arange(5.0), states[:, :3], states[:, 3:], GM_EARTH)
    assert hist.retro == 1 and hist.a.shape == (5,)
    d = hist.to_dict()
    assert set(("a", "e", "i", "raan", "argp", "M", "h", "k", "p", "q", "lam")) <= set(d)
    np.testing.assert_allclose(d["a"], 7.0e6, rtol=1e-13)
