"""Third-body point-mass gravity of the Moon (with the indirect term).

Same formulation as :mod:`forcemodels.models.sun_gravity` (Montenbruck & Gill 2000
sec. 3.3.1, in the cancellation-free form of Battin 1999 sec. 8.4); the Moon position is
``env[ENV_MOON:+3]`` (geocentric GCRF, m).  Default GM_moon = GM_earth x (Moon/Earth mass
ratio), IERS Conventions 2010 Table 1.1.
"""

from __future__ import annotations

import numpy as np
import pydantic
from numba import njit

from forcemodels.environment import ENV_MOON, NEED_MOON
from forcemodels.ephemeris import ephemeris_source
from forcemodels.models.sun_gravity import third_body_accel_nb, third_body_partials_nb
from forcemodels.registry import CaseSetup, ForceModel, register
from propagator.constants import GM_MOON


class MoonGravityParams(pydantic.BaseModel):
    """Parameters of the Moon as a third body."""

    model_config = pydantic.ConfigDict(extra="forbid")
    gm_m3_s2: float = pydantic.Field(GM_MOON, gt=0.0, description="GM of the Moon [m^3/s^2]")


@njit
def accel(t, r, v, env, p, d, acc):
    """Add the Moon's third-body acceleration [m/s^2]; p[0] = GM_moon [m^3/s^2]."""
    third_body_accel_nb(r, env[ENV_MOON], env[ENV_MOON + 1], env[ENV_MOON + 2], p[0], acc)


@njit
def partials(t, r, v, env, p, d, dadr, dadv):
    """Add d a/d r (d a/d v = 0)."""
    third_body_partials_nb(r, env[ENV_MOON], env[ENV_MOON + 1], env[ENV_MOON + 2], p[0], dadr)


def prepare(params: MoonGravityParams, case: CaseSetup) -> tuple[np.ndarray, np.ndarray, dict]:
    meta = {"gm_m3_s2": params.gm_m3_s2,
            "ephemeris": ephemeris_source(case.epoch, case.t_start, case.t_end),
            "method": "point mass with indirect term, Battin (1999) sec. 8.4 f(q) form"}
    return np.array([params.gm_m3_s2]), np.zeros(0), meta


register(ForceModel(
    name="moon_gravity",
    summary="Moon as a third body (point mass, indirect term included)",
    params=MoonGravityParams,
    accel=accel,
    prepare=prepare,
    needs=frozenset({NEED_MOON}),
    partials=partials,
    module=__name__,
    inline=True,
))
