"""Third-body point-mass gravity of the Sun (with the indirect term).

The acceleration of a satellite at r relative to the Earth, due to a body of
gravitational parameter GM at geocentric position s, is the direct attraction minus the
attraction on the Earth (Montenbruck & Gill, Satellite Orbits, 2000, sec. 3.3.1):

    a = GM ( (s - r)/|s - r|^3 - s/|s|^3 )                     [m/s^2]

For |r| << |s| the two terms nearly cancel (for the Sun at GNSS radius the result is
~1e-4 of either term).  The cancellation-free form of Battin (An Introduction to the
Mathematics and Methods of Astrodynamics, rev. ed. 1999, section 8.4, Encke's method):

    q = r.(r - 2 s) / s.s,    f(q) = q (3 + 3 q + q^2) / (1 + (1 + q)^(3/2))
    a = -GM / |s - r|^3 ( r + f(q) s )

(f(q) = (1 + q)^(3/2) - 1 written without subtraction).  Partials
d a/d r = GM (3 d d^T/|d|^5 - I/|d|^3), d = s - r; d a/d v = 0.

The kernels ``third_body_accel_nb`` / ``third_body_partials_nb`` are shared with
:mod:`forcemodels.models.moon_gravity`.  Sun position: ``env[ENV_SUN:+3]`` (geocentric
GCRF, m) from :mod:`forcemodels.ephemeris`.
"""

from __future__ import annotations

import math

import numpy as np
import pydantic
from numba import njit

from forcemodels.environment import ENV_SUN, NEED_SUN
from forcemodels.ephemeris import ephemeris_source
from forcemodels.registry import CaseSetup, ForceModel, register
from propagator.constants import GM_SUN


class SunGravityParams(pydantic.BaseModel):
    """Parameters of the Sun as a third body."""

    model_config = pydantic.ConfigDict(extra="forbid")
    gm_m3_s2: float = pydantic.Field(GM_SUN, gt=0.0, description="GM of the Sun [m^3/s^2]")


@njit
def third_body_accel_nb(r, s0, s1, s2, gm, acc):
    """acc += -GM/|s - r|^3 (r + f(q) s); Battin (1999) sec. 8.4. r, s [m]; GM [m^3/s^2]."""
    r0, r1, r2 = r[0], r[1], r[2]
    ss = s0 * s0 + s1 * s1 + s2 * s2
    q = (r0 * (r0 - 2.0 * s0) + r1 * (r1 - 2.0 * s1) + r2 * (r2 - 2.0 * s2)) / ss
    f = q * (3.0 + 3.0 * q + q * q) / (1.0 + (1.0 + q) * math.sqrt(1.0 + q))
    d0, d1, d2 = s0 - r0, s1 - r1, s2 - r2
    dd = d0 * d0 + d1 * d1 + d2 * d2
    k = -gm / (dd * math.sqrt(dd))
    acc[0] += k * (r0 + f * s0)
    acc[1] += k * (r1 + f * s1)
    acc[2] += k * (r2 + f * s2)


@njit
def third_body_partials_nb(r, s0, s1, s2, gm, dadr):
    """dadr += GM (3 d d^T/|d|^5 - I/|d|^3), d = s - r [1/s^2]."""
    d0, d1, d2 = s0 - r[0], s1 - r[1], s2 - r[2]
    dd = d0 * d0 + d1 * d1 + d2 * d2
    k3 = gm / (dd * math.sqrt(dd))
    k5 = 3.0 * k3 / dd
    dvec = (d0, d1, d2)
    for i in range(3):
        for j in range(3):
            dadr[i, j] += k5 * dvec[i] * dvec[j]
        dadr[i, i] -= k3


@njit
def accel(t, r, v, env, p, d, acc):
    """Add the Sun's third-body acceleration [m/s^2]; p[0] = GM_sun [m^3/s^2]."""
    third_body_accel_nb(r, env[ENV_SUN], env[ENV_SUN + 1], env[ENV_SUN + 2], p[0], acc)


@njit
def partials(t, r, v, env, p, d, dadr, dadv):
    """Add d a/d r (d a/d v = 0)."""
    third_body_partials_nb(r, env[ENV_SUN], env[ENV_SUN + 1], env[ENV_SUN + 2], p[0], dadr)


def prepare(params: SunGravityParams, case: CaseSetup) -> tuple[np.ndarray, np.ndarray, dict]:
    meta = {"gm_m3_s2": params.gm_m3_s2,
            "ephemeris": ephemeris_source(case.epoch, case.t_start, case.t_end),
            "method": "point mass with indirect term, Battin (1999) sec. 8.4 f(q) form"}
    return np.array([params.gm_m3_s2]), np.zeros(0), meta


register(ForceModel(
    name="sun_gravity",
    summary="Sun as a third body (point mass, indirect term included)",
    params=SunGravityParams,
    accel=accel,
    prepare=prepare,
    needs=frozenset({NEED_SUN}),
    partials=partials,
    module=__name__,
    inline=True,
))
