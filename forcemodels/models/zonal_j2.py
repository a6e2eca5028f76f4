"""Zonal J2 (Earth oblateness) acceleration about the true pole, closed form.

The degree-2 zonal potential U = -GM J2 R^2 / r^3 * P2(z/r), P2(s) = (3 s^2 - 1)/2
(Montenbruck & Gill, Satellite Orbits, 2000, eq. 3.7/3.14 with J_n = -C_n0, equation
numbers from memory), has the gradient

    a = -3/2 J2 GM R^2 / r^5 [ (1 - 5 z^2/r^2) r + 2 z k ]          [m/s^2]

where k is the unit vector of the Earth's pole and z = k . r (component form: M&G
eq. 3.33 for n = 2, m = 0, or Vallado, Fundamentals of Astrodynamics and Applications,
4th ed., 2013, sec. 8.6.1; from memory).  The pole is the ITRF z axis expressed in
GCRF, i.e. the third row of R (r_itrf = R r_gcrf), read from env[ENV_POLE:ENV_POLE+3]
(filled from the pole table, or copied from R when the full rotation is filled):
the true pole, not the J2000 one (they differ by ~0.35 deg in the 2020s).

Partials (differentiating the expression above):

    d a / d r = -3/2 J2 GM R^2 [ (1/r^5 - 5 z^2/r^7) I - 5 (1 - 7 z^2/r^2) r r^T / r^7
                                 - 10 z (r k^T + k r^T) / r^7 + 2 k k^T / r^5 ].

Default J2 = constants.J2_EARTH (IERS Conventions 2010, Table 1.1, zero-tide value
1.0826359e-3).  For the J2 of a gravity-field file use J2 = -sqrt(5) C_bar_20 (fully
normalised C_bar_20; :meth:`forcemodels.gfc.GravityField.j2`) together with that file's
GM and radius.  Do not combine this model with ``gravity_field`` (which already holds C20).
"""

from __future__ import annotations

import math

import numpy as np
import pydantic
from numba import njit

from forcemodels.environment import ENV_POLE, NEED_POLE
from forcemodels.registry import CaseSetup, ForceModel, register
from propagator.constants import GM_EARTH, J2_EARTH, R_EARTH_EQ


class ZonalJ2Params(pydantic.BaseModel):
    """Parameters of the J2 model."""

    model_config = pydantic.ConfigDict(extra="forbid")
    j2: float = pydantic.Field(J2_EARTH, description="unnormalised J2 [-] (default: IERS 2010 zero-tide value)")
    gm_m3_s2: float = pydantic.Field(GM_EARTH, gt=0.0, description="gravitational parameter GM [m^3/s^2]")
    radius_m: float = pydantic.Field(R_EARTH_EQ, gt=0.0, description="reference (equatorial) radius R [m]")


@njit
def accel(t, r, v, env, p, d, acc):
    """Add the J2 acceleration [m/s^2]; p = [GM [m^3/s^2], R [m], J2 [-]]; pole = env[ENV_POLE:+3]."""
    kx = env[ENV_POLE]
    ky = env[ENV_POLE + 1]
    kz = env[ENV_POLE + 2]
    r2 = r[0] * r[0] + r[1] * r[1] + r[2] * r[2]
    rn = math.sqrt(r2)
    z = kx * r[0] + ky * r[1] + kz * r[2]
    f = -1.5 * p[2] * p[0] * p[1] * p[1] / (r2 * r2 * rn)
    g = f * (1.0 - 5.0 * z * z / r2)
    h = f * 2.0 * z
    acc[0] += g * r[0] + h * kx
    acc[1] += g * r[1] + h * ky
    acc[2] += g * r[2] + h * kz


@njit
def partials(t, r, v, env, p, d, dadr, dadv):
    """Add d a/d r (module docstring) [1/s^2]; d a/d v = 0."""
    k0 = env[ENV_POLE]
    k1 = env[ENV_POLE + 1]
    k2 = env[ENV_POLE + 2]
    r2 = r[0] * r[0] + r[1] * r[1] + r[2] * r[2]
    rn = math.sqrt(r2)
    z = k0 * r[0] + k1 * r[1] + k2 * r[2]
    inv5 = 1.0 / (r2 * r2 * rn)
    inv7 = inv5 / r2
    f = -1.5 * p[2] * p[0] * p[1] * p[1]
    diag = f * (inv5 - 5.0 * z * z * inv7)
    crr = -5.0 * f * (1.0 - 7.0 * z * z / r2) * inv7
    crk = -10.0 * f * z * inv7
    ckk = 2.0 * f * inv5
    for i in range(3):
        ki = k0 if i == 0 else (k1 if i == 1 else k2)
        for j in range(3):
            kj = k0 if j == 0 else (k1 if j == 1 else k2)
            dadr[i, j] += crr * r[i] * r[j] + crk * (r[i] * kj + ki * r[j]) + ckk * ki * kj
        dadr[i, i] += diag


def prepare(params: ZonalJ2Params, case: CaseSetup) -> tuple[np.ndarray, np.ndarray, dict]:
    p = np.array([params.gm_m3_s2, params.radius_m, params.j2])
    meta = {"j2": params.j2, "gm_m3_s2": params.gm_m3_s2, "radius_m": params.radius_m,
            "pole": "true pole (ITRF z axis in GCRF, from the pole or rotation table)"}
    return p, np.zeros(0), meta


register(ForceModel(
    name="zonal_j2",
    summary="Earth oblateness J2 about the true pole (closed form, analytic partials)",
    params=ZonalJ2Params,
    accel=accel,
    prepare=prepare,
    needs=frozenset({NEED_POLE}),
    partials=partials,
    estimable={"j2": 2},
    module=__name__,
    inline=True,
    conflicts_with={"gravity_field": (
        "the spherical-harmonic field already contains C20 (J2 = -sqrt(5) C_bar_20), so J2 would "
        "be counted twice; use gravity_field alone, or zonal_j2 with central_gravity")},
))
