"""The diagonal-flow check: fine against coarse on flows the upscaling never saw
(:mod:`upscale.core.patch_flows`), each beside its floor.

A coarse two-point grid resolves the pressure near the edges of a patch worse than the
fine one, whatever its permeabilities: that part of the error no upscaling removes. The
floor measures it: the same flow on a homogeneous field of the same grids (the fine
field's cell sizes and active cells, each axis at the field's geometric-mean flow
permeability), where upscaling is exact, fine against coarse. A method's own error is
how far it sits from its floor.
"""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from .._runtime import forked_map
from ..core.grid import GridArrays
from ..core.partition import Partition
from ..core.patch_flows import PATCH_FLOWS, PatchFlow, patch_masks
from ..core.pressure import DIRECT_LIMIT, boundary_half, whole_model_permeability
from ..core.static import block_length
from ..core.two_point import transmissibilities
from ..io.coarse_file import coarse_partition, coarse_two_point
from ..io.schema import arrays
from ..io.validation import validate
from .steady import axis_processes, one_blas_thread


def patch_rate(face_t, half: np.ndarray, masks, flow: PatchFlow, dx, dy, dz, tolerance: float,
               direct_limit: int = DIRECT_LIMIT) -> float:
    """Rate (mD*m per unit pressure drop) of a diagonal flow through a two-point grid.

    Parameters
    ----------
    face_t : list of ndarray
        Interior-face transmissibilities per axis, mD*m.
    half : ndarray
        Half-cell transmissibilities along the flow axis (nx, ny, nz), mD*m.
    masks : (low, high)
        The patches on the two faces (:func:`upscale.core.patch_flows.patch_masks`).
    flow : PatchFlow
        The flow.
    dx, dy, dz : ndarray
        Cell sizes, m.
    tolerance : float
        Relative residual of the solve.
    """
    low, high = boundary_half(half, flow.axis)
    result = whole_model_permeability(face_t, (low * masks[0], high * masks[1]), dx, dy, dz, flow.axis,
                                      tolerance=tolerance, direct_limit=direct_limit)
    return result["rate"]


def _homogeneous_models(cells: GridArrays, partition: Partition):
    """Fine and coarse (cells, faces, halves) of the floor: the fine grid's sizes and active
    cells, each axis at the geometric mean of the field's positive flow permeability."""
    k_fine = cells.flow_permeability()
    means = []
    for k in k_fine:
        positive = cells.active & (k > 0)
        means.append(float(np.exp(np.log(k[positive]).mean())) if positive.any() else 0.0)
    fine_k = tuple(np.where(cells.active, m, 0.0) for m in means)
    fine_half, fine_faces = transmissibilities(fine_k, cells.dx, cells.dy, cells.dz, cells.pinch_connections)
    dx = np.add.reduceat(cells.dx, partition.edges[0][:-1])
    dy = np.add.reduceat(cells.dy, partition.edges[1][:-1])
    dz = block_length(partition, cells.dx, cells.dy, cells.dz, 2)
    active = partition.block_sum(cells.active) > 0
    coarse_k = tuple(np.where(active, m, 0.0) for m in means)
    coarse_half, faces = transmissibilities(coarse_k, dx, dy, dz, cells.pinch_connections)
    return (cells, fine_faces, fine_half), ((dx, dy, dz), faces, coarse_half)


def _relative(a: float, b: float) -> float | None:
    value = (a - b) / b if b != 0 else math.nan
    return value if math.isfinite(value) else None


def fine_two_point(cells: GridArrays, partition: Partition, homogeneous: bool = False) -> tuple[list, np.ndarray]:
    """(interior-face transmissibilities per axis, half-cell transmissibilities (3, nx, ny, nz)),
    mD*m, of the fine field or, ``homogeneous``, of the floor's homogeneous field of the same grid."""
    if homogeneous:
        (_, faces, half), _ = _homogeneous_models(cells, partition)
        return faces, half
    half, faces = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz, cells.pinch_connections)
    return faces, half


def fine_patch_rate(cells: GridArrays, partition: Partition, flow: PatchFlow, model, tolerance: float = 1e-10,
                    direct_limit: int = DIRECT_LIMIT) -> float:
    """Rate of one diagonal flow through the fine ``model`` (:func:`fine_two_point`), mD*m per unit drop."""
    faces, half = model
    return patch_rate(faces, half[flow.axis], patch_masks(partition, flow)[0], flow, cells.dx, cells.dy, cells.dz,
                      tolerance, direct_limit)


