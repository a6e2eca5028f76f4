"""Batch studies: TOML configuration, runner, HDF5 output store, exports, summaries and plots."""
