"""``upscale.coarsen``: a fine field to its coarse grid, in memory or lazily in boxes."""

from __future__ import annotations

import xarray as xr

from ..core.grid import AXES
from ..core.partition import make_partition
from ..core.upscaling import block_variables, make_recipe
from ..io.coarse_grid import assemble, warn_flagged
from ..io.schema import arrays
from ..io.validation import validate


def coarsen(fine: xr.Dataset, ratio=None, edges: dict | None = None, method="flow",
            bc: str = "sealed", border: int = 0, omega: float | None = None,
            multipliers: bool = False, units: str = "metric", progress=None,
            memory: int | None = None, box: tuple[int, int, int] | None = None) -> xr.Dataset:
    """Coarsen a fine field.

    ratio: (rx, ry, rz) fine cells per coarse cell (remainders give a smaller last block);
    edges: fine-index edges per axis, e.g. ``{"z": [0, 3, 10, 20]}``; method: one of
    arithmetic, harmonic, geometric, power (with ``omega``) or flow, or one per axis
    ("arithmetic,arithmetic,harmonic" or a dict); bc, border: local boundary condition and
    border ring (fine cells) for ``flow``; multipliers: compute flow-based transmissibility
    multipliers; units: transmissibility units, metric or field.

    A lazy field (``open_field(path, chunks=...)``) gives a lazy result, computed when
    written (:func:`upscale.write`) or loaded: boxes of ``box`` whole coarse blocks per
    axis, or sized so that a process holding one stays within ``memory`` bytes
    (:mod:`upscale.parallel`). ``progress`` (in-memory fields only) receives the number
    of blocks finished by each batch of local solves.
    """
    recipe = make_recipe(method, bc, border, omega, multipliers, units)
    if is_lazy(fine):
        from .boxes import lazy_block_variables

        if "length_units_in" not in fine.attrs:  # not from open_field / validate: check it (one pass)
            fine = validate(fine)
        partition = make_partition(tuple(fine.sizes[d] for d in AXES), ratio=ratio, edges=edges)
        variables = lazy_block_variables(fine, partition, recipe, memory, box)
        return assemble(variables, fine, partition, recipe)
    fine = validate(fine)
    cells = arrays(fine)
    partition = make_partition(cells.shape, ratio=ratio, edges=edges)
    everything = tuple(slice(0, n) for n in partition.shape)
    variables = block_variables(cells, partition, everything, recipe, progress=progress)
    coarse = assemble(variables, fine, partition, recipe)
    warn_flagged(coarse)
    return coarse


def is_lazy(ds: xr.Dataset) -> bool:
    """Does the dataset hold dask (lazy) arrays?"""
    return any(v.chunks is not None for v in ds.variables.values())
