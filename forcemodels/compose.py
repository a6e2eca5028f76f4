"""Compose the registered force models and the stepping loop into one cached module.

Why generated code: numba's disk cache misses in every new process when a compiled
function receives another compiled function as an argument (measured: 1-2 s of
recompilation per model per process).  Here the right-hand side calls each model's
kernel as a *global*, so the cache works.  The generated module holds

* the text of :mod:`propagator.integrators.stepper` (the one stepping loop), and
* dispatch functions whose ``if kind == k`` chains call the registered kernels.

It is written to the user cache directory under a name containing a hash of every
source file of ``propagator`` and ``forcemodels`` (plus numba and Python versions), so
a source change can never leave a stale compiled cache behind.

The ``forces`` tuple handed to every compiled entry point is built by
:func:`build_forces`::

    (ids, flags, pbuf, poff, dbuf, doff, rot_table, eph_table, env, sens_model, sens_index,
     scratch, pole_table)

``scratch`` (index 11, float64[SCRATCH_SIZE]) is work space of the finite-difference
partials, so the hot path allocates nothing.  ``pole_table`` (index 12, appended last so
the other indices keep their meaning) is a ``propagator.rotation_table.build_pole_table``
table: models that need only the pole (``environment.NEED_POLE``, e.g. ``zonal_j2``) get
it from there (~12 ns per evaluation instead of ~78 ns for the full rotation) unless the
full rotation is filled anyway, in which case the pole is copied from its third row.
``env`` and ``scratch`` are written during evaluation: one ``forces`` tuple must not be
used by two threads at once.

Speed (measured, see ``validation/bench_forces.py``): numba's reference counting of array
arguments (an atomic increment and decrement through a non-inlined call for every array,
tuple members included, at every function boundary and tuple access) cost ~8 ns per array
on the 2-core test machine, ~0.4-0.8 us per evaluation with the 11-array ``forces``
tuple, against ~5 ns for the point-mass arithmetic itself.  The numba pruning pass does
not remove these pairs when an exception path (division by zero, table span checks) lies
between them.  The dispatch functions are therefore compiled without NRT reference
counting (numba's ``_nrt=False`` target option; they own no array and allocate nothing,
slices are plain views) and the small ones are inlined at the numba-IR level
(``inline="always"``), as are the kernels of models registered with ``inline=True``
(the short ones: the call with six array arguments cost ~2-3 ns per model; P4 of
``validation/bench_integrators.py`` 2.31 -> 2.13 ms, cold compile +4 s).  Kernels called from them inherit the option when they are first
compiled inside the composed module, so **force-model kernels must not allocate** (use
scratch space in ``d``; ``tests/test_compose.py`` compiles every kernel so).  Sun and
Moon come from the resampled series of the table (``resampled_sun_moon_nb``, inlined,
no allocation); only a table without it (never built by the project; the source
evaluator may allocate through the analytic Moon series) goes through ``sun_moon_nb``
compiled with NRT as its own dispatcher.  Measured after the change (same machine,
one run): point mass ~30 ns per ``accel_total`` (was ~420-830 ns), full set (12x12 field,
Sun, Moon, SRP, relativity) ~1.0 us = 0.99 x the hand-fused kernel (was ~2.9 us, 1.9 x).
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import sys
import tempfile
from pathlib import Path
from types import ModuleType
from typing import Sequence

import numba
import numpy as np

from forcemodels import registry
from forcemodels.environment import (ENV_SIZE, FLAG_MOON, FLAG_POLE, FLAG_ROTATION, FLAG_SUN, N_FLAGS, NEED_MOON,
                                     NEED_POLE, NEED_ROTATION, NEED_SUN)

SCRATCH_SIZE = 16
"""Length of ``forces[11]``, the work space of the finite-difference partials."""

_PACKAGE_ROOTS = ("propagator", "forcemodels")
_MODULE: ModuleType | None = None


def cache_dir() -> Path:
    """Directory for the generated module and numba's cache of it."""
    base = os.environ.get("LONGARC_CACHE_DIR")
    path = Path(base) if base else Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "longarc"
    path.mkdir(parents=True, exist_ok=True)
    return path


