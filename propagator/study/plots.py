"""PNG plots of stored study cases (matplotlib, non-interactive Agg backend).

Every function has the form ``plot_<what>(path, case, out_png, ...) -> Path``: it reads
the case from the study file ``path``, draws one figure and writes ``out_png``.  Long
arcs are thinned to at most ``max_points`` samples by reading every k-th row (a stride
read of the HDF5 dataset, never the whole arc), which is plenty for a figure but may
hide features shorter than the stride (e.g. an eclipse entry in an acceleration plot);
pass a larger ``max_points`` to see them.

Time axes are days since the case epoch (TT); positions in km, angles in degrees,
accelerations in m/s^2, residuals in m.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from propagator.constants import GM_EARTH, SECONDS_PER_DAY  # noqa: E402
from propagator.study.hdf5_store import CASES_GROUP, open_for_reading  # noqa: E402

__all__ = [
    "plot_elements",
    "plot_ric_difference",
    "plot_ground_track",
    "plot_accelerations",
    "plot_fit_residuals",
    "ric_difference",
]

DEFAULT_MAX_POINTS = 20000


# --------------------------------------------------------------------------------------
# Reading helpers
# --------------------------------------------------------------------------------------
def _text(v: Any) -> str:
    return v.decode("utf-8") if isinstance(v, bytes) else str(v)


def _stride(n: int, max_points: int) -> int:
    return max(1, -(-n // max(1, int(max_points))))


def _read(path: str | os.PathLike, case: str, names: tuple[str, ...], max_points: int
          ) -> tuple[dict[str, np.ndarray | None], dict[str, Any]]:
    """Strided read of ``names`` (missing datasets -> None) and the case attributes."""
    with open_for_reading(path) as f:
        cases = f.get(CASES_GROUP)
        if cases is None or case not in cases:
            raise KeyError(f"{path}: no case {case!r}")
        g = cases[case]
        attrs = {k: (_text(v) if isinstance(v, bytes) else v) for k, v in g.attrs.items()}
        if "time_s" not in g or g["time_s"].shape[0] == 0:
            raise ValueError(f"case {case!r} holds no samples to plot")
        k = _stride(g["time_s"].shape[0], max_points)
        out: dict[str, np.ndarray | None] = {}
        for name in names:
            out[name] = g[name][::k] if name in g else None
    return out, attrs


def _title(attrs: dict[str, Any], case: str, what: str) -> str:
    epoch = _text(attrs.get("epoch_iso", ""))
    return f"{what} — case {case}" + (f"\nepoch {epoch}" if epoch else "")


def _days_label() -> str:
    return "time since case epoch [d] (TT)"


def _save(fig: Any, out_png: str | os.PathLike) -> Path:
    out = Path(out_png)
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, dpi=110)
    plt.close(fig)
    return out


# --------------------------------------------------------------------------------------
# Element histories
# --------------------------------------------------------------------------------------
def plot_elements(path: str | os.PathLike, case: str, out_png: str | os.PathLike, *,
                  max_points: int = DEFAULT_MAX_POINTS, gm: float = GM_EARTH) -> Path:
    """Osculating Keplerian elements of ``case`` over time (six panels).

    Uses the stored ``elements_osculating``; if the study did not store them they are
    computed from ``state_gcrf`` with `propagator.elements.cart_to_kep` (Vallado 2013,
    Algorithm 9) and ``gm`` [m^3/s^2].
    """
    data, attrs = _read(path, case, ("time_s", "elements_osculating", "state_gcrf"), max_points)
    el = data["elements_osculating"]
    source = "stored"
    if el is None:
        from propagator.elements import cart_to_kep

        el = cart_to_kep(data["state_gcrf"], gm=gm)
        source = "computed from state_gcrf"
    days = data["time_s"] / SECONDS_PER_DAY
    deg = np.degrees
    # column order of elements_osculating: a, e, i, RAAN, argp, true anomaly (hdf5_store.ELEMENT_COLUMNS)
    panels = [
        ("semi-major axis [km]", el[:, 0] / 1e3, "-"),
        ("eccentricity [-]", el[:, 1], "-"),
        ("inclination [deg]", deg(el[:, 2]), "-"),
        ("RAAN, unwrapped [deg]", deg(np.unwrap(el[:, 3])), "-"),  # continuous through 0/360 deg
        ("argument of perigee [deg]", deg(el[:, 4]), "."),
        ("true anomaly [deg]", deg(el[:, 5]), "."),
    ]
    fig, axes = plt.subplots(3, 2, figsize=(11, 8.5), sharex=True)
    for ax, (label, y, style) in zip(axes.ravel(order="F"), panels):
        if style == ".":
            ax.plot(days, y, ".", ms=1.5, color="tab:blue")
        else:
            ax.plot(days, y, "-", lw=1.0, color="tab:blue")
        ax.set_ylabel(label)
        ax.grid(True, alpha=0.3)
        if label.startswith("semi"):
            ax.ticklabel_format(axis="y", useOffset=False, style="plain")
    for ax in axes[-1, :]:
        ax.set_xlabel(_days_label())
    fig.suptitle(_title(attrs, case, f"Osculating elements ({source}, GCRF)"))
    fig.tight_layout()
    return _save(fig, out_png)


# --------------------------------------------------------------------------------------
# RIC differences between two cases
# --------------------------------------------------------------------------------------
def _hermite_positions(t_src: np.ndarray, states: np.ndarray, t_new: np.ndarray) -> np.ndarray:
    """Positions at ``t_new`` by piecewise cubic Hermite interpolation of positions with
    their velocities as derivatives (``scipy.interpolate.CubicHermiteSpline``)."""
    from scipy.interpolate import CubicHermiteSpline

    order = np.argsort(t_src, kind="stable")
    t_s = t_src[order]
    st = states[order]
    keep = np.concatenate([[True], np.diff(t_s) > 0])  # duplicate times (segment joins)
    spline = CubicHermiteSpline(t_s[keep], st[keep, :3], st[keep, 3:], axis=0, extrapolate=False)
    return spline(t_new)


def ric_difference(path: str | os.PathLike, case: str, other_case: str, *, other_path: str | os.PathLike | None = None,
                   max_points: int = DEFAULT_MAX_POINTS) -> tuple[np.ndarray, np.ndarray]:
    """Position of ``other_case`` minus position of ``case`` in the RIC frame of ``case``.

    Returns ``(time_s, d_ric)`` with ``d_ric`` (n, 3) [m] (radial, in-track, cross-track
    axes from `propagator.frames.ric_matrix`).  On the same time grid the samples are
    differenced directly; otherwise ``other_case`` is interpolated onto the (thinned)
    times of ``case`` by cubic Hermite interpolation of its positions and velocities,
    and times outside its span are dropped.
    """
    from propagator.frames import to_ric

    other_path = path if other_path is None else other_path
    ref, _ = _read(path, case, ("time_s", "state_gcrf"), max_points)
    with open_for_reading(path) as f:
        t_ref_full = f[CASES_GROUP][case]["time_s"][()]
    with open_for_reading(other_path) as f:
        cases = f.get(CASES_GROUP)
        if cases is None or other_case not in cases:
            raise KeyError(f"{other_path}: no case {other_case!r}")
        g = cases[other_case]
        t_oth_full = g["time_s"][()]
        same_grid = t_oth_full.shape == t_ref_full.shape and np.array_equal(t_oth_full, t_ref_full)
        if same_grid:
            oth_states = g["state_gcrf"][::_stride(t_ref_full.shape[0], max_points)]
        else:
            oth_states = g["state_gcrf"][()]
    t = ref["time_s"]
    st = ref["state_gcrf"]
    if same_grid:
        r_oth = oth_states[:, :3]
    else:
        r_oth = _hermite_positions(t_oth_full, oth_states, t)
        ok = np.all(np.isfinite(r_oth), axis=1)
        if not ok.any():
            raise ValueError(f"cases {case!r} and {other_case!r} do not overlap in time")
        t, st, r_oth = t[ok], st[ok], r_oth[ok]
    d_ric = to_ric(r_oth - st[:, :3], st[:, :3], st[:, 3:])
    return t, d_ric


def plot_ric_difference(path: str | os.PathLike, case: str, out_png: str | os.PathLike, *, other_case: str,
                        other_path: str | os.PathLike | None = None, max_points: int = DEFAULT_MAX_POINTS) -> Path:
    """Radial / in-track / cross-track difference [m] of ``other_case`` relative to ``case``
    (see :func:`ric_difference`), three panels over time."""
    t, d = ric_difference(path, case, other_case, other_path=other_path, max_points=max_points)
    _, attrs = _read(path, case, ("time_s",), 2)
    days = t / SECONDS_PER_DAY
    fig, axes = plt.subplots(3, 1, figsize=(10, 7.5), sharex=True)
    for ax, k, label in zip(axes, range(3), ("radial", "in-track", "cross-track")):
        rms = float(np.sqrt(np.mean(d[:, k] ** 2)))
        ax.plot(days, d[:, k], lw=1.0, color=("tab:red", "tab:green", "tab:blue")[k],
                label=f"RMS {rms:.4g} m, max |.| {float(np.max(np.abs(d[:, k]))):.4g} m")
        ax.set_ylabel(f"{label} [m]")
        ax.ticklabel_format(axis="y", useOffset=False)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="upper left", fontsize=8)
    axes[-1].set_xlabel(_days_label())
    other = other_case if other_path is None else f"{other_case} ({Path(other_path).name})"
    fig.suptitle(_title(attrs, case, f"Position of {other} minus {case}, RIC frame of {case}"))
    fig.tight_layout()
    return _save(fig, out_png)


# --------------------------------------------------------------------------------------
# Ground track
# --------------------------------------------------------------------------------------
def _itrf_positions(data: dict[str, np.ndarray | None], attrs: dict[str, Any], eop_policy: str) -> np.ndarray:
    if data["state_itrf"] is not None:
        return data["state_itrf"][:, :3]
    from propagator.frames import gcrf_to_itrf_matrices
    from propagator.timescales import Epoch

    epoch = Epoch.from_jd(float(attrs["epoch_jd1"]), float(attrs["epoch_jd2"]), _text(attrs["epoch_scale"])).to("TT")
    t = data["time_s"]
    days = np.floor(t / SECONDS_PER_DAY)
    frac = (t - days * SECONDS_PER_DAY) / SECONDS_PER_DAY
    rot, _ = gcrf_to_itrf_matrices(epoch.jd1 + days, epoch.jd2 + frac, eop_policy=eop_policy)
    return np.einsum("nij,nj->ni", rot, data["state_gcrf"][:, :3])


def plot_ground_track(path: str | os.PathLike, case: str, out_png: str | os.PathLike, *,
                      max_points: int = DEFAULT_MAX_POINTS, eop_policy: str = "hold") -> Path:
    """Sub-satellite points (WGS84 geodetic latitude, longitude) on a plain lat/lon grid.

    Uses ``state_itrf`` if stored, else rotates ``state_gcrf`` with
    `propagator.frames.gcrf_to_itrf_matrices` (IERS Conventions 2010 ch. 5; EOP outside
    the table follow ``eop_policy``, default "hold": a plot does not need them).
    Geodetic coordinates from `propagator.frames.itrf_to_geodetic`.
    """
    from propagator.frames import itrf_to_geodetic

    data, attrs = _read(path, case, ("time_s", "state_gcrf", "state_itrf"), max_points)
    r = _itrf_positions(data, attrs, eop_policy)
    lat, lon, _h = itrf_to_geodetic(r)
    lat, lon = np.degrees(np.atleast_1d(lat)), np.degrees(np.atleast_1d(lon))
    # break the line where the track wraps around +-180 deg
    jump = np.abs(np.diff(lon)) > 180.0
    lon_p = np.insert(lon, np.nonzero(jump)[0] + 1, np.nan)
    lat_p = np.insert(lat, np.nonzero(jump)[0] + 1, np.nan)
    fig, ax = plt.subplots(figsize=(11, 6))
    ax.plot(lon_p, lat_p, lw=0.8, color="tab:blue")
    ax.plot(lon[:1], lat[:1], "o", color="tab:green", label="start")
    ax.plot(lon[-1:], lat[-1:], "s", color="tab:red", label="end")
    ax.set_xlim(-180, 180)
    ax.set_ylim(-90, 90)
    ax.set_xticks(np.arange(-180, 181, 30))
    ax.set_yticks(np.arange(-90, 91, 30))
    ax.set_aspect("equal")
    ax.grid(True, alpha=0.4)
    ax.set_xlabel("longitude [deg] (east positive)")
    ax.set_ylabel("geodetic latitude [deg] (WGS84)")
    ax.legend(loc="lower left", fontsize=8)
    span = (data["time_s"][-1] - data["time_s"][0]) / SECONDS_PER_DAY
    src = "state_itrf" if data["state_itrf"] is not None else "state_gcrf rotated to ITRF"
    ax.set_title(_title(attrs, case, f"Ground track over {span:.3g} d ({src})"))
    fig.tight_layout()
    return _save(fig, out_png)


# --------------------------------------------------------------------------------------
# Per-model accelerations
# --------------------------------------------------------------------------------------
def plot_accelerations(path: str | os.PathLike, case: str, out_png: str | os.PathLike, *,
                       max_points: int = DEFAULT_MAX_POINTS) -> Path:
    """Magnitude [m/s^2] of each stored per-model acceleration over time, log scale."""
    with open_for_reading(path) as f:
        cases = f.get(CASES_GROUP)
        if cases is None or case not in cases:
            raise KeyError(f"{path}: no case {case!r}")
        g = cases[case]
        if "acceleration" not in g or not len(g["acceleration"]):
            raise ValueError(f"case {case!r} stored no per-model accelerations")
        models = sorted(g["acceleration"].keys())
    data, attrs = _read(path, case, ("time_s", *(f"acceleration/{m}" for m in models)), max_points)
    days = data["time_s"] / SECONDS_PER_DAY
    fig, ax = plt.subplots(figsize=(10, 6))
    for m in models:
        mag = np.linalg.norm(data[f"acceleration/{m}"], axis=1)
        ax.semilogy(days, np.where(mag > 0, mag, np.nan), lw=1.0, label=m)
    ax.set_xlabel(_days_label())
    ax.set_ylabel("acceleration magnitude [m/s$^2$]")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(loc="best", fontsize=8)
    ax.set_title(_title(attrs, case, "Acceleration by force model (GCRF)"))
    fig.tight_layout()
    return _save(fig, out_png)


# --------------------------------------------------------------------------------------
# Fit residuals
# --------------------------------------------------------------------------------------
def plot_fit_residuals(path: str | os.PathLike, case: str, out_png: str | os.PathLike, *,
                       fit_name: str | None = None, max_points: int = DEFAULT_MAX_POINTS) -> Path:
    """Radial / in-track / cross-track residuals [m] of a stored element fit.

    ``fit_name`` may be omitted when the case holds exactly one fit with residuals.
    """
    with open_for_reading(path) as f:
        cases = f.get(CASES_GROUP)
        if cases is None or case not in cases:
            raise KeyError(f"{path}: no case {case!r}")
        g = cases[case]
        fits = [k for k, v in g["fits"].items() if "residual_ric" in v] if "fits" in g else []
        if fit_name is None:
            if len(fits) != 1:
                raise ValueError(f"case {case!r} has fits with residuals {fits}; pass fit_name=")
            fit_name = fits[0]
        if fit_name not in fits:
            raise KeyError(f"case {case!r} has no fit {fit_name!r} with residuals (has {fits})")
        fg = g["fits"][fit_name]
        k = _stride(fg["residual_time_s"].shape[0], max_points)
        t = fg["residual_time_s"][::k]
        ric = fg["residual_ric"][::k]
        full = fg["residual_ric"][()]  # RMS over all residuals, not the thinned ones
        attrs = {kk: (_text(v) if isinstance(v, bytes) else v) for kk, v in g.attrs.items()}
    rms = np.sqrt(np.mean(full**2, axis=0))
    rms3 = float(np.sqrt(np.mean(np.sum(full**2, axis=1))))
    days = t / SECONDS_PER_DAY
    fig, axes = plt.subplots(3, 1, figsize=(10, 7.5), sharex=True)
    for ax, j, label in zip(axes, range(3), ("radial", "in-track", "cross-track")):
        ax.plot(days, ric[:, j], lw=1.0, color=("tab:red", "tab:green", "tab:blue")[j],
                label=f"RMS {rms[j]:.4g} m")
        ax.set_ylabel(f"{label} [m]")
        ax.ticklabel_format(axis="y", useOffset=False)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="upper left", fontsize=8)
    axes[-1].set_xlabel(_days_label())
    fig.suptitle(_title(attrs, case, f"Residuals of fit '{fit_name}' (fit minus trajectory), 3-D RMS {rms3:.4g} m"))
    fig.tight_layout()
    return _save(fig, out_png)
