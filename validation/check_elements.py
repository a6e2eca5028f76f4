"""Orbital elements, Kepler's equation and the two-body reference against published values.

    python validation/check_elements.py [--quick] --json PATH

JSON keys: ``roundtrip_max_pos_err_m``, ``roundtrip_max_pos_err_ulp``,
``kepler_max_residual_rad``, ``vallado_2_5`` (object), ``twobody_1000rev_err_m``.
"""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import ROOT, start  # noqa: E402

from propagator.constants import GM_EARTH  # noqa: E402
from propagator.elements import cart_to_kep, kep_to_cart, solve_kepler_elliptic  # noqa: E402
from propagator.twobody import propagate_twobody  # noqa: E402

AREA = "elements"
DEG = math.pi / 180.0
KM = 1e3


def _kepler_reference():
    """The 60-digit Kepler-equation reference of tests/test_twobody.py (decimal module)."""
    spec = importlib.util.spec_from_file_location("_tb_ref", ROOT / "tests" / "test_twobody.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod.kepler_reference


def main() -> int:
    rep = start(__file__, __doc__.splitlines()[0])
    rng = np.random.default_rng(2031)
    n = 20_000 if rep.quick else 500_000
    els = np.column_stack([rng.uniform(6.6e6, 4.3e7, n), rng.uniform(0.0, 0.95, n),
                           rng.uniform(0.0, math.pi, n), rng.uniform(0, 2 * math.pi, n),
                           rng.uniform(0, 2 * math.pi, n), rng.uniform(-math.pi, math.pi, n)])
    els[:4, 1] = [0.0, 0.0, 0.95, 0.95]  # exact circular / high eccentricity
    els[:4, 2] = [0.0, math.pi, 55 * DEG, 0.0]  # exact equatorial, retrograde equatorial
    s = kep_to_cart(els)
    back = kep_to_cart(cart_to_kep(s))
    err = np.linalg.norm(back[:, :3] - s[:, :3], axis=1)
    ulp = err / (np.finfo(float).eps * np.linalg.norm(s[:, :3], axis=1))
    rep.values["roundtrip_max_pos_err_m"] = float(err.max())
    rep.values["roundtrip_max_pos_err_ulp"] = float(ulp.max())
    low_e = els[:, 1] < 0.1
    rep.check(AREA, f"Cartesian->Kepler->Cartesian, {n} orbits e<0.1", "common practice (round trip)",
              float(err[low_e].max()), tolerance="< 1e-7 m", passed=err[low_e].max() < 1e-7, unit="m")
    rep.check(AREA, f"same, e up to 0.95 (in units of eps*|r|)", "common practice (round trip)",
              float(ulp.max()), tolerance="< 100 eps|r|", passed=ulp.max() < 100, unit="eps|r|")

    M = np.linspace(-math.pi, math.pi, 4001 if rep.quick else 40001)
    worst = 0.0
    for e in np.linspace(0.0, 0.99, 100):
        E = solve_kepler_elliptic(M, e)
        worst = max(worst, float(np.max(np.abs(E - e * np.sin(E) - M))))
    rep.values["kepler_max_residual_rad"] = worst
    rep.check(AREA, "Kepler's equation residual, e in [0, 0.99]", "Kepler's equation (definition)", worst,
              tolerance="< 1e-14 rad", passed=worst < 1e-14, unit="rad")

    # Vallado, Fundamentals of Astrodynamics and Applications, 4th ed. (2013), Example 2-5
    # (values from memory; also quoted in public test suites): a = 36127.343 km,
    # e = 0.832853, i = 87.870 deg.  Printed precision and the book's own rounding limit
    # the comparison (see tests/test_elements.py).
    mu = 398600.4418 * KM**3
    a, e, i, *_ = cart_to_kep(np.array([6524.834, 6862.875, 6448.296, 4.901327, 5.533756, -1.976341]) * KM, mu)
    rep.values["vallado_2_5"] = {"a_km": a / KM, "e": e, "i_deg": i / DEG}
    rep.check(AREA, "Vallado (2013) Ex. 2-5: a", "Vallado 4th ed. Example 2-5 (from memory)", a / KM,
              tolerance="36127.343 +- 0.06 km", passed=abs(a / KM - 36127.343) < 0.06, unit="km")
    rep.check(AREA, "Vallado (2013) Ex. 2-5: e", "Vallado 4th ed. Example 2-5 (from memory)", e,
              tolerance="0.832853 +- 5e-7", passed=abs(e - 0.832853) < 5e-7)
    rep.check(AREA, "Vallado (2013) Ex. 2-5: i", "Vallado 4th ed. Example 2-5 (from memory)", i / DEG,
              tolerance="87.870 +- 0.001 deg", passed=abs(i / DEG - 87.870) < 1e-3, unit="deg")

    ref = _kepler_reference()
    state = kep_to_cart(np.array([26_560e3, 0.01, 55 * DEG, 0.3, 0.7, 0.1]))
    T = 2 * math.pi * math.sqrt(26_560e3**3 / GM_EARTH)
    dt = 1000.37 * T
    r, v = propagate_twobody(state[:3], state[3:], dt, GM_EARTH)
    rr, vr = ref(state[:3], state[3:], dt, GM_EARTH)
    e1000 = float(np.linalg.norm(np.asarray(r) - rr))
    rep.values["twobody_1000rev_err_m"] = e1000
    rep.check(AREA, "two-body reference after 1000 rev (MEO)", "Kepler's equation in 60-digit arithmetic",
              e1000, tolerance="< 1e-6 m", passed=e1000 < 1e-6, unit="m")
    return rep.finish()


if __name__ == "__main__":
    sys.exit(main())
