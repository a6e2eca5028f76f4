"""PNG plots of fit residuals (matplotlib, Agg canvas; no pyplot global state)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["plot_residuals_ric", "plot_sliding_windows"]


def plot_residuals_ric(times: Any, res_ric: Any, path: str | Path, *, title: str = "",
                       window: tuple[float, float] | None = None, unit: str = "cm") -> Path:
    """Radial / in-track / cross-track residuals against time [h]; writes a PNG.

    ``res_ric`` (n, 3) in metres; ``unit`` 'm', 'cm' or 'mm'; ``window`` shades the fit
    window when the samples extend past it.
    """
    factor = {"m": 1.0, "cm": 100.0, "mm": 1000.0}[unit]
    t = np.asarray(times, dtype=float) / 3600.0
    x = np.asarray(res_ric, dtype=float).reshape(-1, 3) * factor
    fig = Figure(figsize=(8, 6))
    FigureCanvasAgg(fig)
    axes = fig.subplots(4, 1, sharex=True)
    labels = ("radial", "in-track", "cross-track")
    for k in range(3):
        axes[k].plot(t, x[:, k], lw=1.0)
        axes[k].set_ylabel(f"{labels[k]} [{unit}]")
    axes[3].plot(t, np.linalg.norm(x, axis=1), lw=1.0, color="k")
    axes[3].set_ylabel(f"3D [{unit}]")
    axes[3].set_xlabel("time [h]")
    if window is not None:
        for ax in axes:
            ax.axvspan(window[0] / 3600.0, window[1] / 3600.0, color="0.9", zorder=0)
    for ax in axes:
        ax.grid(True, lw=0.3)
    if title:
        fig.suptitle(title)
    fig.tight_layout()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    return path


def plot_sliding_windows(table: Any, path: str | Path, *, title: str = "") -> Path:
    """3D RMS (and extrapolation RMS, if present) of each window against its start [h]."""
    rows = table.rows
    start = np.array([row["t_start_s"] for row in rows]) / 3600.0
    fig = Figure(figsize=(8, 4))
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    ax.semilogy(start, [row["rms_3d_m"] for row in rows], "o-", ms=3, label="fit RMS 3D")
    if rows and "extrap_rms_3d_m" in rows[0]:
        ax.semilogy(start, [row["extrap_rms_3d_m"] for row in rows], "s--", ms=3,
                    label="extrapolation RMS 3D")
    ax.set_xlabel("window start [h]")
    ax.set_ylabel("[m]")
    ax.grid(True, which="both", lw=0.3)
    ax.legend()
    if title:
        ax.set_title(title)
    fig.tight_layout()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    return path
