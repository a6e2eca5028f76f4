"""Layout of the per-evaluation environment vector shared by all force-model kernels.

The composed right-hand side fills one float64 vector ``env`` once per evaluation with
the quantities several models need (Earth orientation, Sun and Moon positions), so that
no model recomputes them.  Indices are module constants so kernels can use them as
compile-time constants.
"""

from __future__ import annotations

ENV_ROT = 0
"""env[0:9]: row-major 3x3 matrix R with r_itrf = R @ r_gcrf [-]."""
ENV_SUN = 9
"""env[9:12]: geocentric GCRF position of the Sun [m]."""
ENV_MOON = 12
"""env[12:15]: geocentric GCRF position of the Moon [m]."""
ENV_POLE = 16
"""env[16:19]: the Earth's pole (ITRF z axis) expressed in GCRF, unit vector [-]; equals
the third row of R when the full rotation is filled (env[ENV_ROT+6:ENV_ROT+9])."""
ENV_SIZE = 20

NEED_ROTATION = "rotation"
NEED_SUN = "sun"
NEED_MOON = "moon"
NEED_POLE = "pole"
"""Only the pole (third row of R): filled from a cheaper pole table when no model needs
the full rotation (propagator.rotation_table.build_pole_table / pole_nb)."""
ALL_NEEDS = (NEED_ROTATION, NEED_SUN, NEED_MOON, NEED_POLE)

# Positions in the int64 `flags` array handed to the composed module.
FLAG_ROTATION = 0
FLAG_SUN = 1
FLAG_MOON = 2
FLAG_POLE = 3
N_FLAGS = 4
