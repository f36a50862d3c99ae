"""Numerics on plain numpy arrays: partitions, two-point transmissibilities, static
averages and bounds, the batched banded solver, block and face problems, whole-model
pressure and transient solves, multigrid, heterogeneity and layering statistics.

Imports numpy, scipy, numba and pyamg only (and ``upscale._runtime``, ``upscale.errors``);
never xarray, netCDF4, matplotlib, dask or another room of the package.
"""