_NOT_COMPILED = ("propagator/study/", "propagator/fitting/", "propagator/cli.py")
"""Parts of the tree that no compiled code imports: editing them must not force the
25-45 s recompilation of the composed module.  Everything else counts (compiled code
also freezes module-level constants of plain Python modules such as constants.py)."""


def _source_files() -> list[Path]:
    files: list[Path] = []
    for pkg in _PACKAGE_ROOTS:
        root = Path(importlib.util.find_spec(pkg).origin).parent
        for f in sorted(root.rglob("*.py")):
            rel = f"{pkg}/{f.relative_to(root).as_posix()}"
            if not rel.startswith(_NOT_COMPILED):
                files.append(f)
    return files


def _source_hash(text: str) -> str:
    h = hashlib.sha256()
    h.update(f"{sys.version}|numba {numba.__version__}|numpy {np.__version__}".encode())
    for f in _source_files():
        h.update(f.name.encode())
        h.update(f.read_bytes())
    h.update(text.encode())
    return h.hexdigest()[:16]


def _nrt_option_supported() -> bool:
    """True if this numba accepts the ``_nrt`` target option (compile without reference counting)."""
    try:
        from numba.core.options import DefaultOptions
    except ImportError:  # pragma: no cover - very old/new numba
        return False
    return hasattr(DefaultOptions, "_nrt")


_NO_NRT = ", _nrt=False" if _nrt_option_supported() else ""
_FAST = "cache=True" + _NO_NRT
"""Decorator options of the dispatch entry points (see the module docstring, "Speed")."""
_FAST_INLINE = _FAST + ', inline="always"'
"""... and of the small dispatch helpers, inlined into their callers."""

_HEADER = '''"""Generated by forcemodels.compose: the stepping loop + force-model dispatch. Do not edit."""
import math
import numpy as np
from numba import njit
from forcemodels.environment import ENV_ROT, ENV_SUN, ENV_MOON, ENV_POLE, ENV_SIZE, FLAG_ROTATION, FLAG_SUN, FLAG_MOON, FLAG_POLE
from propagator.rotation_table import gcrf_to_itrf_nb as _rotation_nb
from propagator.rotation_table import pole_nb as _pole_nb
from forcemodels.ephemeris import sun_moon_nb as _sun_moon_kernel
from forcemodels.ephemeris import resampled_sun_moon_nb as _sun_moon_resampled
from forcemodels.ephemeris import H_RS_NSEG as _H_RS_NSEG
'''

_SUN_MOON_NRT = '''
# sun_moon_nb may allocate (analytic Moon series): its own dispatcher, compiled with NRT,
# so that it does not inherit _nrt=False from env_fill (compose module docstring, "Speed").
_sun_moon_nb = njit(_nrt=True)(_sun_moon_kernel.py_func)
'''

_ENV_FILL = '''
@njit({fast_inline})
def env_fill(t, forces):
    """Fill forces[8] (env) at time t [s since epoch, TT] for the models in use."""
    flags = forces[1]
    env = forces[8]
    if flags[FLAG_ROTATION]:
        _rotation_nb(t, forces[6], env[ENV_ROT:ENV_ROT + 9])
        env[ENV_POLE] = env[ENV_ROT + 6]
        env[ENV_POLE + 1] = env[ENV_ROT + 7]
        env[ENV_POLE + 2] = env[ENV_ROT + 8]
    elif flags[FLAG_POLE]:
        _pole_nb(t, forces[12], env[ENV_POLE:ENV_POLE + 3])
    if flags[FLAG_SUN] or flags[FLAG_MOON]:
        if forces[7][_H_RS_NSEG] > 0.0:       # resampled series: inlined, no allocation
            _sun_moon_resampled(t, forces[7], env[ENV_SUN:ENV_SUN + 3], env[ENV_MOON:ENV_MOON + 3])
        else:
            _sun_moon_nb(t, forces[7], env[ENV_SUN:ENV_SUN + 3], env[ENV_MOON:ENV_MOON + 3])
'''

