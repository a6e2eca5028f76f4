"""Spherical-harmonic gravity field of the Earth (degrees 2..N, orders 0..M) from an ICGEM file.

The acceleration is evaluated in the Earth-fixed frame (ITRF) with the normalised
Cunningham recursion of :mod:`forcemodels.spherical_harmonics` (Montenbruck & Gill,
Satellite Orbits, 2000, eqs. 3.29-3.33; column factors of Holmes & Featherstone, J.
Geodesy 76:279-299, 2002, eqs. 11-13; sums regrouped by column, see that module),
singularity-free at the poles:

    r_itrf = R r_gcrf,  a_gcrf = R^T a_itrf(r_itrf)   [m, m/s^2]

with R = env[ENV_ROT:ENV_ROT+9] (row-major).  Degree 0 (point mass) is left to the
``central_gravity`` model; degree 1 is zero for a geocentric field.  The coefficients
are used with the GM and reference radius of their own file (these may differ slightly
from ``central_gravity``'s GM; both are recorded in the output metadata).  The tide
system of the file is used as is and reported.  Partials: finite differences (automatic).
"""

from __future__ import annotations

import functools
import hashlib
from pathlib import Path
from typing import Optional

import numpy as np
import pydantic
from numba import njit

from forcemodels import spherical_harmonics as sh
from forcemodels.environment import ENV_ROT, NEED_ROTATION
from forcemodels.gfc import DEFAULT_FIELD_FILE, GravityField, read_gfc
from forcemodels.registry import CaseSetup, ForceModel, register


class GravityFieldParams(pydantic.BaseModel):
    """Parameters of the spherical-harmonic field."""

    model_config = pydantic.ConfigDict(extra="forbid")
    degree: int = pydantic.Field(ge=2, le=sh.MAX_DEGREE, description="highest degree used [-]")
    order: Optional[int] = pydantic.Field(None, ge=0, description="highest order used [-] (default: degree)")
    field_file: Optional[Path] = pydantic.Field(
        None, description="ICGEM .gfc file (default: the shipped EGM96 degree/order 8 field)")

    @pydantic.model_validator(mode="after")
    def _order_le_degree(self) -> "GravityFieldParams":
        if self.order is not None and self.order > self.degree:
            raise ValueError(f"order ({self.order}) must not exceed degree ({self.degree})")
        return self


@njit
def accel(t, r, v, env, p, d, acc):
    """Add the field's acceleration [m/s^2] at GCRF position r [m].

    p = [GM [m^3/s^2], R [m], degree, order]; d = spherical_harmonics.field_data(...).
    """
    x = env[ENV_ROT + 0] * r[0] + env[ENV_ROT + 1] * r[1] + env[ENV_ROT + 2] * r[2]
    y = env[ENV_ROT + 3] * r[0] + env[ENV_ROT + 4] * r[1] + env[ENV_ROT + 5] * r[2]
    z = env[ENV_ROT + 6] * r[0] + env[ENV_ROT + 7] * r[1] + env[ENV_ROT + 8] * r[2]
    ax, ay, az = sh.accel_bodyfixed(x, y, z, p[0], p[1], int(p[2]), int(p[3]), d)
    acc[0] += env[ENV_ROT + 0] * ax + env[ENV_ROT + 3] * ay + env[ENV_ROT + 6] * az
    acc[1] += env[ENV_ROT + 1] * ax + env[ENV_ROT + 4] * ay + env[ENV_ROT + 7] * az
    acc[2] += env[ENV_ROT + 2] * ax + env[ENV_ROT + 5] * ay + env[ENV_ROT + 8] * az


def _file_key(path: Path) -> tuple[str, int, int]:
    st = path.stat()
    return str(path), st.st_mtime_ns, st.st_size


@functools.lru_cache(maxsize=8)
def _load(path_str: str, mtime_ns: int, size: int, degree: int) -> tuple[GravityField, str]:
    """Read (and remember) a field file; the key includes mtime and size, so edits are seen."""
    field = read_gfc(path_str, max_degree=degree)
    digest = hashlib.sha256(Path(path_str).read_bytes()).hexdigest()
    return field, digest


@functools.lru_cache(maxsize=8)
def _packed(path_str: str, mtime_ns: int, size: int, degree: int, order: int) -> np.ndarray:
    """Coefficient combinations and recursion factors packed by ``field_data`` (Python
    loops: ~0.3 ms at degree 12, ~17 ms at degree 120), computed once per file version,
    degree and order in a process."""
    field, _ = _load(path_str, mtime_ns, size, degree)
    return sh.field_data(field.C, field.S, degree, order)


def prepare(params: GravityFieldParams, case: CaseSetup) -> tuple[np.ndarray, np.ndarray, dict]:
    """Read the field file (errors here, at configuration time) and pack p and d."""
    path = Path(params.field_file).expanduser() if params.field_file is not None else DEFAULT_FIELD_FILE
    if not path.is_file():
        raise ValueError(f"gravity_field: field_file {path} does not exist")
    path = path.resolve()
    key = _file_key(path)
    field, digest = _load(*key, params.degree)
    order = params.degree if params.order is None else params.order
    p = np.array([field.gm, field.radius, float(params.degree), float(order)])
    # a copy: the kernels only read d, but each propagation owns its data (a model whose
    # kernel used d as scratch space could not share it)
    d = _packed(*key, params.degree, order).copy()
    meta = {
        "field_name": field.name,
        "field_file": str(path),
        "field_file_sha256": digest,
        "gm_m3_s2": field.gm,
        "radius_m": field.radius,
        "tide_system": field.tide_system,
        "degree": params.degree,
        "order": order,
        "file_max_degree": field.file_max_degree,
    }
    return p, d, meta


register(ForceModel(
    name="gravity_field",
    summary="spherical-harmonic Earth gravity field (degrees >= 2) from an ICGEM .gfc file",
    params=GravityFieldParams,
    accel=accel,
    prepare=prepare,
    needs=frozenset({NEED_ROTATION}),
    module=__name__,
))
