"""Point-mass gravity of the central body (Newton's law of gravitation).

a = -GM r / |r|^3 [m/s^2], r in m (any inertial frame; here GCRF).  Partials
d a/d r = GM (3 r r^T / |r|^5 - I / |r|^3) (e.g. Montenbruck & Gill, Satellite Orbits,
2000, eq. 7.56).
"""

from __future__ import annotations

import math

import numpy as np
import pydantic
from numba import njit

from forcemodels.registry import CaseSetup, ForceModel, register
from propagator.constants import GM_EARTH


class CentralGravityParams(pydantic.BaseModel):
    """Parameters of the central-body point mass."""

    model_config = pydantic.ConfigDict(extra="forbid")
    gm_m3_s2: float = pydantic.Field(GM_EARTH, gt=0.0, description="gravitational parameter GM [m^3/s^2]")


@njit
def accel(t, r, v, env, p, d, acc):
    """Add -GM r/|r|^3 [m/s^2]; p[0] = GM [m^3/s^2]."""
    r2 = r[0] * r[0] + r[1] * r[1] + r[2] * r[2]
    k = -p[0] / (r2 * math.sqrt(r2))
    acc[0] += k * r[0]
    acc[1] += k * r[1]
    acc[2] += k * r[2]


@njit
def partials(t, r, v, env, p, d, dadr, dadv):
    """Add d a/d r = GM (3 r r^T/|r|^5 - I/|r|^3); d a/d v = 0."""
    r2 = r[0] * r[0] + r[1] * r[1] + r[2] * r[2]
    rn = math.sqrt(r2)
    k3 = p[0] / (r2 * rn)
    k5 = 3.0 * k3 / r2
    for i in range(3):
        for j in range(3):
            dadr[i, j] += k5 * r[i] * r[j]
        dadr[i, i] -= k3


def prepare(params: CentralGravityParams, case: CaseSetup) -> tuple[np.ndarray, np.ndarray, dict]:
    return np.array([params.gm_m3_s2]), np.zeros(0), {"gm_m3_s2": params.gm_m3_s2}


register(ForceModel(
    name="central_gravity",
    summary="point-mass gravity of the Earth",
    params=CentralGravityParams,
    accel=accel,
    prepare=prepare,
    partials=partials,
    module=__name__,
    inline=True,
))