_GENERIC = '''

@njit({fast})
def accel_total(t, r, v, forces, acc):
    """Total acceleration [m/s^2] of all models at (t, r, v); fills env first."""
    env_fill(t, forces)
    acc[0] = 0.0
    acc[1] = 0.0
    acc[2] = 0.0
    for m in range(forces[0].shape[0]):
        model_accel(m, t, r, v, forces, acc)


@njit({fast})
def _fd_partials_one(m, t, r, v, forces, dadr, dadv):
    """Central finite differences of model m's acceleration w.r.t. r and v (env held at t).

    Steps h_r = 1e-7 |r| + 1e-3 m, h_v = 1e-7 |v| + 1e-6 m/s (common practice; truncation
    error ~ h^2 x third derivative, rounding ~ eps |a| / h); work space forces[11].
    """
    rn = math.sqrt(r[0] * r[0] + r[1] * r[1] + r[2] * r[2])
    vn = math.sqrt(v[0] * v[0] + v[1] * v[1] + v[2] * v[2])
    hr = 1e-7 * rn + 1e-3
    hv = 1e-7 * vn + 1e-6
    scratch = forces[11]
    ap = scratch[0:3]
    am = scratch[3:6]
    rp = scratch[6:9]
    vp = scratch[9:12]
    for i in range(3):
        rp[i] = r[i]
        vp[i] = v[i]
    for j in range(3):
        ap[:] = 0.0
        am[:] = 0.0
        rp[j] = r[j] + hr
        model_accel(m, t, rp, v, forces, ap)
        rp[j] = r[j] - hr
        model_accel(m, t, rp, v, forces, am)
        rp[j] = r[j]
        for i in range(3):
            dadr[i, j] += (ap[i] - am[i]) / (2.0 * hr)
    if model_uses_velocity(forces[0][m]):
        for j in range(3):
            ap[:] = 0.0
            am[:] = 0.0
            vp[j] = v[j] + hv
            model_accel(m, t, r, vp, forces, ap)
            vp[j] = v[j] - hv
            model_accel(m, t, r, vp, forces, am)
            vp[j] = v[j]
            for i in range(3):
                dadv[i, j] += (ap[i] - am[i]) / (2.0 * hv)


@njit({fast})
def partials_total(t, r, v, forces, dadr, dadv, dadp):
    """d acc/d r, d acc/d v (3x3) and d acc/d p for the requested sensitivities (3 x ns).

    Models with analytic partials use them; the others get central finite differences.
    Parameter sensitivities are central differences in the parameter (models are
    smooth, mostly linear, in their parameters).  Call after ``accel_total`` at the same t.
    """
    dadr[:, :] = 0.0
    dadv[:, :] = 0.0
    ids = forces[0]
    for m in range(ids.shape[0]):
        if not model_partials(m, t, r, v, forces, dadr, dadv):
            _fd_partials_one(m, t, r, v, forces, dadr, dadv)
    sens_model = forces[9]
    sens_index = forces[10]
    pbuf = forces[2]
    poff = forces[3]
    scratch = forces[11]
    ap = scratch[0:3]
    am = scratch[3:6]
    for s in range(sens_model.shape[0]):
        m = sens_model[s]
        k = poff[m] + sens_index[s]
        p0 = pbuf[k]
        h = 1e-6 * abs(p0) if p0 != 0.0 else 1e-9
        ap[:] = 0.0
        am[:] = 0.0
        pbuf[k] = p0 + h
        model_accel(m, t, r, v, forces, ap)
        pbuf[k] = p0 - h
        model_accel(m, t, r, v, forces, am)
        pbuf[k] = p0
        for i in range(3):
            dadp[i, s] = (ap[i] - am[i]) / (2.0 * h)
'''


