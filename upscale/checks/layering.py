"""Layering statistics of a field of any size, read slab by slab, and the judgement of a
coarse grid's layer grouping."""

from __future__ import annotations

import numpy as np

from ..core.grid import GridArrays
from ..core.layering import combine_sums, compare_groupings, layer_statistics, layer_sums, statistics_from_sums
from ..core.partition import Partition
from ..io.schema import arrays


def field_layer_statistics(field) -> dict:
    """The per-fine-layer statistics of :func:`upscale.core.layering.layer_statistics`.

    Parameters
    ----------
    field : GridArrays or xarray.Dataset
        The cells, or a normalised field; a lazy one (``open_field(path, chunks=...)``) is
        read one slab along x (one chunk) at a time. The per-layer sums of the slabs are
        combined (Chan, Golub & LeVeque 1983 for the ln kh variance), so the result does
        not depend on the slabs.

    Returns
    -------
    dict
        Per-layer arrays (nz,), see :func:`upscale.core.layering.layer_statistics`.
    """
    if isinstance(field, GridArrays):
        return layer_statistics(field)
    slabs = field.chunks.get("x") or (field.sizes["x"],)
    starts = np.concatenate([[0], np.cumsum(slabs)])
    sums = None
    for lo, hi in zip(starts[:-1], starts[1:]):
        part = layer_sums(arrays(field.isel(x=slice(int(lo), int(hi)))))
        sums = part if sums is None else combine_sums(sums, part)
    return statistics_from_sums(sums)


def grouping_of_coarse_grid(cells: GridArrays, partition: Partition) -> dict:
    """The coarse grid's layer grouping (its z edges) judged against the optimal and the
    uniform grouping with the same number of layers (:func:`compare_groupings`)."""
    nz = len(partition.edges[2]) - 1
    return compare_groupings(cells, nz, edges=[int(e) for e in partition.edges[2]])
