"""Tests for propagator.rotation_table (tabulated GCRF->ITRF rotation, numba evaluator)."""

from __future__ import annotations

import numpy as np
import pytest

from propagator import rotation_table as rt
from propagator.eop import EOPRangeError
from propagator.frames import gcrf_to_itrf_matrices, gcrf_to_itrf_matrix, rotation_parts
from propagator.timescales import Epoch, jd_add_seconds

GNSS_RADIUS = 26.6e6  # m
ARC = 30 * 86400.0


@pytest.fixture(scope="module")
def case():
    epoch = Epoch.from_iso("2024-05-01T06:30:00 UTC")
    table = rt.build_rotation_table(epoch, 0.0, ARC)
    return epoch, table


def _direct(epoch: Epoch, ts: np.ndarray):
    """Direct pyerfa rotation (propagator.frames) at TT seconds ts since epoch."""
    tt = epoch.to("TT")
    j1, j2 = jd_add_seconds(np.full(ts.size, tt.jd1), np.full(ts.size, tt.jd2), ts)
    return gcrf_to_itrf_matrices(j1, j2)


def test_interpolation_error_30_day_arc(case):
    """Table vs direct pyerfa at 4000 random times over 30 days.

    Requirement: < 1 mm at 26,600 km.  Measured at the default 1 h step: 0.0015 mm
    (documented in rotation_table's docstring; asserted below at 0.01 mm so a change
    that degrades it, e.g. a kinked EOP interpolant, which gave 0.27 mm, is noticed).
    The error is bounded with the Frobenius norm of the matrix difference (>= the
    largest displacement of any unit vector)."""
    epoch, table = case
    ts = np.sort(np.random.default_rng(11).uniform(0.0, ARC, 4000))
    ts = np.concatenate([[0.0, ARC], ts])
    r_tab = rt.rotation_matrices(table, ts)
    r_ref, _ = _direct(epoch, ts)
    err_m = np.max(np.linalg.norm(r_tab - r_ref, axis=(1, 2))) * GNSS_RADIUS
    print(f"max rotation-table error over 30 d at 26,600 km: {err_m * 1e3:.5f} mm")
    assert err_m < 1e-3
    assert err_m < 1e-5


def test_nodes_equal_direct_rotation(case):
    epoch, table = case
    step = table[rt.H_STEP]
    t_nodes = table[rt.H_T0] + step * np.arange(2, 40)
    r_tab = rt.rotation_matrices(table, t_nodes)
    tt = epoch.to("TT")
    for t, r in zip(t_nodes[:6], r_tab[:6]):
        ref = gcrf_to_itrf_matrix(tt + float(t))
        assert np.max(np.abs(r - ref)) < 1e-12
    r_ref, _ = _direct(epoch, t_nodes)
    assert np.max(np.abs(r_tab - r_ref)) < 1e-12


def test_rotation_rate_matches_frames(case):
    epoch, table = case
    ts = np.linspace(0.0, ARC, 97)
    _, w = _direct(epoch, ts)
    rates = rt.rotation_rates(table, ts)
    np.testing.assert_allclose(rates, np.linalg.norm(w, axis=1), rtol=1e-12, atol=0)


def test_header_is_self_describing(case):
    epoch, table = case
    assert table[rt.H_VERSION] == rt.FORMAT_VERSION
    assert table[rt.H_HEADER_LEN] == rt.HEADER_LEN
    assert table[rt.H_STEP] == rt.DEFAULT_STEP
    n = int(table[rt.H_N_NODES])
    assert table.size == rt.HEADER_LEN + n * int(table[rt.H_N_FIELDS])
    tt = epoch.to("TT")
    assert table[rt.H_TT_DAYS] + 2451545.0 == tt.jd1 and table[rt.H_TT_FRAC] == tt.jd2
    p = rotation_parts(tt.jd1, tt.jd2)
    assert table[rt.H_UT1_MINUS_TT0] == pytest.approx(p["ut1_minus_tt"][0], abs=1e-9)
    lo, hi = rt.table_time_span(table)
    assert lo < 0.0 and hi > ARC


def test_outside_span_raises(case):
    _, table = case
    lo, hi = rt.table_time_span(table)
    rt.rotation_matrices(table, [lo, hi])  # the ends are usable
    for bad in (lo - 1.0, hi + 1.0, float("nan")):
        with pytest.raises(ValueError, match="outside the tabulated span"):
            rt.rotation_matrices(table, [bad])