def _dispatch_source(models: list) -> list[str]:
    """Generated ``model_accel``, ``model_partials`` and ``model_uses_velocity``."""
    lines = ["", f"@njit({_FAST_INLINE})", "def model_accel(m, t, r, v, forces, acc):",
             '    """Add model m\'s acceleration at (t, r, v) to acc, env already filled."""',
             "    kind = forces[0][m]",
             "    p = forces[2][forces[3][m]:forces[3][m + 1]]",
             "    d = forces[4][forces[5][m]:forces[5][m + 1]]",
             "    env = forces[8]"]
    for k in range(len(models)):
        kw = "if" if k == 0 else "elif"
        lines.append(f"    {kw} kind == {k}:")
        lines.append(f"        _accel_{k}(t, r, v, env, p, d, acc)")

    lines += ["", f"@njit({_FAST_INLINE})", "def model_partials(m, t, r, v, forces, dadr, dadv):",
              '    """Add model m\'s analytic partials; False if it has none."""',
              "    kind = forces[0][m]",
              "    p = forces[2][forces[3][m]:forces[3][m + 1]]",
              "    d = forces[4][forces[5][m]:forces[5][m + 1]]",
              "    env = forces[8]"]
    for k, m in enumerate(models):
        if m.partials is not None:
            lines.append(f"    if kind == {k}:")
            lines.append(f"        _partials_{k}(t, r, v, env, p, d, dadr, dadv)")
            lines.append("        return True")
    lines.append("    return False")

    uses_v = [k for k, m in enumerate(models) if getattr(m, "uses_velocity", False)]
    lines += ["", f"@njit({_FAST_INLINE})", "def model_uses_velocity(kind):",
              f"    return kind in ({''.join(f'{k}, ' for k in uses_v)}-1,)"]
    return lines


def generate_source() -> str:
    """Source text of the composed module for the currently registered models."""
    names = registry.known_names()
    models = [registry.get(n) for n in names]
    lines = [_HEADER, _SUN_MOON_NRT if _NO_NRT else "_sun_moon_nb = _sun_moon_kernel\n"]
    for k, m in enumerate(models):
        if m.inline:
            lines.append(f"from {m.module} import accel as _accel_src_{k}")
            lines.append(f"_accel_{k} = njit({_FAST_INLINE})(_accel_src_{k}.py_func)")
        else:
            lines.append(f"from {m.module} import accel as _accel_{k}")
        if m.partials is not None:
            lines.append(f"from {m.module} import partials as _partials_{k}")
    lines.append("")
    lines.append("KNOWN_MODELS = (" + "".join(f"{n!r}, " for n in names) + ")")
    stepper = Path(importlib.util.find_spec("propagator.integrators.stepper").origin).read_text()
    lines.append("\n# ---- begin propagator/integrators/stepper.py ----\n")
    lines.append(stepper)
    lines.append("\n# ---- end propagator/integrators/stepper.py ----\n")
    lines.append(_ENV_FILL.replace("{fast_inline}", _FAST_INLINE))
    lines.extend(_dispatch_source(models))
    lines.append(_GENERIC.replace("{fast}", _FAST))
    return "\n".join(lines)


def composed() -> ModuleType:
    """Import (generating if needed) the composed module; cached per process."""
    global _MODULE
    if _MODULE is not None:
        return _MODULE
    text = generate_source()
    digest = _source_hash(text)
    name = f"longarc_composed_{digest}"
    path = cache_dir() / f"{name}.py"
    if not path.exists() or path.read_text() != text:
        fd, tmp = tempfile.mkstemp(dir=path.parent, suffix=".tmp")
        with os.fdopen(fd, "w") as fh:
            fh.write(text)
        os.replace(tmp, path)
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    _MODULE = module
    return module