def fine_patch_rates(cells: GridArrays, partition: Partition, tolerance: float = 1e-10,
                     direct_limit: int = DIRECT_LIMIT, homogeneous: bool = False) -> dict[str, float]:
    """:func:`fine_patch_rate` of every diagonal flow through the field (or, ``homogeneous``,
    the floor's homogeneous field), by name. A model too large for the direct solver runs
    its flows on forked worker processes, like the steady check."""
    model = fine_two_point(cells, partition, homogeneous)
    processes = axis_processes(math.prod(cells.shape), direct_limit)
    rates = forked_map(_fine_flow, (cells, partition, model, tolerance, direct_limit), list(PATCH_FLOWS), processes)
    return {flow.name: rate for flow, rate in zip(PATCH_FLOWS, rates)}


def _fine_flow(shared, flow: PatchFlow) -> float:
    """One diagonal flow through the fine grid (in a forked worker, on the data it inherited)."""
    cells, partition, model, tolerance, direct_limit = shared
    with one_blas_thread():
        return fine_patch_rate(cells, partition, flow, model, tolerance, direct_limit)


def coarse_patch_rates(coarse: xr.Dataset, partition: Partition, tolerance: float = 1e-10) -> dict[str, float]:
    """Rate of every diagonal flow through a (validated) coarse grid, mD*m per unit drop:
    its face transmissibilities times multipliers, boundary halves from its k."""
    cells, faces, halves = coarse_two_point(coarse)
    return {flow.name: patch_rate(faces, halves[flow.axis], patch_masks(partition, flow)[1], flow, cells.dx,
                                  cells.dy, cells.dz, tolerance) for flow in PATCH_FLOWS}


def floors(cells: GridArrays, partition: Partition, tolerance: float = 1e-10,
           direct_limit: int = DIRECT_LIMIT, fine_rates: dict | None = None) -> dict[str, float | None]:
    """The floor of every diagonal flow: its relative error coarse against fine on the
    homogeneous field of the same grids (the fine rates given, or solved here)."""
    fine = fine_rates or fine_patch_rates(cells, partition, tolerance, direct_limit, homogeneous=True)
    _, ((dx, dy, dz), faces, half) = _homogeneous_models(cells, partition)
    return {flow.name: _relative(patch_rate(faces, half[flow.axis], patch_masks(partition, flow)[1], flow, dx, dy,
                                            dz, tolerance), fine[flow.name]) for flow in PATCH_FLOWS}


def compare(fine_rates: dict, coarse_rates: dict, floor: dict) -> dict:
    """The JSON-ready comparison of :func:`diagonal_check` from the three parts."""
    result = {}
    for flow in PATCH_FLOWS:
        error = _relative(coarse_rates[flow.name], fine_rates[flow.name])
        below = floor[flow.name]
        result[flow.name] = {"description": flow.description, "fine_rate": fine_rates[flow.name],
                             "coarse_rate": coarse_rates[flow.name], "relative_error": error, "floor": below,
                             "above_floor": None if error is None or below is None else error - below}
    return result


def diagonal_check(fine: xr.Dataset, coarse: xr.Dataset, tolerance: float = 1e-10,
                   direct_limit: int = DIRECT_LIMIT, fine_rates: dict | None = None,
                   floor_rates: dict | None = None) -> dict:
    """Compare the diagonal flows of a fine field and its coarse grid; JSON-ready dict.

    Parameters
    ----------
    fine, coarse : xarray.Dataset
        The fine field and its coarse grid.
    tolerance : float
        Relative residual of every solve.
    direct_limit : int
        Largest model solved directly.
    fine_rates, floor_rates : dict, optional
        The fine rates of every flow through the field and through the floor's homogeneous
        field (:func:`fine_patch_rate` by flow name), already solved; None: solved here.

    Returns
    -------
    dict
        Per flow name (:data:`upscale.core.patch_flows.PATCH_FLOWS`): 'description',
        'fine_rate', 'coarse_rate' (mD*m per unit pressure drop), 'relative_error'
        ((coarse - fine) / fine; None where the fine model does not flow), 'floor' (the
        same on the homogeneous field of the same grids), 'above_floor' (relative_error
        minus floor).
    """
    fine = validate(fine, where="fine field")
    coarse = validate(coarse, where="coarse grid")
    cells = arrays(fine)
    partition = coarse_partition(coarse, cells.shape)
    return compare(fine_rates or fine_patch_rates(cells, partition, tolerance, direct_limit),
                   coarse_patch_rates(coarse, partition, tolerance),
                   floors(cells, partition, tolerance, direct_limit, floor_rates))
