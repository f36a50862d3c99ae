"""Files: open and validate fine fields, write them atomically, build and read coarse
grid files (their fine-index ranges, faces and units). Imports ``upscale.core``, xarray,
netCDF4 (and dask for lazily read fields)."""
