"""Per-process cache of the environment tables a propagation builds.

Cases of a sweep (and the segments of long arcs that share an epoch) need the same
rotation (or pole) and Sun/Moon tables: building them costs ~2.5 ms per 1-day case (IAU
2006/2000A ingredients through pyerfa, DE421 Chebyshev sets).  The tables are only read
by compiled code, so handing out the same array is bitwise equivalent to building a new
one.  Keyed by table kind, epoch (two-part JD and scale) and span; the least recently
used entry is dropped beyond :data:`CACHE_SIZE`.
"""

from __future__ import annotations

from collections import OrderedDict
from typing import Any, Callable

import numpy as np

CACHE_SIZE = 8
"""Tables kept per process: a 1-day table is a few kB, a 1-year one at most a few MB."""

_CACHE: "OrderedDict[tuple, np.ndarray]" = OrderedDict()


def _cached(kind: str, epoch: Any, lo: float, hi: float, build: Callable[[], np.ndarray]) -> np.ndarray:
    key = (kind, float(epoch.jd1), float(epoch.jd2), str(epoch.scale), float(lo), float(hi))
    table = _CACHE.get(key)
    if table is not None:
        _CACHE.move_to_end(key)
        return table
    table = build()  # errors (EOP span, ephemeris span) propagate to the caller
    _CACHE[key] = table
    while len(_CACHE) > CACHE_SIZE:
        _CACHE.popitem(last=False)
    return table


def rotation_table(epoch: Any, lo: float, hi: float) -> np.ndarray:
    """``propagator.rotation_table.build_rotation_table(epoch, lo, hi)``, cached."""
    from propagator.rotation_table import build_rotation_table

    return _cached("rotation", epoch, lo, hi, lambda: build_rotation_table(epoch, lo, hi))


def pole_table(epoch: Any, lo: float, hi: float) -> np.ndarray:
    """``propagator.rotation_table.build_pole_table(epoch, lo, hi)``, cached."""
    from propagator.rotation_table import build_pole_table

    return _cached("pole", epoch, lo, hi, lambda: build_pole_table(epoch, lo, hi))


def sun_moon_table(epoch: Any, lo: float, hi: float) -> np.ndarray:
    """``forcemodels.ephemeris.build_sun_moon_table(epoch, lo, hi)``, cached."""
    from forcemodels.ephemeris import build_sun_moon_table

    return _cached("sun_moon", epoch, lo, hi, lambda: build_sun_moon_table(epoch, lo, hi))
