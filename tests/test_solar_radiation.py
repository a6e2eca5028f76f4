"""Solar radiation pressure (cannonball) and the conical Earth/Moon shadow.

References: IAU 2015 Resolution B3 (nominal total solar irradiance 1361 W/m^2, so
P(1 au) = 1361 / c = 4.54e-6 N/m^2); Montenbruck & Gill, Satellite Orbits (2000),
sec. 3.4 (conical shadow, overlap of two discs); the equal-radii lens area
A = 2 a^2 acos(c/2a) - (c/2) sqrt(4 a^2 - c^2) (elementary geometry, common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from forcemodels import ephemeris as eph
from forcemodels import registry
from forcemodels.environment import ENV_MOON, ENV_SIZE, ENV_SUN
from forcemodels.models import solar_radiation as srp
from forcemodels.registry import CaseSetup
from forcemodels.shadow import (disc_overlap_fraction_nb, illumination_moon_nb, illumination_nb,
                                shadow_boundaries_nb, visible_fraction_nb)
from propagator.constants import AU, C_LIGHT, J2000_JD, R_EARTH_EQ, R_MOON, R_SUN, SOLAR_IRRADIANCE_1AU

CASE = CaseSetup(epoch=(J2000_JD + 9000.0, 0.0), t_start=0.0, t_end=86400.0)


def _p(cr=1.0, area=1.0, mass=100.0, shadow="conical", moon_shadow=False) -> np.ndarray:
    return registry.prepare("solar_radiation", {"cr": cr, "area_m2": area, "mass_kg": mass,
                                                "shadow": shadow, "moon_shadow": moon_shadow}, CASE).p


def _env_geom(sun: np.ndarray, moon: np.ndarray | None = None) -> np.ndarray:
    env = np.zeros(ENV_SIZE)
    env[ENV_SUN:ENV_SUN + 3] = sun
    env[ENV_MOON:ENV_MOON + 3] = moon if moon is not None else np.array([0.0, 3.844e8, 0.0])
    return env


def _acc(r, env, p) -> np.ndarray:
    acc = np.zeros(3)
    srp.accel(0.0, np.asarray(r, dtype=float), np.zeros(3), env, p, np.zeros(0), acc)
    return acc


# ---- SRP magnitude and direction ------------------------------------------------------
def test_magnitude_at_1au() -> None:
    """Cr = 1, A/m = 0.01 m^2/kg at exactly 1 au: 4.54e-8 m/s^2 (IAU 2015 B3: 1361 W/m^2 / c)."""
    r = np.array([7.0e6, -1.0e6, 2.0e6])
    u = np.array([0.3, -0.5, 0.8])
    u /= np.linalg.norm(u)
    env = _env_geom(r + AU * u)
    acc = _acc(r, env, _p(cr=1.0, area=1.0, mass=100.0, shadow="none"))
    assert np.linalg.norm(acc) == pytest.approx(SOLAR_IRRADIANCE_1AU / C_LIGHT * 0.01, rel=1e-12)
    assert np.linalg.norm(acc) == pytest.approx(4.54e-8, abs=0.005e-8)
    np.testing.assert_allclose(acc / np.linalg.norm(acc), -u, atol=1e-12)   # away from the Sun


def test_inverse_square_and_linear_in_cr_area_mass() -> None:
    r = np.array([0.0, 2.656e7, 0.0])
    u = np.array([1.0, 0.0, 0.0])
    a1 = _acc(r, _env_geom(r + AU * u), _p(shadow="none"))
    a2 = _acc(r, _env_geom(r + 2 * AU * u), _p(shadow="none"))
    assert np.linalg.norm(a1) / np.linalg.norm(a2) == pytest.approx(4.0, rel=1e-12)
    a3 = _acc(r, _env_geom(r + AU * u), _p(cr=1.8, area=2.0, mass=50.0, shadow="none"))
    assert np.linalg.norm(a3) / np.linalg.norm(a1) == pytest.approx(1.8 * 4.0, rel=1e-12)


def test_zero_in_umbra_and_shadow_none() -> None:
    sun = np.array([AU, 0.0, 0.0])
    r_behind = np.array([-2.656e7, 0.0, 0.0])
    assert not _acc(r_behind, _env_geom(sun), _p()).any()
    assert np.linalg.norm(_acc(r_behind, _env_geom(sun), _p(shadow="none"))) > 1e-9


def test_with_ephemeris_env_and_estimable_cr() -> None:
    """Kernel with env from sun_moon_nb; Cr is p[0] (estimable) and enters linearly."""
    table = eph.build_sun_moon_table(CASE.epoch, 0.0, 86400.0)
    env = np.zeros(ENV_SIZE)
    eph.sun_moon_nb(3600.0, table, env[ENV_SUN:ENV_SUN + 3], env[ENV_MOON:ENV_MOON + 3])
    s = env[ENV_SUN:ENV_SUN + 3]
    r = 2.656e7 * s / np.linalg.norm(s)          # sub-solar side: sunlit
    pm = registry.prepare("solar_radiation", {"cr": 1.2, "area_m2": 20.0, "mass_kg": 1500.0}, CASE)
    assert pm.estimable == {"cr": 0} and pm.p[0] == 1.2
    a = _acc(r, env, pm.p)
    p2 = pm.p.copy()
    p2[0] = 2.4
    np.testing.assert_allclose(_acc(r, env, p2), 2.0 * a, rtol=1e-14)
    d = np.linalg.norm(s - r)
    expected = SOLAR_IRRADIANCE_1AU / C_LIGHT * (AU / d) ** 2 * 1.2 * 20.0 / 1500.0
    assert np.linalg.norm(a) == pytest.approx(expected, rel=1e-13)
    assert pm.metadata["ephemeris"] == "DE421" and pm.metadata["shadow_model"].startswith("conical")


@pytest.mark.parametrize("params,fragment", [
    ({"cr": 2.5, "area_m2": 1.0, "mass_kg": 1.0}, "cr = 2.5 is outside the accepted range 0 < Cr <= 2"),
    ({"cr": 0.0, "area_m2": 1.0, "mass_kg": 1.0}, "cr = 0.0 is outside the accepted range 0 < Cr <= 2"),
    ({"cr": -1.0, "area_m2": 1.0, "mass_kg": 1.0}, "cr = -1.0 is outside"),
    ({"cr": float("nan"), "area_m2": 1.0, "mass_kg": 1.0}, "cr = nan is outside"),
    ({"cr": 1.0, "area_m2": 0.0, "mass_kg": 1.0}, "area_m2 = 0.0 m^2 must be finite and > 0"),
    ({"cr": 1.0, "area_m2": -3.0, "mass_kg": 1.0}, "area_m2 = -3.0 m^2 must be finite and > 0"),
    ({"cr": 1.0, "area_m2": 1.0, "mass_kg": 0.0}, "mass_kg = 0.0 kg must be finite and > 0"),
    ({"cr": 1.0, "area_m2": 1.0, "mass_kg": -2.0}, "mass_kg = -2.0 kg must be finite and > 0"),
    ({"cr": 1.0, "area_m2": 1.0, "mass_kg": 1.0, "shadow": "cylindrical"}, "shadow"),
    ({"cr": 1.0, "area_m2": 1.0}, "mass_kg"),
])
def test_bad_parameters_rejected_at_config_time(params, fragment) -> None:
    with pytest.raises(ValueError) as exc:
        registry.prepare("solar_radiation", params, CASE)
    assert fragment in str(exc.value)


def test_edge_values_accepted() -> None:
    assert _p(cr=2.0)[0] == 2.0
    assert _p(cr=1e-3)[0] == 1e-3


# ---- shadow geometry -------------------------------------------------------------------
def test_sunlit_and_umbra() -> None:
    sun = np.array([AU, 0.0, 0.0])
    out = np.empty(2)
    for r in ([2.656e7, 0, 0], [0, 2.656e7, 0], [0, 0, -7e6], [-1.0e6, 7e6, 0]):
        r = np.array(r, dtype=float)
        assert illumination_nb(r, sun) == 1.0
        shadow_boundaries_nb(r, sun, out)
        assert out[0] > 0.0 and out[1] > 0.0
    for r in ([-2.656e7, 0, 0], [-7e6, 0, 0], [-4.2164e7, 1e6, 0]):
        r = np.array(r, dtype=float)
        assert illumination_nb(r, sun) == 0.0
        shadow_boundaries_nb(r, sun, out)
        assert out[0] < 0.0 and out[1] < 0.0


def test_monotone_through_penumbra_and_events_consistent() -> None:
    """Along a GNSS-radius arc through the shadow: 1 -> penumbra -> 0 -> penumbra -> 1."""
    sun = np.array([AU, 0.0, 0.0])
    theta = np.linspace(math.pi - 0.4, math.pi + 0.4, 40001)
    rho = 2.656e7
    nu = np.empty(theta.size)
    ev = np.empty((theta.size, 2))
    for k, th in enumerate(theta):
        r = np.array([rho * math.cos(th), rho * math.sin(th), 1.0e5])
        nu[k] = illumination_nb(r, sun)
        shadow_boundaries_nb(r, sun, ev[k])
    half = theta.size // 2
    assert nu[0] == 1.0 and nu[half] == 0.0 and nu[-1] == 1.0
    assert np.all(np.diff(nu[:half + 1]) <= 0.0)
    assert np.all(np.diff(nu[half:]) >= 0.0)
    pen = (nu > 0.0) & (nu < 1.0)
    assert pen.sum() > 40                                   # the penumbra is resolved
    # Events: fully lit <=> out[0] >= 0, umbra <=> out[1] <= 0.
    assert np.all((nu == 1.0) == (ev[:, 0] >= 0.0))
    assert np.all((nu == 0.0) == (ev[:, 1] <= 0.0))
    # The penumbra spans b - a < c < b + a, a width 2a in c; behind the Earth c ~ |pi - theta|
    # (Sun direction ~ fixed), so it spans ~2 asin(R_sun/AU) = 9.3e-3 rad of theta per side.
    width = pen.sum() / 2 * (theta[1] - theta[0])
    assert width == pytest.approx(2 * math.asin(R_SUN / AU), rel=0.02)


def test_events_consistent_random_geometries() -> None:
    """nu == 1 <=> out[0] >= 0 and nu == 0 <=> out[1] <= 0 for random positions (incl. near
    the surface, where the sunlit fast path of visible_fraction_nb must not apply)."""
    rng = np.random.default_rng(11)
    sun = np.array([AU, 0.0, 0.0])
    out = np.empty(2)
    for _ in range(20000):
        u = rng.normal(size=3)
        u /= np.linalg.norm(u)
        rho = R_EARTH_EQ * (1.0 + 10.0 ** rng.uniform(-7, 1.5))
        r = rho * u
        nu = illumination_nb(r, sun)
        shadow_boundaries_nb(r, sun, out)
        assert (nu == 1.0) == (out[0] >= 0.0)
        assert (nu == 0.0) == (out[1] <= 0.0)
        assert 0.0 <= nu <= 1.0


def test_equal_radii_worked_case() -> None:
    """Earth and Sun discs of equal apparent radius a, centres one radius apart (c = a).

    Lens area of two discs of radius a at distance a:
      A = 2 a^2 acos(1/2) - (a/2) sqrt(3) a = a^2 (2 pi/3 - sqrt(3)/2)
    covered fraction A/(pi a^2) = 2/3 - sqrt(3)/(2 pi) = 0.6666667 - 0.2756644 = 0.3910022,
    so the illumination is nu = 1/3 + sqrt(3)/(2 pi) = 0.6089978.
    """
    rho = 1.5e9                                   # satellite far beyond the Moon
    b = math.asin(R_EARTH_EQ / rho)
    dist_sun = R_SUN / math.sin(b)                # makes a = asin(R_sun/|s - r|) = b
    r = np.array([-rho, 0.0, 0.0])                # Earth centre seen along +x
    s = r + dist_sun * np.array([math.cos(b), math.sin(b), 0.0])    # c = b = a
    assert illumination_nb(r, s) == pytest.approx(1.0 / 3.0 + math.sqrt(3.0) / (2.0 * math.pi), abs=1e-9)
    assert illumination_nb(r, s) == pytest.approx(0.6089978, abs=1e-7)


def test_overlap_formula_vs_grid_quadrature() -> None:
    """Lens-area fraction vs brute-force counting on a 1200x1200 grid (common practice)."""
    rng = np.random.default_rng(3)
    n = 1200
    xs = (np.arange(n) + 0.5) / n * 2.0 - 1.0
    X, Y = np.meshgrid(xs, xs)
    inside_a = X ** 2 + Y ** 2 <= 1.0
    for _ in range(12):
        a = 1.0
        b = rng.uniform(0.2, 3.0)
        c = rng.uniform(abs(a - b), a + b)
        covered = inside_a & ((X - c) ** 2 + Y ** 2 <= b * b)
        frac = covered.sum() / inside_a.sum()
        assert disc_overlap_fraction_nb(a, b, c) == pytest.approx(frac, abs=3e-3)
    assert disc_overlap_fraction_nb(1.0, 0.5, 0.2) == pytest.approx(0.25, abs=1e-15)   # annular: (b/a)^2
    assert disc_overlap_fraction_nb(1.0, 2.0, 0.5) == 1.0
    assert disc_overlap_fraction_nb(1.0, 2.0, 3.5) == 0.0


def test_moon_shadow_option() -> None:
    """Satellite 5000 km in front of the Moon, Sun behind the Moon: lunar umbra."""
    moon = np.array([3.844e8, 0.0, 0.0])
    sun = np.array([AU, 0.0, 0.0])
    r = moon - np.array([5.0e6, 0.0, 0.0])
    env = _env_geom(sun, moon)
    assert illumination_nb(r, sun) == 1.0
    assert illumination_moon_nb(r, sun, moon) == 0.0
    assert np.linalg.norm(_acc(r, env, _p(moon_shadow=False))) > 0.0
    assert not _acc(r, env, _p(moon_shadow=True)).any()
    # Off to the side the Moon does not matter.
    r2 = moon - np.array([5.0e6, -5.0e6, 0.0])
    assert illumination_moon_nb(r2, sun, moon) == 1.0
    # Lunar penumbra exists: moving sideways crosses 0 < nu < 1.
    vals = [illumination_moon_nb(moon - np.array([5.0e6, -y, 0.0]), sun, moon)
            for y in np.linspace(0.0, 3.0e6, 3001)]
    assert any(0.0 < v < 1.0 for v in vals)
    assert np.all(np.diff(vals) >= 0.0)


def _nu_full_geometry(r: np.ndarray, body: np.ndarray, sun: np.ndarray, r_body: float) -> tuple[float, float]:
    """The conical model evaluated literally (M&G 2000 sec. 3.4): apparent radii by asin,
    separation by the angle between the directions, no shortcut.  Returns (nu, c - (a + b))."""
    db, ds = body - r, sun - r
    a = math.asin(min(1.0, R_SUN / np.linalg.norm(ds)))
    b = math.asin(r_body / np.linalg.norm(db))
    c = math.atan2(np.linalg.norm(np.cross(db, ds)), db @ ds)
    return 1.0 - disc_overlap_fraction_nb(a, b, c), c - (a + b)


@pytest.mark.parametrize("body_kind", ["earth", "moon"])
def test_lit_shortcut_changes_nothing(body_kind: str) -> None:
    """The no-trigonometry 'fully lit' shortcuts (front hemisphere; outside a cone that
    bounds the penumbra) never declare a point lit that the literal model puts in the
    penumbra (c < a + b), and the function equals the literal model elsewhere, at points
    crowded around the shadow: on and near the axis behind the body, across the penumbra
    boundary, from the surface to 60 body radii (geometry: M&G 2000 sec. 3.4)."""
    rng = np.random.default_rng(11)
    sun = np.array([AU * 0.983, 0.0, 0.0])                       # perihelion: widest cone
    if body_kind == "earth":
        body, r_body = np.zeros(3), R_EARTH_EQ
    else:
        body, r_body = np.array([-3.0e8, 2.0e8, 1.0e7]), R_MOON
    axis = (body - sun) / np.linalg.norm(body - sun)
    e1 = np.cross(axis, [0.0, 0.0, 1.0])
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(axis, e1)
    n_pen = n_lit = 0
    for _ in range(20000):
        depth = r_body * rng.uniform(-1.5, 60.0)                  # along the anti-sun axis
        cone = r_body + max(depth, 0.0) * (R_SUN + r_body) / np.linalg.norm(sun - body)
        rad = cone * rng.uniform(0.0, 1.6)                        # around the penumbra edge
        ang = rng.uniform(0.0, 2.0 * math.pi)
        r = body + depth * axis + rad * (math.cos(ang) * e1 + math.sin(ang) * e2)
        if np.linalg.norm(r - body) <= r_body:
            continue
        got = visible_fraction_nb(*r, *body, *sun, r_body)
        ref, g = _nu_full_geometry(r, body, sun, r_body)
        if g < 0.0:                                               # inside the penumbra cone
            assert got < 1.0, (r, got, ref, g)
            n_pen += 1
        else:
            assert got == 1.0 and ref == 1.0, (r, got, ref, g)
            n_lit += 1
        # equal to the literal model up to round-off, which the overlap formula amplifies
        # without bound at the umbra edge (d/dc sqrt(a^2 - x^2)): compared loosely
        assert abs(got - ref) < 1e-6, (r, got, ref)
    assert n_pen > 1000 and n_lit > 1000           # both sides of the boundary were sampled
