"""``upscale.two_phase``: relative permeability and capillary pressure per coarse block in
a steady-state limit, in memory or in boxes of whole blocks."""

from __future__ import annotations

import os

import numpy as np
import xarray as xr

from ..core.block_problems import BOUNDARY_CONDITIONS
from ..core.grid import AXES
from ..core.partition import make_partition
from ..core.two_phase import LIMITS, POINT_VARIABLES, TwoPhaseRecipe, region_curves
from ..core.upscaling import block_variable_names, make_recipe
from ..errors import InputError
from ..io.coarse_grid import assemble
from ..io.curve_file import curve_dataset
from ..io.pinch_outs import with_pinch_outs
from ..io.rock_table import RockTable, code_variable, facies_rocks, read_rock_table
from ..io.schema import arrays
from ..io.validation import is_lazy, validate
from .boxes import lazy_block_variables

#: most saturation points per curve
MOST_POINTS = 200


def two_phase(fine: xr.Dataset, rocks: str | os.PathLike | RockTable, ratio=None, edges: dict | None = None,
              limit: str = "capillary", bc: str = "sealed", border: int = 0, points: int = 20,
              regions: str | None = None, progress=None, memory: int | None = None,
              box: tuple[int, int, int] | None = None) -> xr.Dataset:
    """``upscale.two_phase``: upscaled relative permeability and capillary pressure curves.

    Parameters
    ----------
    fine : xarray.Dataset
        A field in the schema (``open_field``) with an integer ``facies`` variable; a lazy
        one is worked in boxes of whole coarse blocks.
    rocks : str, os.PathLike or RockTable
        The rock table (TOML, :mod:`upscale.io.rock_table`).
    ratio, edges
        The coarse blocks, as for ``coarsen``.
    limit : str
        ``capillary`` (capillary equilibrium in each block: low rates, small blocks) or
        ``viscous`` (every cell at one fractional flow: high rates).
    bc : str
        Boundary condition of the local problems: sealed, periodic or linear.
    border : int
        Fine cells of border ring around each block.
    points : int
        Saturation points per curve, 2..200.
    regions : str, optional
        An integer fine variable (e.g. ``facies``): also one curve set per region of blocks
        sharing the code that holds most of their pore volume, pore-volume weighted.
    progress : callable, optional
        In-memory fields: receives the number of blocks finished by each batch of solves.
    memory : int, optional
        Lazy fields: bytes a process holding one box may use.
    box : tuple of int, optional
        Lazy fields: coarse blocks per box along x, y, z instead.

    Returns
    -------
    xarray.Dataset
        In memory: the coarse grid of the single-phase flow-based upscaling (a valid field)
        with, per block, ``sw``, ``pc`` (bar), ``krw_x`` ... ``kro_z`` on (x, y, z,
        saturation_point), the end points ``swc``, ``sor``, and with regions the region
        curves (:func:`upscale.io.curve_file.curve_dataset`).
    """
    check_options(limit, bc, points)
    table = rocks if isinstance(rocks, RockTable) else read_rock_table(rocks)
    lazy = is_lazy(fine)
    if not lazy or "length_units_in" not in fine.attrs:
        fine = validate(fine)
    fine = with_pinch_outs(fine)  # the defaults of coarsen: connections across pinched cells, recorded
    codes, rock_of_code = facies_rocks(fine, table)
    if regions is not None:
        code_variable(fine, regions)
    recipe = TwoPhaseRecipe(make_recipe("flow", bc, border), table.curves, table.fluids, limit, int(points), codes,
                            rock_of_code, regions)
    partition = make_partition(tuple(fine.sizes[d] for d in AXES), ratio=ratio, edges=edges)
    if lazy:
        variables = _computed(lazy_block_variables(fine, partition, recipe, memory, box))
    else:
        extra = {name: np.asarray(fine[name].values) for name in recipe.fine_variables}
        variables = recipe.compute(arrays(fine), partition, tuple(slice(0, n) for n in partition.shape),
                                   progress=progress, extra=extra)
    single = {name: variables[name] for name in block_variable_names(recipe.single)}
    coarse = assemble(single, fine, partition, recipe.single)
    curves = None
    if regions is not None:
        curves = region_curves(variables["block_region"], variables["pore_volume"],
                               {name: variables[name] for name in POINT_VARIABLES})
    return curve_dataset(coarse, variables, recipe, table, curves)


def check_options(limit: str, bc: str, points) -> None:
    """Refuse an unknown limit or boundary condition and a bad number of points."""
    if limit not in LIMITS:
        raise InputError(f"unknown limit '{limit}'; choose capillary (low rates, small blocks) or viscous "
                         f"(high rates)")
    if bc not in BOUNDARY_CONDITIONS:
        raise InputError(f"boundary condition '{bc}' is not available for two-phase upscaling; choose "
                         f"{', '.join(BOUNDARY_CONDITIONS)}")
    if isinstance(points, bool) or int(points) != points or not 2 <= points <= MOST_POINTS:
        raise InputError(f"points must be a whole number from 2 to {MOST_POINTS} (saturation points per curve), "
                         f"got {points}")


def _computed(lazy: dict) -> dict[str, np.ndarray]:
    """The box variables computed (the box tasks run one at a time here, or on the active
    dask.distributed client): the coarse results are small."""
    import dask

    names = list(lazy)
    return dict(zip(names, dask.compute(*(lazy[n] for n in names), scheduler="threads")))
