"""Conical shadow of the Earth (and optionally the Moon): umbra and penumbra.

Method: Montenbruck & Gill, *Satellite Orbits* (Springer, 2000), section 3.4
(conical shadow model).  Seen from the satellite, the Sun and the occulting body are discs
of apparent radii

    a = asin(R_sun / |s - r|),   b = asin(R_body / |r_body - r|)

whose centres are separated by the angle c between (s - r) and (r_body - r).
The discs are treated as flat (small-angle geometry) and the solar disc as uniformly
bright (no limb darkening).  The occulted area is

    c >= a + b:        A = 0                          (sunlit)
    c <= b - a:        A = pi a^2                     (umbra, total)
    c <= a - b:        A = pi b^2                     (annular: body inside the solar disc)
    otherwise:         A = a^2 acos(x/a) + b^2 acos((c - x)/b) - c y
                       x = (c^2 + a^2 - b^2) / (2c),   y = sqrt(a^2 - x^2)

and the illumination fraction nu = 1 - A/(pi a^2): 1 sunlit, 0 umbra, continuous
and monotone in c through the penumbra.

The Earth is a sphere of the equatorial radius R_EARTH_EQ (oblateness neglected, common
practice: it moves shadow entry by a few seconds at most).  With the Moon shadow enabled
the two fractions are multiplied (an approximation when both bodies overlap the solar
disc at once, which requires a solar eclipse seen from the satellite with the Earth's
limb in the same place; not modelled exactly).

Units: metres, radians.
"""

from __future__ import annotations

import math

from numba import njit

from propagator.constants import R_EARTH_EQ, R_MOON, R_SUN


_CONE_R_FACTOR = 1.001
"""Radius factor of the cone that bounds the penumbra (``visible_fraction_nb``; > 1/cos(alpha) = 1.0000115)."""
_CONE_SLOPE = 0.005
"""Slope of that cone (> tan(alpha) = 0.0048 for Earth and Moon at >= 1.46e11 m from the Sun)."""


@njit
def disc_overlap_fraction_nb(a, b, c):
    """Fraction of a disc of radius a covered by a disc of radius b at centre distance c.

    Montenbruck & Gill (2000) sec. 3.4 (flat discs); all arguments in the same unit (rad).
    """
    if c >= a + b:
        return 0.0
    if c <= b - a:
        return 1.0
    if c <= a - b:
        return (b * b) / (a * a)
    x = (c * c + a * a - b * b) / (2.0 * c)
    ca = min(1.0, max(-1.0, x / a))
    cb = min(1.0, max(-1.0, (c - x) / b))
    y = math.sqrt(max(0.0, a * a - x * x))
    area = a * a * math.acos(ca) + b * b * math.acos(cb) - c * y
    f = area / (math.pi * a * a)
    return min(1.0, max(0.0, f))


@njit
def visible_fraction_nb(rx, ry, rz, bx, by, bz, sx, sy, sz, r_body):
    """Visible fraction of the solar disc from r = (rx, ry, rz), occulting sphere of radius
    r_body [m] centred at (bx, by, bz), Sun at (sx, sy, sz); all geocentric [m].  Scalar
    arguments so that kernels can pass env entries without slicing."""
    dbx, dby, dbz = bx - rx, by - ry, bz - rz
    if dbx * dbx + dby * dby + dbz * dbz <= r_body * r_body:
        return 0.0                       # inside the body
    dsx, dsy, dsz = sx - rx, sy - ry, sz - rz
    dot = dbx * dsx + dby * dsy + dbz * dsz
    if dot <= 0.0 and dbx * dbx + dby * dby + dbz * dbz > 1.0001 * r_body * r_body:
        # Body centre >= 90 deg from the Sun; a + b < 90 deg unless within ~0.005 % of the
        # body's surface (a < 0.3 deg): fully lit, skip the trigonometry.
        return 1.0
    nb2 = dbx * dbx + dby * dby + dbz * dbz
    nb = math.sqrt(nb2)
    # Behind the body: outside a cone that contains the penumbra, fully lit, no trigonometry.
    # The penumbra's outer boundary (c = a + b) is the cone tangent to Sun and body, of
    # half-angle alpha, sin(alpha) = (R_sun + R_body) / |s - b| <= 0.0048 for the Earth or
    # the Moon (|s - b| >= 1.46e11 m); its radius at depth x behind the body's centre is
    # R_body / cos(alpha) + x tan(alpha) < 1.001 R_body + 0.005 x, x <= |r - b| = nb.
    wx, wy, wz = dsx - dbx, dsy - dby, dsz - dbz            # s - b
    q = dbx * wx + dby * wy + dbz * wz                       # (b - r).(s - b) > 0: behind
    perp2 = nb2 - q * q / (wx * wx + wy * wy + wz * wz)      # squared distance from the axis
    lim = _CONE_R_FACTOR * r_body + _CONE_SLOPE * nb
    if perp2 > lim * lim:
        return 1.0
    ns = math.sqrt(dsx * dsx + dsy * dsy + dsz * dsz)
    a = math.asin(min(1.0, R_SUN / ns))
    b = math.asin(r_body / nb)
    cx = dby * dsz - dbz * dsy
    cy = dbz * dsx - dbx * dsz
    cz = dbx * dsy - dby * dsx
    c = math.atan2(math.sqrt(cx * cx + cy * cy + cz * cz), dot)
    return 1.0 - disc_overlap_fraction_nb(a, b, c)


@njit
def illumination_nb(r, r_sun):
    """Fraction of the solar disc visible from r [m, geocentric] past the Earth, in [0, 1].

    1 = full sunlight, 0 = umbra; Montenbruck & Gill (2000) sec. 3.4.
    r_sun: geocentric Sun position [m].
    """
    return visible_fraction_nb(r[0], r[1], r[2], 0.0, 0.0, 0.0, r_sun[0], r_sun[1], r_sun[2], R_EARTH_EQ)


@njit
def illumination_moon_nb(r, r_sun, r_moon):
    """Fraction of the solar disc visible from r past the Moon (same geometry), in [0, 1]."""
    return visible_fraction_nb(r[0], r[1], r[2], r_moon[0], r_moon[1], r_moon[2],
                            r_sun[0], r_sun[1], r_sun[2], R_MOON)


@njit
def shadow_boundaries_nb(r, r_sun, out):
    """Event functions of the Earth's shadow at r [m], Sun at r_sun [m] (both geocentric).

    out[0] = c - (a + b) [rad]: zero on the outer penumbra boundary, > 0 in full sunlight.
    out[1] = c - (b - a) [rad]: zero on the umbra boundary, < 0 in the umbra.
    (a, b, c as in the module docstring.)
    """
    dbx, dby, dbz = -r[0], -r[1], -r[2]
    dsx, dsy, dsz = r_sun[0] - r[0], r_sun[1] - r[1], r_sun[2] - r[2]
    nb = math.sqrt(dbx * dbx + dby * dby + dbz * dbz)
    ns = math.sqrt(dsx * dsx + dsy * dsy + dsz * dsz)
    a = math.asin(min(1.0, R_SUN / ns))
    b = math.asin(min(1.0, R_EARTH_EQ / nb))
    cx = dby * dsz - dbz * dsy
    cy = dbz * dsx - dbx * dsz
    cz = dbx * dsy - dby * dsx
    c = math.atan2(math.sqrt(cx * cx + cy * cy + cz * cz), dbx * dsx + dby * dsy + dbz * dsz)
    out[0] = c - (a + b)
    out[1] = c - (b - a)
