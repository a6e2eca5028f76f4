"""Tests of the spherical-harmonic field (kernel + model) and of the zonal J2 model.

Kernels are called directly with an ``env`` vector filled here (identity or an
arbitrary rotation), independently of the composed module.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np
import pytest
from scipy.special import lpmv

from forcemodels import registry
from forcemodels import spherical_harmonics as sh
from forcemodels.environment import ENV_POLE, ENV_ROT, ENV_SIZE
from forcemodels.gfc import DEFAULT_FIELD_FILE, GfcError, read_gfc
from forcemodels.models import gravity_field, zonal_j2
from propagator.constants import J2_EARTH

EGM96_FILE = "EGM96_deg120.gfc"


def shared_gravity_dir() -> Path | None:
    """``shared/data/gravity`` from $LONGARC_SHARED_DATA or beside the repository."""
    candidates = []
    if os.environ.get("LONGARC_SHARED_DATA"):
        candidates.append(Path(os.environ["LONGARC_SHARED_DATA"]))
    candidates.append(Path(__file__).resolve().parents[2] / "shared" / "data")
    for c in candidates:
        if (c / "gravity" / EGM96_FILE).is_file():
            return c / "gravity"
    return None


SHARED = shared_gravity_dir()
SKIP_REASON = ("shared/data/gravity/EGM96_deg120.gfc not found (set LONGARC_SHARED_DATA or place shared/ "
               "beside the repository)")
CASE = registry.CaseSetup(epoch=None, t_start=0.0, t_end=86400.0)


def egm96(degree: int):
    if SHARED is None:
        pytest.skip(SKIP_REASON)
    return read_gfc(SHARED / EGM96_FILE, max_degree=degree)


class Field:
    """Coefficients + GM + radius, for synthetic fields."""

    def __init__(self, C, S, gm, radius):
        self.C, self.S, self.gm, self.radius = C, S, gm, radius


def kaula_field(degree: int, seed: int = 7) -> Field:
    """Random field with Kaula's rule sigma_n = 1e-5/n^2 (Kaula, Theory of Satellite Geodesy, 1966;
    common practice) and the EGM96 C20; lets the high-degree checks run without shared data."""
    rng = np.random.default_rng(seed)
    C = np.zeros((degree + 1, degree + 1))
    S = np.zeros((degree + 1, degree + 1))
    for n in range(2, degree + 1):
        C[n, :n + 1] = rng.normal(0.0, 1e-5 / n**2, n + 1)
        S[n, 1:n + 1] = rng.normal(0.0, 1e-5 / n**2, n)
    C[2, 0] = -0.484165371736e-03  # EGM96 (shared/data/gravity/README.md)
    return Field(C, S, 3.986004415e14, 6378136.3)


def field_source(name: str, degree: int):
    if name == "egm96":
        return egm96(degree)
    if name == "shipped":
        return read_gfc(DEFAULT_FIELD_FILE)
    return kaula_field(degree)


def sph(r, lat_deg, lon_deg):
    la, lo = math.radians(lat_deg), math.radians(lon_deg)
    return np.array([r * math.cos(la) * math.cos(lo), r * math.cos(la) * math.sin(lo), r * math.sin(la)])


def random_directions(n, seed):
    u = np.random.default_rng(seed).normal(size=(n, 3))
    return u / np.linalg.norm(u, axis=1)[:, None]


def fd_gradient(f, r, h):
    """Five-point central differences (4th order) of f along x, y, z (common practice)."""
    g = np.zeros(3)
    for j in range(3):
        vals = []
        for s in (-2, -1, 1, 2):
            rr = r.copy()
            rr[j] += s * h
            vals.append(f(rr))
        g[j] = (vals[0] - 8.0 * vals[1] + 8.0 * vals[2] - vals[3]) / (12.0 * h)
    return g


def sh_accel(fld, degree, order, r):
    d = sh.field_data(fld.C, fld.S, degree, order)
    return np.array(sh.accel_bodyfixed(r[0], r[1], r[2], fld.gm, fld.radius, degree, order, d))


def gradient_error(fld, degree, order, r):
    d = sh.field_data(fld.C, fld.S, degree, order)
    a = np.array(sh.accel_bodyfixed(r[0], r[1], r[2], fld.gm, fld.radius, degree, order, d))
    g = fd_gradient(lambda x: sh.potential_bodyfixed(x[0], x[1], x[2], fld.gm, fld.radius, degree, order, d),
                    r, 1e-4 * np.linalg.norm(r))
    return np.linalg.norm(a - g) / np.linalg.norm(a), a


def rotation(seed=3):
    """An arbitrary proper rotation matrix (QR of a random matrix)."""
    q, rr = np.linalg.qr(np.random.default_rng(seed).normal(size=(3, 3)))
    q = q @ np.diag(np.sign(np.diag(rr)))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q


def env_with(R):
    env = np.zeros(ENV_SIZE)
    env[ENV_ROT:ENV_ROT + 9] = np.asarray(R).ravel()  # row-major, r_itrf = R @ r_gcrf
    env[ENV_POLE:ENV_POLE + 3] = np.asarray(R)[2]      # the pole, as env_fill copies it
    return env


# ---- acceleration = gradient of the potential ---------------------------------------------

@pytest.mark.parametrize("source, degree", [("egm96", 70), ("shipped", 8), ("kaula", 70)])
@pytest.mark.parametrize("radius", [7.0e6, 2.66e7])
def test_acceleration_is_gradient_of_potential(source, degree, radius):
    fld = field_source(source, degree)
    for k, u in enumerate(random_directions(5, seed=int(radius) % 1000 + degree)):
        err, _ = gradient_error(fld, degree, degree, radius * u)
        assert err < 1e-8, (source, radius, k, err)


def test_gradient_with_order_below_degree():
    fld = read_gfc(DEFAULT_FIELD_FILE)
    for u in random_directions(3, seed=11):
        err, _ = gradient_error(fld, 8, 3, 7.2e6 * u)
        assert err < 1e-8
    # order truncation really drops the terms m > 3
    r = 7.2e6 * random_directions(1, seed=12)[0]
    C = fld.C.copy()
    S = fld.S.copy()
    C[:, 4:] = 0.0
    S[:, 4:] = 0.0
    np.testing.assert_allclose(sh_accel(fld, 8, 3, r), sh_accel(Field(C, S, fld.gm, fld.radius), 8, 8, r),
                               rtol=1e-15, atol=0.0)


# ---- independent potential (scipy Legendre functions) ---------------------------------------

def potential_reference(fld, degree, r):
    """U = GM/r sum (R/r)^n N_nm P_nm(sin phi)(C cos m l + S sin m l) with scipy's lpmv.

    scipy.special.lpmv includes the Condon-Shortley phase (-1)^m (scipy documentation),
    which geodesy omits; N_nm = sqrt((2-d0m)(2n+1)(n-m)!/(n+m)!) (Heiskanen & Moritz 1967,
    eq. 1-73), with exact factorials.
    """
    rn = np.linalg.norm(r)
    sphi = r[2] / rn
    lam = math.atan2(r[1], r[0])
    total = 0.0
    for n in range(2, degree + 1):
        for m in range(n + 1):
            nf = math.sqrt((2 - (m == 0)) * (2 * n + 1) * math.factorial(n - m) / math.factorial(n + m))
            p = (-1) ** m * lpmv(m, n, sphi) * nf
            total += (fld.radius / rn) ** n * p * (fld.C[n, m] * math.cos(m * lam) + fld.S[n, m] * math.sin(m * lam))
    return fld.gm / rn * total


@pytest.mark.parametrize("source", ["egm96", "flat"])
def test_potential_against_scipy_legendre(source):
    degree = 20
    if source == "egm96":
        fld = egm96(degree)
    else:
        # flat spectrum (all coefficients ~1e-6) near the surface: every degree matters
        rng = np.random.default_rng(5)
        C = rng.normal(0.0, 1e-6, (degree + 1, degree + 1))
        S = rng.normal(0.0, 1e-6, (degree + 1, degree + 1))
        S[:, 0] = 0.0
        fld = Field(np.tril(C), np.tril(S), 3.986004415e14, 6378136.3)
    d = sh.field_data(fld.C, fld.S, degree, degree)
    for u in random_directions(6, seed=21):
        for rad in (6.5e6, 2.0e7):
            r = rad * u
            u_ref = potential_reference(fld, degree, r)
            u_sh = sh.potential_bodyfixed(r[0], r[1], r[2], fld.gm, fld.radius, degree, degree, d)
            assert u_sh == pytest.approx(u_ref, rel=1e-12), (source, rad, u)


# ---- degree-2 zonal part = closed-form J2 ----------------------------------------------------

def test_c20_part_equals_closed_form_j2():
    fld = read_gfc(DEFAULT_FIELD_FILE)
    d = sh.field_data(fld.C, fld.S, 2, 0)  # degree 2, order 0: C20 only
    # J2 = -sqrt(5) C_bar_20 (fully normalised; Heiskanen & Moritz 1967)
    p = np.array([fld.gm, fld.radius, -math.sqrt(5.0) * fld.C[2, 0]])
    env = env_with(np.eye(3))
    for rad in (6.6e6, 7.0e6, 2.66e7, 4.2e7):
        for u in list(random_directions(4, seed=31)) + [np.array([0.0, 0.0, 1.0]), np.array([1.0, 0.0, 0.0])]:
            r = rad * u
            a_sh = np.array(sh.accel_bodyfixed(r[0], r[1], r[2], fld.gm, fld.radius, 2, 0, d))
            a_j2 = np.zeros(3)
            zonal_j2.accel(0.0, r, np.zeros(3), env, p, np.zeros(0), a_j2)
            assert np.linalg.norm(a_sh - a_j2) <= 1e-12 * np.linalg.norm(a_j2), (rad, u)


# ---- poles and equator, degree 120 -----------------------------------------------------------

@pytest.mark.parametrize("source", ["egm96", "kaula"])
def test_degree_120_at_pole_and_equator(source):
    degree = 120
    fld = field_source(source, degree)
    d = sh.field_data(fld.C, fld.S, degree, degree)
    rad = 7.0e6

    def acc(lat, lon):
        r = sph(rad, lat, lon)
        return np.array(sh.accel_bodyfixed(r[0], r[1], r[2], fld.gm, fld.radius, degree, degree, d))

    lon = 37.0
    # meridian through the pole: 89.9997, 89.9998, 89.9999, 90 (exact pole), then over the pole
    meridian = [acc(89.9997, lon), acc(89.9998, lon), acc(89.9999, lon), acc(90.0, lon),
                acc(89.9999, lon + 180.0), acc(89.9998, lon + 180.0)]
    pole = np.array(sh.accel_bodyfixed(0.0, 0.0, rad, fld.gm, fld.radius, degree, degree, d))
    assert np.all(np.isfinite(meridian)) and np.all(np.isfinite(pole))
    np.testing.assert_allclose(meridian[3], pole, rtol=1e-12, atol=0.0)
    scale = np.linalg.norm(pole)
    # points 1e-4 deg (12 m) apart: neighbours close, second differences tiny.  Smooth field:
    # first differences ~ (n ds / r) |a| <= 2e-4 |a|, second ~ (n ds / r)^2 |a| ~ 4e-8 |a|.
    for k in range(len(meridian) - 1):
        assert np.linalg.norm(meridian[k + 1] - meridian[k]) < 1e-3 * scale
    for k in range(1, len(meridian) - 1):
        second = meridian[k - 1] - 2.0 * meridian[k] + meridian[k + 1]
        assert np.linalg.norm(second) < 1e-6 * scale, k
    # exact pole and 1e-4 deg from it: acceleration = gradient of the potential
    for r in (np.array([0.0, 0.0, rad]), np.array([0.0, 0.0, -rad]), sph(rad, 89.9999, lon)):
        err, _ = gradient_error(fld, degree, degree, r)
        assert err < 1e-8
    # equator: finite, continuous, gradient of the potential
    eq = [acc(-1e-4, lon), acc(0.0, lon), acc(1e-4, lon)]
    assert np.all(np.isfinite(eq))
    assert np.linalg.norm(eq[0] - 2.0 * eq[1] + eq[2]) < 1e-6 * np.linalg.norm(eq[1])
    err, _ = gradient_error(fld, degree, degree, sph(rad, 0.0, lon))
    assert err < 1e-8


# ---- the registered model -----------------------------------------------------------------

def test_model_rotates_to_and_from_earth_fixed():
    pm = registry.prepare("gravity_field", {"degree": 8}, CASE)
    assert pm.needs == frozenset({"rotation"})
    fld = read_gfc(DEFAULT_FIELD_FILE)
    R = rotation()
    env = env_with(R)
    d = pm.d.copy()
    for u in random_directions(4, seed=41):
        r = 7.1e6 * u
        acc = np.zeros(3)
        gravity_field.accel(0.0, r, np.zeros(3), env, pm.p, d, acc)
        expected = R.T @ sh_accel(fld, 8, 8, R @ r)
        np.testing.assert_allclose(acc, expected, rtol=1e-14, atol=1e-22)
    # the kernel adds to acc
    acc = np.array([1.0, 2.0, 3.0])
    gravity_field.accel(0.0, r, np.zeros(3), env, pm.p, d, acc)
    np.testing.assert_allclose(acc - [1.0, 2.0, 3.0], expected, rtol=1e-12)


def test_model_prepare_and_metadata(tmp_path):
    pm = registry.prepare("gravity_field", {"degree": 6, "order": 4}, CASE)
    assert pm.p[0] == 3.986004415e14 and pm.p[1] == 6378136.3 and (pm.p[2], pm.p[3]) == (6.0, 4.0)
    meta = pm.metadata
    assert meta["field_name"] == "EGM96" and meta["tide_system"] == "tide_free"
    assert (meta["degree"], meta["order"], meta["gm_m3_s2"], meta["radius_m"]) == (6, 4, 3.986004415e14, 6378136.3)
    assert Path(meta["field_file"]) == DEFAULT_FIELD_FILE.resolve() and len(meta["field_file_sha256"]) == 64
    # order defaults to degree
    assert registry.prepare("gravity_field", {"degree": 5}, CASE).metadata["order"] == 5


def test_model_config_errors(tmp_path):
    with pytest.raises(GfcError, match=r"requested degree 9 is above the file's max_degree 8"):
        registry.prepare("gravity_field", {"degree": 9}, CASE)
    with pytest.raises(ValueError, match=r"order \(5\) must not exceed degree \(4\)"):
        registry.prepare("gravity_field", {"degree": 4, "order": 5}, CASE)
    with pytest.raises(ValueError, match="degree"):
        registry.prepare("gravity_field", {"degree": 1}, CASE)
    with pytest.raises(ValueError, match="does not exist"):
        registry.prepare("gravity_field", {"degree": 4, "field_file": str(tmp_path / "none.gfc")}, CASE)
    with pytest.raises(ValueError, match="extra"):
        registry.prepare("gravity_field", {"degree": 4, "degre": 3}, CASE)


@pytest.mark.skipif(SHARED is None, reason=SKIP_REASON)
def test_model_with_full_file():
    pm = registry.prepare("gravity_field", {"degree": 70, "order": 70, "field_file": str(SHARED / EGM96_FILE)}, CASE)
    assert pm.metadata["file_max_degree"] == 120
    fld = egm96(70)
    r = 6.9e6 * random_directions(1, seed=51)[0]
    acc = np.zeros(3)
    gravity_field.accel(0.0, r, np.zeros(3), env_with(np.eye(3)), pm.p, pm.d.copy(), acc)
    np.testing.assert_allclose(acc, sh_accel(fld, 70, 70, r), rtol=1e-14)


# ---- zonal J2 --------------------------------------------------------------------------------

def j2_params(j2=J2_EARTH):
    return registry.prepare("zonal_j2", {"j2": j2}, CASE).p


def test_zonal_j2_defaults_and_value():
    pm = registry.prepare("zonal_j2", {}, CASE)
    # J2, GM, R defaults: IERS Conventions 2010, Table 1.1
    np.testing.assert_array_equal(pm.p, [3.986004418e14, 6378136.6, 1.0826359e-3])
    assert pm.needs == frozenset({"pole"})  # only the pole (third row of R), not the full rotation
    # at the equator (z = 0) a = -3/2 J2 GM R^2 / r^4 r_hat (common practice: radial,
    # outward-pointing reduction of gravity by 3/2 J2 (R/r)^2 of the point-mass term)
    r = np.array([7.0e6, 0.0, 0.0])
    acc = np.zeros(3)
    zonal_j2.accel(0.0, r, np.zeros(3), env_with(np.eye(3)), pm.p, pm.d, acc)
    expected = -1.5 * 1.0826359e-3 * 3.986004418e14 * 6378136.6**2 / 7.0e6**4
    np.testing.assert_allclose(acc, [expected, 0.0, 0.0], rtol=1e-15, atol=0.0)
    # over the pole (z = r): a = -3/2 J2 GM R^2/r^4 (1 - 5 + 2) k = +3 J2 GM R^2/r^4 k, outward
    # (same formula; the pole carries the largest J2 term)
    acc = np.zeros(3)
    zonal_j2.accel(0.0, np.array([0.0, 0.0, 7.0e6]), np.zeros(3), env_with(np.eye(3)), pm.p, pm.d, acc)
    np.testing.assert_allclose(acc, [0.0, 0.0, 3.0 * 1.0826359e-3 * 3.986004418e14 * 6378136.6**2 / 7.0e6**4],
                               rtol=1e-15, atol=0.0)


def test_zonal_j2_partials_match_central_differences():
    p = j2_params()
    for R in (np.eye(3), rotation(9)):
        env = env_with(R)
        for u in random_directions(5, seed=61):
            r = 7.3e6 * u
            dadr = np.zeros((3, 3))
            dadv = np.zeros((3, 3))
            zonal_j2.partials(0.0, r, np.zeros(3), env, p, np.zeros(0), dadr, dadv)
            assert np.all(dadv == 0.0)
            h = 1.0  # [m]; central differences, error ~ h^2 a''' ~ 1e-14 relative (common practice)
            num = np.zeros((3, 3))
            for j in range(3):
                ap = np.zeros(3)
                am = np.zeros(3)
                rp = r.copy()
                rp[j] += h
                zonal_j2.accel(0.0, rp, np.zeros(3), env, p, np.zeros(0), ap)
                rp[j] -= 2 * h
                zonal_j2.accel(0.0, rp, np.zeros(3), env, p, np.zeros(0), am)
                num[:, j] = (ap - am) / (2 * h)
            assert np.abs(dadr - num).max() < 1e-7 * np.abs(dadr).max()
            np.testing.assert_allclose(dadr, dadr.T, rtol=0, atol=1e-12 * np.abs(dadr).max())


def test_zonal_j2_uses_the_rotated_pole():
    p = j2_params()
    R = rotation(13)
    env = env_with(R)
    env_id = env_with(np.eye(3))
    for u in random_directions(5, seed=71):
        r = 7.0e6 * u
        acc = np.zeros(3)
        zonal_j2.accel(0.0, r, np.zeros(3), env, p, np.zeros(0), acc)
        # the field is axisymmetric about the ITRF z axis: a_gcrf = R^T a(R r) with the identity pole
        a_fixed = np.zeros(3)
        zonal_j2.accel(0.0, R @ r, np.zeros(3), env_id, p, np.zeros(0), a_fixed)
        np.testing.assert_allclose(acc, R.T @ a_fixed, rtol=1e-13, atol=1e-13 * np.linalg.norm(acc))
    # a pole tilted by 0.35 deg (true vs J2000 pole, order of magnitude from the design notes):
    # the acceleration over the tilted pole points along the tilted axis, not along z.
    eps = math.radians(0.35)
    tilt = np.array([[1.0, 0.0, 0.0], [0.0, math.cos(eps), math.sin(eps)], [0.0, -math.sin(eps), math.cos(eps)]])
    k = tilt[2]
    acc = np.zeros(3)
    zonal_j2.accel(0.0, 7.0e6 * k, np.zeros(3), env_with(tilt), p, np.zeros(0), acc)
    np.testing.assert_allclose(acc / np.linalg.norm(acc), k, rtol=0, atol=1e-15)
    acc_z = np.zeros(3)
    zonal_j2.accel(0.0, 7.0e6 * k, np.zeros(3), env_id, p, np.zeros(0), acc_z)
    assert abs(acc_z[1]) > 1e-3 * np.linalg.norm(acc_z)  # about the wrong pole it is not along k


def test_prepare_reuses_packed_data_but_never_shares_it():
    """The packed field data are cached per file/degree/order, but each preparation gets its
    own array (the kernel writes scratch space into it)."""
    a = registry.prepare("gravity_field", {"degree": 8}, CASE)
    b = registry.prepare("gravity_field", {"degree": 8}, CASE)
    assert np.array_equal(a.d, b.d) and not np.shares_memory(a.d, b.d)
    c = registry.prepare("gravity_field", {"degree": 8, "order": 3}, CASE)
    assert c.d.size != a.d.size or not np.array_equal(c.d, a.d)


def test_kernels_only_read_the_packed_data():
    """accel/potential leave ``d`` untouched (no scratch space), for an even and an odd
    number of V/W columns (order + 2 = 10 and 5: paired columns, then one alone)."""
    fld = read_gfc(DEFAULT_FIELD_FILE)
    for order in (8, 3):
        d = sh.field_data(fld.C, fld.S, 8, order)
        ref = d.copy()
        for u in random_directions(3, seed=41):
            r = 7.1e6 * u
            sh.accel_bodyfixed(r[0], r[1], r[2], fld.gm, fld.radius, 8, order, d)
            sh.potential_bodyfixed(r[0], r[1], r[2], fld.gm, fld.radius, 8, order, d)
        assert np.array_equal(d, ref)
