"""Element fitting: osculating and mean elements, two-body Keplerian fits,
broadcast-style (IS-GPS-200 Table 20-IV) sets, and fit diagnostics.

Public entry points (Python API over time-tagged positions):

* :func:`osculating_history` - Keplerian + equinoctial elements along an arc.
* :func:`fit_keplerian_from_arrays` - two-body elements at a reference time.
* :func:`fit_broadcast_from_arrays` / :func:`fit_broadcast_from_gcrf` - broadcast-style set
  fitted to Earth-fixed positions; :func:`broadcast_position` evaluates a set.
* :func:`mean_elements`, :func:`j2_secular_rates` - averaged elements, secular J2 theory.
* :func:`fit_residuals`, :func:`extrapolation_error`, :func:`sliding_window_fits` - diagnostics.
* :func:`plot_residuals_ric`, :func:`plot_sliding_windows` - PNG figures.

Every result object has ``.to_dict()``.  Bad input raises a
:class:`FittingInputError` (a ``ValueError``) subclass; a fit that does not converge
sets ``converged = False`` and warns (:class:`FitNotConvergedWarning`) or, with
``on_failure='raise'``, raises :class:`FitNotConvergedError` carrying the best result.
"""

from propagator.fitting.broadcast import (BroadcastElements, BroadcastFit, broadcast_position,
                                          fit_broadcast_from_arrays, fit_broadcast_from_gcrf,
                                          gcrf_arc_to_itrf)
from propagator.fitting.diagnostics import (ResidualStats, SlidingWindowTable, extrapolation_error,
                                            fit_residuals, residual_stats, ric_residuals,
                                            sliding_window_fits)
from propagator.fitting.errors import (DegenerateOrbitError, FitNotConvergedError,
                                       FitNotConvergedWarning, FittingInputError,
                                       NonFiniteInputError, NonMonotonicTimesError,
                                       NotEnoughSamplesError, OutOfScopeError,
                                       WindowOutsideArcError)
from propagator.fitting.keplerian_fit import KeplerianFit, fit_keplerian_from_arrays
from propagator.fitting.mean_elements import MeanElements, j2_secular_rates, mean_elements
from propagator.fitting.osculating import OsculatingHistory, osculating_history
from propagator.fitting.plots import plot_residuals_ric, plot_sliding_windows

__all__ = [
    "BroadcastElements", "BroadcastFit", "broadcast_position", "fit_broadcast_from_arrays",
    "fit_broadcast_from_gcrf", "gcrf_arc_to_itrf",
    "ResidualStats", "SlidingWindowTable", "extrapolation_error", "fit_residuals",
    "residual_stats", "ric_residuals", "sliding_window_fits",
    "DegenerateOrbitError", "FitNotConvergedError", "FitNotConvergedWarning", "FittingInputError",
    "NonFiniteInputError", "NonMonotonicTimesError", "NotEnoughSamplesError", "OutOfScopeError",
    "WindowOutsideArcError",
    "KeplerianFit", "fit_keplerian_from_arrays",
    "MeanElements", "j2_secular_rates", "mean_elements",
    "OsculatingHistory", "osculating_history",
    "plot_residuals_ric", "plot_sliding_windows",
]
