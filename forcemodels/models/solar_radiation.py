"""Solar radiation pressure, cannonball model, with the Earth's (and the Moon's) shadow.

Montenbruck & Gill, Satellite Orbits (2000), sec. 3.4, for a sphere ("cannonball"):

    a = -nu * P_sun(1 au) * (AU / |s - r|)^2 * Cr * (A/m) * u,    u = (s - r)/|s - r|

[m/s^2]: the acceleration points away from the Sun.  P_sun(1 au) = SOLAR_IRRADIANCE_1AU / c
(1361 W/m^2, IAU 2015 Resolution B3, gives 4.54e-6 N/m^2); the flux scales with the
inverse square of the satellite-Sun distance; nu is the illumination fraction of
:mod:`forcemodels.shadow` (conical umbra/penumbra, M&G 2000 sec. 3.4), or 1 with
``shadow = "none"``.

Cr: 1 = perfect absorber, 2 = perfect specular reflector (flat plate facing the Sun); no
real surface reflects more than the specular plate, so longarc accepts 0 < Cr <= 2
(values below 1 only make sense as fitted scale factors; typical fitted values are
1.0-1.8, common practice).

Partials: none analytic (the illumination fraction varies in the penumbra); the
dispatcher's central differences are used.  ``estimable = {"cr": 0}``: p[0] is Cr, so the
Cr sensitivity is available.

p layout: [Cr, A/m [m^2/kg], P(1 au) [N/m^2], AU [m], shadow flag, moon-shadow flag].
The model lists both "sun" and "moon" in ``needs``: the Moon position is only used with
``moon_shadow = true``, and the environment filler computes Sun and Moon in one call
anyway, so this costs nothing.
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
import pydantic
from numba import njit

from forcemodels.environment import ENV_MOON, ENV_SUN, NEED_MOON, NEED_SUN
from forcemodels.ephemeris import ephemeris_source
from forcemodels.registry import CaseSetup, ForceModel, register
from forcemodels.shadow import visible_fraction_nb
from propagator.constants import AU, R_EARTH_EQ, R_MOON, R_SUN, SOLAR_PRESSURE_1AU

CR_MAX = 2.0
"""Upper limit accepted for Cr (flat-plate perfect specular reflector)."""


class SolarRadiationParams(pydantic.BaseModel):
    """Cannonball solar radiation pressure parameters."""

    model_config = pydantic.ConfigDict(extra="forbid")
    cr: float = pydantic.Field(description="radiation pressure coefficient Cr [-], 0 < Cr <= 2")
    area_m2: float = pydantic.Field(description="cross-section area facing the Sun [m^2], > 0")
    mass_kg: float = pydantic.Field(description="spacecraft mass [kg], > 0")
    shadow: Literal["conical", "none"] = pydantic.Field(
        "conical", description="Earth shadow model: conical umbra/penumbra or none")
    moon_shadow: bool = pydantic.Field(False, description="also apply the Moon's shadow (conical)")

    @pydantic.field_validator("cr")
    @classmethod
    def _check_cr(cls, value: float) -> float:
        if not (0.0 < value <= CR_MAX) or not math.isfinite(value):
            raise ValueError(f"cr = {value!r} is outside the accepted range 0 < Cr <= {CR_MAX:g} "
                             "(1 = absorber, 2 = specular flat plate; typical 1.0-1.8)")
        return value

    @pydantic.field_validator("area_m2", "mass_kg")
    @classmethod
    def _check_positive(cls, value: float, info: pydantic.ValidationInfo) -> float:
        if not (value > 0.0) or not math.isfinite(value):
            unit = "m^2" if info.field_name == "area_m2" else "kg"
            raise ValueError(f"{info.field_name} = {value!r} {unit} must be finite and > 0")
        return value


@njit
def accel(t, r, v, env, p, d, acc):
    """Add the cannonball SRP acceleration [m/s^2] (see module docstring for p)."""
    s0, s1, s2 = env[ENV_SUN], env[ENV_SUN + 1], env[ENV_SUN + 2]
    nu = 1.0
    if p[4] != 0.0:
        nu = visible_fraction_nb(r[0], r[1], r[2], 0.0, 0.0, 0.0, s0, s1, s2, R_EARTH_EQ)
    if p[5] != 0.0 and nu > 0.0:
        nu *= visible_fraction_nb(r[0], r[1], r[2], env[ENV_MOON], env[ENV_MOON + 1], env[ENV_MOON + 2],
                                  s0, s1, s2, R_MOON)
    if nu == 0.0:
        return
    d0, d1, d2 = s0 - r[0], s1 - r[1], s2 - r[2]
    dd = d0 * d0 + d1 * d1 + d2 * d2
    dn = math.sqrt(dd)
    # -nu P (AU/|d|)^2 Cr A/m d/|d|
    k = -nu * p[2] * (p[3] * p[3] / dd) * p[0] * p[1] / dn
    acc[0] += k * d0
    acc[1] += k * d1
    acc[2] += k * d2


def prepare(params: SolarRadiationParams, case: CaseSetup) -> tuple[np.ndarray, np.ndarray, dict]:
    a_over_m = params.area_m2 / params.mass_kg
    p = np.array([params.cr, a_over_m, SOLAR_PRESSURE_1AU, AU,
                  1.0 if params.shadow == "conical" else 0.0, 1.0 if params.moon_shadow else 0.0])
    shadow = ("conical umbra/penumbra, spherical Earth R = %.1f m, Sun R = %.0f m "
              "(Montenbruck & Gill 2000 sec. 3.4)" % (R_EARTH_EQ, R_SUN)) if params.shadow == "conical" else "none"
    meta = {
        "area_to_mass_m2_kg": a_over_m,
        "solar_pressure_1au_n_m2": SOLAR_PRESSURE_1AU,
        "au_m": AU,
        "shadow_model": shadow,
        "moon_shadow": ("conical, Moon R = %.0f m, fractions multiplied" % R_MOON) if params.moon_shadow else "none",
        "ephemeris": ephemeris_source(case.epoch, case.t_start, case.t_end),
        "method": "cannonball, Montenbruck & Gill (2000) sec. 3.4, flux ~ 1/distance^2",
    }
    return p, np.zeros(0), meta


register(ForceModel(
    name="solar_radiation",
    summary="solar radiation pressure, cannonball, conical Earth shadow (optional Moon shadow)",
    params=SolarRadiationParams,
    accel=accel,
    prepare=prepare,
    needs=frozenset({NEED_SUN, NEED_MOON}),
    estimable={"cr": 0},
    module=__name__,
    inline=True,
))
