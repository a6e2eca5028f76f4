"""Relativistic correction for the Earth's field (Schwarzschild term).

IERS Conventions 2010 (IERS Technical Note 36), chapter 10, eq. 10.12, Schwarzschild
part with the PPN parameters beta = gamma = 1 (Lense-Thirring and de Sitter terms
omitted):

    a = GM / (c^2 r^3) [ (4 GM / r - v^2) r + 4 (r . v) v ]             [m/s^2]

r, v geocentric GCRF [m, m/s].  Magnitude ~ 2.8e-10 m/s^2 at GNSS radius, ~1.6e-8 m/s^2 at 500 km altitude
(tests/test_relativity.py).  Analytic partials, with k = GM/(c^2 r^3) and
B = (4GM/r - v^2) r + 4 (r.v) v:

    d a/d r = k [ (4GM/r - v^2) I - 4 GM r r^T / r^3 + 4 v v^T ] - 3 k B r^T / r^2
    d a/d v = k [ -2 r v^T + 4 v r^T + 4 (r.v) I ]
"""

from __future__ import annotations

import math

import numpy as np
import pydantic
from numba import njit

from forcemodels.registry import CaseSetup, ForceModel, register
from propagator.constants import C_LIGHT, GM_EARTH


class RelativityParams(pydantic.BaseModel):
    """Parameters of the Schwarzschild correction."""

    model_config = pydantic.ConfigDict(extra="forbid")
    gm_m3_s2: float = pydantic.Field(GM_EARTH, gt=0.0, description="GM of the Earth [m^3/s^2]")


@njit
def accel(t, r, v, env, p, d, acc):
    """Add the Schwarzschild acceleration [m/s^2]; p = [GM [m^3/s^2], c [m/s]]."""
    gm = p[0]
    c = p[1]
    r2 = r[0] * r[0] + r[1] * r[1] + r[2] * r[2]
    rn = math.sqrt(r2)
    v2 = v[0] * v[0] + v[1] * v[1] + v[2] * v[2]
    rv = r[0] * v[0] + r[1] * v[1] + r[2] * v[2]
    k = gm / (c * c * r2 * rn)
    kr = k * (4.0 * gm / rn - v2)
    kv = 4.0 * k * rv
    acc[0] += kr * r[0] + kv * v[0]
    acc[1] += kr * r[1] + kv * v[1]
    acc[2] += kr * r[2] + kv * v[2]


@njit
def partials(t, r, v, env, p, d, dadr, dadv):
    """Add d a/d r and d a/d v (module docstring)."""
    gm = p[0]
    c = p[1]
    r2 = r[0] * r[0] + r[1] * r[1] + r[2] * r[2]
    rn = math.sqrt(r2)
    v2 = v[0] * v[0] + v[1] * v[1] + v[2] * v[2]
    rv = r[0] * v[0] + r[1] * v[1] + r[2] * v[2]
    k = gm / (c * c * r2 * rn)
    alpha = 4.0 * gm / rn - v2
    g3 = 4.0 * gm / (r2 * rn)
    for i in range(3):
        bi = alpha * r[i] + 4.0 * rv * v[i]
        for j in range(3):
            dadr[i, j] += k * (-g3 * r[i] * r[j] + 4.0 * v[i] * v[j]) - 3.0 * k * bi * r[j] / r2
            dadv[i, j] += k * (-2.0 * r[i] * v[j] + 4.0 * v[i] * r[j])
        dadr[i, i] += k * alpha
        dadv[i, i] += 4.0 * k * rv


def prepare(params: RelativityParams, case: CaseSetup) -> tuple[np.ndarray, np.ndarray, dict]:
    meta = {"gm_m3_s2": params.gm_m3_s2, "c_m_s": C_LIGHT,
            "method": "Schwarzschild term, IERS Conventions 2010 eq. 10.12, beta = gamma = 1"}
    return np.array([params.gm_m3_s2, C_LIGHT]), np.zeros(0), meta


register(ForceModel(
    name="relativity",
    summary="relativistic (Schwarzschild) correction of the Earth's field",
    params=RelativityParams,
    accel=accel,
    prepare=prepare,
    partials=partials,
    uses_velocity=True,
    module=__name__,
    inline=True,
))
