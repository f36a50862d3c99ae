"""The whole-model steady check of a coarse grid against its fine field: both solved with
no-flow sides and a unit pressure drop along x, y and z (:mod:`upscale.core.pressure`),
compared as whole-model permeability, per-layer flow shares and block pressures.

The fine model's three axes are independent: a model too large for the direct solver
runs them on forked worker processes, within the available memory.
"""

from __future__ import annotations

import math
import multiprocessing
import os

import numpy as np
import xarray as xr
from threadpoolctl import threadpool_limits

from .._runtime import available_memory, forked_map
from ..core.grid import AXES, GridArrays, axis_index
from ..core.pressure import DIRECT_LIMIT, boundary_half, fine_model_check, whole_model_permeability
from ..io.coarse_file import coarse_partition, coarse_two_point
from ..io.schema import arrays
from ..io.validation import validate

#: peak memory of one axis of the fine check per cell, bytes
BYTES_PER_CELL = 1300


def one_blas_thread() -> threadpool_limits:
    """A context that holds the BLAS libraries to one thread while a fine solve runs.

    The solves are sparse; their few dense products gain nothing from more threads, and
    the idle BLAS threads, waiting busily, take the cores from the other worker processes.
    """
    return threadpool_limits(limits=1, user_api="blas")


def worker_count(cells: int = 0) -> int:
    """Processes for the three axes of the fine check.

    Parameters
    ----------
    cells : int
        Cells of the fine model; 0 leaves memory out of the count.

    Returns
    -------
    int
        One per usable core, at most three, and no more than the available memory holds
        at :data:`BYTES_PER_CELL` per cell each; at least one.
    """
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    workers = min(3, cores)
    available = available_memory()
    if cells and available is not None:
        workers = min(workers, available // (BYTES_PER_CELL * cells))
    return max(1, workers)


def axis_processes(cells: int, direct_limit: int = DIRECT_LIMIT, workers: int | None = None) -> int:
    """Processes :func:`fine_model_checks` uses for a model.

    Parameters
    ----------
    cells : int
        Cells of the fine model.
    direct_limit : int
        Largest model the direct solver takes.
    workers : int, optional
        Processes wanted; None: :func:`worker_count`.

    Returns
    -------
    int
        1 for a model the direct solver takes or where fork is missing, else
        ``workers``, at most three.
    """
    if cells <= direct_limit or "fork" not in multiprocessing.get_all_start_methods():
        return 1
    workers = worker_count(cells) if workers is None else max(1, int(workers))
    return min(workers, 3)


def fine_model_checks(cells: GridArrays, tolerance: float = 1e-10, direct_limit: int = DIRECT_LIMIT,
                      workers: int | None = None) -> list[dict]:
    """:func:`fine_model_check` along x, y and z.

    The three axes are independent, so a model too large for the direct solver is run on
    up to ``workers`` forked processes, each solving whole axes, with the results of one
    process. Small models, and platforms without fork, run in this process.

    Parameters
    ----------
    cells : GridArrays
        The fine field.
    tolerance : float
        Relative residual of the solves.
    direct_limit : int
        Largest model solved directly.
    workers : int, optional
        Processes at most; None: :func:`worker_count` (cores and available memory).

    Returns
    -------
    list of dict
        The results of :func:`fine_model_check` along x, y, z.
    """
    processes = axis_processes(math.prod(cells.shape), direct_limit, workers)
    return forked_map(_fine_axis, (cells, tolerance, direct_limit), [0, 1, 2], processes)


def _fine_axis(shared, axis: int) -> dict:
    """One axis of the fine check (in a forked worker, on the field it inherited)."""
    cells, tolerance, direct_limit = shared
    with one_blas_thread():
        return fine_model_check(cells, axis, tolerance=tolerance, direct_limit=direct_limit)


def coarse_model_check(coarse: xr.Dataset, axis, tolerance: float = 1e-10,
                       direct_limit: int = DIRECT_LIMIT) -> dict:
    """Whole-model flow check of a coarse grid along ``axis``.

    Interior faces are the file's ``tx``, ``ty``, ``tz`` times ``tx_multiplier`` ... (when
    present) divided by the unit constant (:func:`transmissibility_constant`), i.e. mD*m.
    The boundary half-cell transmissibilities 2 k V / l^2 use each coarse cell's effective
    permeability (kx*ntg, ky*ntg, kz; 0 in inactive cells) and its dx, dy, dz. Off-diagonal
    tensor terms (kxy ...) are not used: the check is two-point.

    Parameters
    ----------
    coarse : xarray.Dataset
        A coarse grid file's dataset.
    axis : int or str
        0, 1, 2 or "x", "y", "z".
    tolerance : float
        Relative residual of the solve.
    direct_limit : int
        Largest model solved directly.

    Returns
    -------
    dict
        As :func:`whole_model_permeability` returns it.
    """
    axis = axis_index(axis)
    cells, faces, halves = coarse_two_point(validate(coarse, where="coarse grid"))
    return whole_model_permeability(faces, boundary_half(halves[axis], axis), cells.dx, cells.dy, cells.dz,
                                    axis, tolerance=tolerance, direct_limit=direct_limit)


def _number(value) -> float | None:
    """``value`` as a float, None when it is not finite (JSON has no NaN)."""
    value = float(value)
    return value if math.isfinite(value) else None


def _layer_shares(face_flux, z_start=None) -> list:
    """Share of the inflow through each layer (optionally summed onto coarse layers)."""
    per_layer = face_flux[0].sum(axis=(0, 1))  # inflow face: length 1 along the flow axis
    if z_start is not None:
        per_layer = np.add.reduceat(per_layer, z_start)
    total = per_layer.sum()
    if total == 0:
        return [None] * per_layer.size
    return [_number(v) for v in per_layer / total]


def steady_check(fine: xr.Dataset, coarse: xr.Dataset, tolerance: float = 1e-10,
                 direct_limit: int = DIRECT_LIMIT, fine_results: list | None = None) -> dict:
    """Compare whole-model steady flow of a fine field and its coarse grid.

    Parameters
    ----------
    fine, coarse : xarray.Dataset
        The fine field and its coarse grid.
    tolerance : float
        Relative residual of the solves.
    direct_limit : int
        Largest model solved directly.
    fine_results : list of dict, optional
        The fine model's :func:`fine_model_check` along x, y, z, already solved; None:
        solved here.

    Returns
    -------
    dict
        JSON-ready. result["global"][axis] = {'fine_k', 'coarse_k' (mD), 'relative_error'
        ((coarse_k - fine_k) / fine_k; None when fine_k is 0, i.e. the fine model does not
        flow along that axis), 'fine_residual', 'coarse_residual' (true relative residuals
        of the solves)}; result["layer_flow_share"][axis] for x and y = {'fine': [...],
        'coarse': [...]}: share of the total rate entering the inflow face through each
        coarse layer (fine layers summed with the coarse file's z_start); None entries if
        the model does not flow; result["pressure_rms"][axis]: root mean square, over
        coarse cells, of the coarse pressure minus the bulk-volume-weighted average of the
        fine pressures in its block, as a fraction of the pressure drop; fine cells without
        a pressure (not connected to a constant-pressure face) are left out of the
        averages, coarse cells without one (or without any fine pressure) out of the mean;
        None if no cell is left.
    """
    fine = validate(fine, where="fine field")
    coarse = validate(coarse, where="coarse grid")
    cells = arrays(fine)
    partition = coarse_partition(coarse, cells.shape)
    bulk = cells.bulk_volume
    result = {"global": {}, "layer_flow_share": {}, "pressure_rms": {}}
    fine_results = fine_results or fine_model_checks(cells, tolerance=tolerance, direct_limit=direct_limit)
    for axis, name in enumerate(AXES):
        f = fine_results[axis]
        c = coarse_model_check(coarse, axis, tolerance=tolerance, direct_limit=direct_limit)
        result["global"][name] = _global_entry(f, c)
        if axis < 2:
            result["layer_flow_share"][name] = {
                "fine": _layer_shares(f["face_flux"], partition.edges[2][:-1]),
                "coarse": _layer_shares(c["face_flux"]),
            }
        result["pressure_rms"][name] = _pressure_rms(partition, bulk, f["pressure"], c["pressure"])
    return result


def _global_entry(f: dict, c: dict) -> dict:
    """Fine and coarse whole-model permeability along one axis, their relative error and
    the solves' residuals."""
    error = (c["k"] - f["k"]) / f["k"] if f["k"] != 0 else None
    return {
        "fine_k": _number(f["k"]),
        "coarse_k": _number(c["k"]),
        "relative_error": None if error is None else _number(error),
        "fine_residual": _number(f["solver"]["relative_residual"]),
        "coarse_residual": _number(c["solver"]["relative_residual"]),
    }


def _pressure_rms(partition, bulk: np.ndarray, fine_pressure: np.ndarray, coarse_pressure: np.ndarray):
    """RMS of the coarse pressure minus the bulk-weighted block average of the fine
    pressures, over the cells where both are known; None if there is none."""
    known = np.isfinite(fine_pressure)
    weight = np.where(known, bulk, 0.0)
    total = partition.block_sum(weight)
    summed = partition.block_sum(np.where(known, fine_pressure, 0.0) * weight)
    average = np.full(total.shape, np.nan)
    np.divide(summed, total, out=average, where=total > 0)
    difference = coarse_pressure - average
    difference = difference[np.isfinite(difference)]
    return _number(np.sqrt(np.mean(difference ** 2))) if difference.size else None