def test_epoch_scale_and_eop_policy():
    e_utc = Epoch.from_iso("2020-03-01T00:00:00 UTC")
    a = rt.build_rotation_table(e_utc, -3600.0, 7200.0)
    b = rt.build_rotation_table(e_utc.to("TDB"), -3600.0, 7200.0)
    ts = np.linspace(-3600.0, 7200.0, 7)
    # a TDB epoch is the same instant; t is TT seconds in both cases
    np.testing.assert_allclose(rt.rotation_matrices(a, ts), rt.rotation_matrices(b, ts), atol=1e-12)
    far = Epoch.from_iso("2100-01-01T00:00:00 TT")
    with pytest.raises(EOPRangeError, match="1973-01-02"):
        rt.build_rotation_table(far, 0.0, 86400.0)
    t = rt.build_rotation_table(far, 0.0, 86400.0, eop_policy="hold")
    assert np.all(np.isfinite(t))


def test_bad_arguments():
    e = Epoch.from_iso("2020-03-01T00:00:00 UTC")
    with pytest.raises(ValueError, match="t_start <= t_end"):
        rt.build_rotation_table(e, 10.0, 0.0)
    with pytest.raises(ValueError, match="step"):
        rt.build_rotation_table(e, 0.0, 10.0, step=0.0)


def test_fast_interpolant_equals_reference_lagrange(case):
    """`_interp_fields` (weights from prefix/suffix products, constant denominators) is the
    same 6-point Lagrange interpolant as `_interp` (weights from the textbook product
    formula, Lagrange basis l_k(u) = prod_{m != k} (u - m)/(k - m); common practice):
    the fields agree to float64 rounding, relative to each field's magnitude."""
    _, table = case
    lo, hi = rt.table_time_span(table)
    ts = np.concatenate([[lo, hi], np.random.default_rng(3).uniform(lo, hi, 3000)])
    fast = np.array([rt._interp_fields(t, table) for t in ts])
    ref = np.array([rt._interp(t, table)[:7] for t in ts])
    scale = np.max(np.abs(ref), axis=0)
    rel = np.max(np.abs(fast - ref), axis=0) / scale
    print("fast vs reference Lagrange, relative to field size:", rel)
    assert np.all(rel < 1e-14)
    # at a node (u integer) the interpolant returns the node value exactly
    hdr = int(table[rt.H_HEADER_LEN])
    nf = int(table[rt.H_N_FIELDS])
    j = 10
    t_node = table[rt.H_T0] + j * table[rt.H_STEP]
    assert np.array_equal(np.array(rt._interp_fields(t_node, table)), table[hdr + j * nf: hdr + j * nf + 7])


def test_small_angle_cos_sin_equals_libm():
    """`_cos_sin` uses Taylor polynomials below 1e-3 rad: within 1 ulp of math.cos/sin
    (the C library, the reference) on both sides of the switch."""
    import math
    a = np.concatenate([np.geomspace(1e-14, 0.999e-3, 500), np.linspace(1e-3, 2e-3, 50)])
    a = np.concatenate([a, -a, [0.0]])
    for x in a:
        c, s = rt._cos_sin(float(x))
        assert abs(c - math.cos(x)) <= math.ulp(math.cos(x))
        assert abs(s - math.sin(x)) <= math.ulp(math.sin(x)) + 1e-300


def test_pole_polynomials_equal_the_lagrange_interpolant() -> None:
    """pole_nb evaluates per-interval quintics that are the 6-point Lagrange interpolant
    of the node rows rewritten in monomial form: equal, at random times over the whole
    span including the end intervals, to the interpolant formed directly from the
    Lagrange basis (textbook formula, e.g. Press et al., Numerical Recipes 3rd ed.
    sec. 3.2) in numpy, to round-off."""
    epoch = Epoch.from_iso("2024-03-20T00:00:00 TT")
    table = rt.build_pole_table(epoch, 0.0, 3 * 86400.0)
    n = int(table[rt.H_N_NODES])
    nodes = table[rt.HEADER_LEN:rt.HEADER_LEN + 3 * n].reshape(n, 3)
    lo, hi = rt.table_time_span(table)
    ts = np.concatenate([np.random.default_rng(5).uniform(lo, hi, 3000), [lo, hi]])
    got = rt.pole_vectors(table, ts)
    step, t0 = table[rt.H_STEP], table[rt.H_T0]
    worst = 0.0
    for t, g in zip(ts, got):
        x = (t - t0) / step
        j0 = min(int(np.floor(x)) - 2, n - 6)
        u = x - j0
        w = np.array([np.prod([(u - q) / (m - q) for q in range(6) if q != m]) for m in range(6)])
        worst = max(worst, float(np.max(np.abs(w @ nodes[j0:j0 + 6] - g))))
    # measured 5.6e-16 (2.5 ulp of the unit vector's z component); without the
    # first-node reference the monomial form differs by 3e-14 (cancellation)
    assert worst < 1e-15, worst
