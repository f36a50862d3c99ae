"""Coarsening at any size: in memory, or in boxes of whole coarse blocks within a memory
budget, here or on a dask.distributed cluster, with the box-by-box NetCDF writer.
Imports ``upscale.core``, ``upscale.io`` and dask."""
