"""Batch studies: TOML configuration, runner, HDF5 output store, exports, summaries and plots.

Modules (import them directly; this package imports nothing heavy on its own):

* :mod:`propagator.study.config` — study files: ``load_study(path) -> Study`` (validated,
  sweeps expanded into ``ResolvedCase`` objects), ``StudyConfigError``.
* :mod:`propagator.study.runner` — ``run_study(study, ...) -> RunReport`` (this process,
  local worker processes or a Dask cluster), ``execute_case`` (one case into a store).
* :mod:`propagator.study.hdf5_store` — the HDF5 output (``StudyStore``, ``read_case``).
* :mod:`propagator.study.summary`, :mod:`propagator.study.plots`, :mod:`propagator.study.oem`
  — one-line-per-case summaries, PNG figures, CCSDS OEM export.

The command line (``longarc``) is :mod:`propagator.cli`.
"""