def build_forces(prepared: Sequence[registry.PreparedModel], rot_table: np.ndarray | None,
                 eph_table: np.ndarray | None,
                 sensitivities: Sequence[tuple[str, str]] = (),
                 pole_table: np.ndarray | None = None) -> tuple:
    """Pack prepared models and environment tables into the ``forces`` tuple.

    The pole (``NEED_POLE``) comes from the full rotation when a model needs that anyway,
    else from ``pole_table`` if given, else from ``rot_table`` if given (third row of R;
    e.g. a hand-made rotation table that fixes the pole), else it is an error.

    ``sensitivities`` lists (model name, parameter name) pairs, e.g. ("solar_radiation",
    "cr"), whose acceleration partials feed the variational equations.  Raises
    ``ValueError`` (at configuration time) for a missing environment table, an unknown
    sensitivity, or two models that must not be combined (``ForceModel.conflicts_with``).
    """
    ids = np.array([pm.kind for pm in prepared], dtype=np.int64)
    needs = set().union(*(pm.needs for pm in prepared)) if prepared else set()
    flags = np.zeros(N_FLAGS, dtype=np.int64)
    flags[FLAG_ROTATION] = NEED_ROTATION in needs
    flags[FLAG_SUN] = NEED_SUN in needs
    flags[FLAG_MOON] = NEED_MOON in needs
    if NEED_POLE in needs and not flags[FLAG_ROTATION]:
        if pole_table is not None:
            flags[FLAG_POLE] = 1
        elif rot_table is not None:
            flags[FLAG_ROTATION] = 1         # pole = third row of the full rotation
        else:
            users = [pm.name for pm in prepared if NEED_POLE in pm.needs]
            raise ValueError(f"force model(s) {', '.join(users)} need the Earth orientation (the pole), but "
                             "neither a pole table (propagator.rotation_table.build_pole_table) nor a rotation "
                             "table (propagator.rotation_table.build_rotation_table) was given")
    if flags[FLAG_ROTATION] and rot_table is None:
        users = [pm.name for pm in prepared if NEED_ROTATION in pm.needs]
        raise ValueError(f"force model(s) {', '.join(users)} need the Earth orientation, but no rotation "
                         "table was given (propagator.rotation_table.build_rotation_table)")
    if (flags[FLAG_SUN] or flags[FLAG_MOON]) and eph_table is None:
        users = [pm.name for pm in prepared if pm.needs & {NEED_SUN, NEED_MOON}]
        raise ValueError(f"force model(s) {', '.join(users)} need Sun/Moon positions, but no ephemeris "
                         "table was given (forcemodels.ephemeris.build_sun_moon_table)")
    poff = np.zeros(len(prepared) + 1, dtype=np.int64)
    doff = np.zeros(len(prepared) + 1, dtype=np.int64)
    for i, pm in enumerate(prepared):
        poff[i + 1] = poff[i] + pm.p.size
        doff[i + 1] = doff[i] + pm.d.size
    pbuf = np.concatenate([pm.p for pm in prepared] + [np.zeros(1)])
    dbuf = np.concatenate([pm.d for pm in prepared] + [np.zeros(1)])
    sens_model = np.zeros(len(sensitivities), dtype=np.int64)
    sens_index = np.zeros(len(sensitivities), dtype=np.int64)
    names = [pm.name for pm in prepared]
    registry.check_conflicts(names)
    for s, (mname, pname) in enumerate(sensitivities):
        if mname not in names:
            raise ValueError(f"sensitivity to {mname}.{pname}: model {mname!r} is not selected (selected: {names})")
        pm = prepared[names.index(mname)]
        if pname not in pm.estimable:
            raise ValueError(f"sensitivity to {mname}.{pname}: not an estimable parameter; "
                             f"estimable: {sorted(pm.estimable) or 'none'}")
        sens_model[s] = names.index(mname)
        sens_index[s] = pm.estimable[pname]
    empty = np.zeros(1)
    return (ids, flags, pbuf, poff, dbuf, doff,
            np.ascontiguousarray(rot_table if rot_table is not None else empty, dtype=np.float64),
            np.ascontiguousarray(eph_table if eph_table is not None else empty, dtype=np.float64),
            np.zeros(ENV_SIZE), sens_model, sens_index, np.zeros(SCRATCH_SIZE),
            np.ascontiguousarray(pole_table if pole_table is not None else empty, dtype=np.float64))
