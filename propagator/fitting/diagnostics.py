"""Fit diagnostics: RIC residuals and their statistics, extrapolation error past the
window, and sliding-window fits along a long arc.

RIC (radial / in-track / cross-track) axes come from :func:`propagator.frames.ric_matrix`
(R = r/|r|, C = r x v / |r x v|, I = C x R) of the *reference* (given) state.  For
Earth-fixed (ITRF) fits the reference velocity is first made inertial in ITRF axes,
``v + OMEGA_e x r`` with OMEGA_e = IS-GPS-200 OMEGA_e-dot about z (the axes then follow
the orbit, not the rotating Earth; the neglected polar-motion / precession rates change
the axes by < 1e-9 rad).  Residual = fitted model - reference, metres.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
from scipy.interpolate import CubicSpline

from propagator.constants import GM_EARTH
from propagator.fitting.broadcast import (DEFAULT_WINDOW_S, OMEGA_E_DOT, BroadcastFit,
                                          fit_broadcast_from_arrays)
from propagator.fitting.errors import (FitNotConvergedError, FittingInputError,
                                       WindowOutsideArcError, check_arc)
from propagator.fitting.keplerian_fit import KeplerianFit, fit_keplerian_from_arrays
from propagator.frames import ric_matrix

__all__ = ["ResidualStats", "residual_stats", "ric_residuals", "fit_residuals",
           "extrapolation_error", "SlidingWindowTable", "sliding_window_fits"]


@dataclass
class ResidualStats:
    """RMS and maximum |.| of RIC residual components and of the 3D norm [m]."""

    n: int
    rms_r: float
    rms_i: float
    rms_c: float
    rms_3d: float
    max_r: float
    max_i: float
    max_c: float
    max_3d: float

    def to_dict(self) -> dict[str, float]:
        return {k: (int(v) if k == "n" else float(v)) for k, v in asdict(self).items()}


def residual_stats(res_ric: Any) -> ResidualStats:
    """Statistics of RIC residuals (n, 3) [m]."""
    x = np.asarray(res_ric, dtype=float).reshape(-1, 3)
    if x.shape[0] == 0:
        raise FittingInputError("no residuals to summarise")
    rms = np.sqrt(np.mean(x ** 2, axis=0))
    mx = np.max(np.abs(x), axis=0)
    norm = np.linalg.norm(x, axis=1)
    return ResidualStats(n=int(x.shape[0]), rms_r=float(rms[0]), rms_i=float(rms[1]),
                         rms_c=float(rms[2]), rms_3d=float(np.sqrt(np.mean(norm ** 2))),
                         max_r=float(mx[0]), max_i=float(mx[1]), max_c=float(mx[2]),
                         max_3d=float(np.max(norm)))


def _inertial_velocity(r: np.ndarray, v: np.ndarray, frame: str) -> np.ndarray:
    if frame == "itrf":
        wxr = np.stack([-OMEGA_E_DOT * r[:, 1], OMEGA_E_DOT * r[:, 0], np.zeros(len(r))], axis=1)
        return v + wxr
    return v


def ric_residuals(residuals: Any, r_ref: Any, v_ref: Any, frame: str = "inertial") -> np.ndarray:
    """Residual vectors (n, 3) [m] in the RIC axes of the reference states.

    ``frame='itrf'`` when ``r_ref``/``v_ref`` are Earth-fixed (see module docstring).
    """
    r = np.asarray(r_ref, dtype=float).reshape(-1, 3)
    v = _inertial_velocity(r, np.asarray(v_ref, dtype=float).reshape(-1, 3), frame)
    return np.einsum("nij,nj->ni", ric_matrix(r, v), np.asarray(residuals, dtype=float).reshape(-1, 3))


def _velocities_or_spline(times: np.ndarray, r: np.ndarray, v: np.ndarray | None) -> np.ndarray:
    if v is not None:
        return v
    return np.asarray(CubicSpline(times, r, axis=0)(times, 1))


def fit_residuals(fit: KeplerianFit | BroadcastFit, times: Any, positions: Any,
                  velocities: Any | None = None) -> tuple[np.ndarray, ResidualStats]:
    """RIC residuals of a fit against reference samples (in the fit's frame) and their stats.

    ``velocities`` only orient the RIC axes; if omitted they come from a cubic-spline
    derivative of the positions.
    """
    t, r, v = check_arc(times, positions, velocities)
    v = _velocities_or_spline(t, r, v)
    res = fit.position(t) - r
    ric = ric_residuals(res, r, v, fit.frame)
    return ric, residual_stats(ric)


def extrapolation_error(fit: KeplerianFit | BroadcastFit, times: Any, positions: Any,
                        velocities: Any | None = None, after: float = 3600.0
                        ) -> tuple[np.ndarray, ResidualStats]:
    """Error of the fitted model on the samples in ``(window_end, window_end + after]``.

    Returns (RIC errors (m, 3) [m], stats); the last row is the error at the latest such
    sample.  Raises WindowOutsideArcError if the arc has no sample after the window or
    ends before ``window_end + after``.
    """
    t, r, v = check_arc(times, positions, velocities)
    t_end = fit.window[1]
    if t[-1] < t_end + after - 1e-9 * max(1.0, abs(t_end)):
        raise WindowOutsideArcError(
            f"the arc ends at {float(t[-1])!r} s, before window end + {after!r} s = {t_end + after!r} s")
    mask = (t > t_end) & (t <= t_end + after + 1e-9 * max(1.0, abs(t_end)))
    if not np.any(mask):
        raise WindowOutsideArcError(f"no sample in ({t_end!r}, {t_end + after!r}] s")
    vv = _velocities_or_spline(t, r, v)[mask]
    res = fit.position(t[mask]) - r[mask]
    ric = ric_residuals(res, r[mask], vv, fit.frame)
    return ric, residual_stats(ric)


@dataclass
class SlidingWindowTable:
    """One row per window: start/end/reference time [s], samples, convergence, RIC stats
    of the in-window residuals [m] and (if asked) of the extrapolation error."""

    kind: str
    window_s: float
    step_s: float
    rows: list[dict[str, Any]] = field(default_factory=list)

    @property
    def rms_3d(self) -> np.ndarray:
        return np.array([row["rms_3d_m"] for row in self.rows])

    @property
    def median_rms_3d(self) -> float:
        return float(np.median(self.rms_3d))

    @property
    def worst_rms_3d(self) -> float:
        return float(np.max(self.rms_3d))

    @property
    def all_converged(self) -> bool:
        return all(row["converged"] for row in self.rows)

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "window_s": self.window_s, "step_s": self.step_s,
                "n_windows": len(self.rows), "median_rms_3d_m": self.median_rms_3d,
                "worst_rms_3d_m": self.worst_rms_3d, "all_converged": self.all_converged,
                "rows": [dict(row) for row in self.rows]}

    def format(self) -> str:
        """Readable fixed-width table."""
        head = f"{'start [h]':>10} {'end [h]':>9} {'n':>5} {'conv':>5} {'RMS R':>10} {'RMS I':>10} {'RMS C':>10} {'RMS 3D':>10} {'max 3D':>10}"
        lines = [head]
        for row in self.rows:
            lines.append(f"{row['t_start_s'] / 3600:10.3f} {row['t_end_s'] / 3600:9.3f} {row['n_samples']:5d} "
                         f"{'yes' if row['converged'] else 'NO':>5} {row['rms_r_m']:10.4g} {row['rms_i_m']:10.4g} "
                         f"{row['rms_c_m']:10.4g} {row['rms_3d_m']:10.4g} {row['max_3d_m']:10.4g}")
        return "\n".join(lines)


def sliding_window_fits(times: Any, positions: Any, velocities: Any | None = None, *,
                        kind: str = "broadcast", window_s: float = DEFAULT_WINDOW_S,
                        step_s: float | None = None, extrapolate_s: float | None = None,
                        gm: float = GM_EARTH, **fit_kwargs: Any) -> SlidingWindowTable:
    """Fit every ``step_s`` (default ``window_s``) a window of ``window_s`` along the arc.

    Args:
        times, positions, velocities: the arc; Earth-fixed for ``kind='broadcast'``,
            inertial for ``kind='keplerian'`` (two-body fit with ``gm``).
        window_s, step_s: window length and start-to-start spacing [s].
        extrapolate_s: if given, also the error over that long past each window (windows
            whose extrapolation would leave the arc get NaN there).
        fit_kwargs: passed to the fit function.  Non-converged windows are kept in the
            table with ``converged = False`` (no warning per window).

    Returns:
        :class:`SlidingWindowTable`.
    """
    if kind not in ("broadcast", "keplerian"):
        raise ValueError(f"kind must be 'broadcast' or 'keplerian', got {kind!r}")
    t, r, v = check_arc(times, positions, velocities)
    if not window_s > 0.0:
        raise WindowOutsideArcError(f"window_s must be positive, got {window_s!r}")
    step = float(window_s if step_s is None else step_s)
    if not step > 0.0:
        raise WindowOutsideArcError(f"step_s must be positive, got {step!r}")
    if t[-1] - t[0] < window_s * (1.0 - 1e-12):
        raise WindowOutsideArcError(
            f"arc of {float(t[-1] - t[0])!r} s is shorter than the {window_s!r} s window")
    vv = _velocities_or_spline(t, r, v)
    table = SlidingWindowTable(kind=kind, window_s=float(window_s), step_s=step)
    n_win = int(np.floor((t[-1] - t[0] - window_s) / step + 1e-9)) + 1
    for j in range(n_win):
        w = (float(t[0] + j * step), float(t[0] + j * step + window_s))
        try:
            if kind == "broadcast":
                fit = fit_broadcast_from_arrays(t, r, vv, window=w, on_failure="raise", **fit_kwargs)
            else:
                fit = fit_keplerian_from_arrays(t, r, vv, window=w, gm=gm, on_failure="raise",
                                                **fit_kwargs)
        except FitNotConvergedError as exc:
            fit = exc.result
        mask = (t >= w[0]) & (t <= w[1])
        _, st = fit_residuals(fit, t[mask], r[mask], vv[mask])
        row: dict[str, Any] = {"t_start_s": w[0], "t_end_s": w[1],
                               "t_ref_s": float(fit.toe if kind == "broadcast" else fit.t_ref),
                               "n_samples": int(mask.sum()), "converged": bool(fit.converged)}
        row.update({f"{k}_m": val for k, val in st.to_dict().items() if k != "n"})
        if extrapolate_s is not None:
            try:
                _, ex = extrapolation_error(fit, t, r, vv, after=extrapolate_s)
                row["extrap_rms_3d_m"] = ex.rms_3d
                row["extrap_max_3d_m"] = ex.max_3d
            except WindowOutsideArcError:
                row["extrap_rms_3d_m"] = float("nan")
                row["extrap_max_3d_m"] = float("nan")
        table.rows.append(row)
    return table
