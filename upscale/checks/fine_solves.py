"""The fine model's solves of the chosen checks, run together on the worker processes.

The fine solves are most of a check's time: the three axis flows of the steady check, the
four diagonal flows and their four floors, and the drainage run of the transient check.
They are independent of each other and of the coarse grid's solves, so they go out as one
list of jobs to up to :func:`upscale.checks.steady.worker_count` forked processes, the
drainage run first (it takes longest), rather than check after check, each waiting for its
slowest solve. The checks then take their fine results from here and solve only the
coarse grid.
"""

from __future__ import annotations

import math

import xarray as xr

from .._runtime import forked_map
from ..core.grid import GridArrays
from ..core.partition import Partition
from ..core.patch_flows import PATCH_FLOWS
from ..core.pressure import DIRECT_LIMIT, fine_model_check
from .diagonal import fine_patch_rate, fine_two_point
from .steady import axis_processes, one_blas_thread
from .transient import fine_transient_run


def fine_jobs(chosen) -> list[tuple[str, object]]:
    """The fine solves the ``chosen`` checks need, longest first.

    Parameters
    ----------
    chosen : sequence of str
        Check names (:data:`upscale.checks.run.CHECKS`).

    Returns
    -------
    list of (str, object)
        ("transient", None); ("steady", axis) for axis 0, 1, 2; ("diagonal", flow) and
        ("floor", flow) for every diagonal flow (:data:`upscale.core.patch_flows.PATCH_FLOWS`).
    """
    jobs = [("transient", None)] if "transient" in chosen else []
    if "steady" in chosen:
        jobs += [("steady", axis) for axis in range(3)]
    if "diagonal" in chosen:
        jobs += [(kind, flow) for kind in ("diagonal", "floor") for flow in PATCH_FLOWS]
    return jobs


def fine_solutions(fine: xr.Dataset, coarse: xr.Dataset, cells: GridArrays, partition: Partition, chosen,
                   transient: dict | None = None, tolerance: float = 1e-10,
                   direct_limit: int = DIRECT_LIMIT) -> dict:
    """Every fine solve of the ``chosen`` checks (:func:`fine_jobs`).

    Parameters
    ----------
    fine, coarse : xarray.Dataset
        The validated fine field (its pinch-out settings applied) and coarse grid.
    cells : GridArrays
        The fine field's arrays.
    partition : Partition
        The coarse blocks.
    chosen : sequence of str
        Check names.
    transient : dict, optional
        Options of the transient check (:func:`upscale.checks.transient.transient_check`).
    tolerance : float
        Relative residual of the steady and diagonal solves.
    direct_limit : int
        Largest model solved directly; a larger one runs its jobs on forked workers.

    Returns
    -------
    dict
        What the checks take: 'steady' (the three :func:`upscale.core.pressure.fine_model_check`
        results), 'diagonal' and 'floor' (rates by flow name, mD*m per unit drop, through
        the field and through the floor's homogeneous field), 'transient' (the fine run of
        :func:`upscale.checks.transient.fine_transient_run`); only those chosen.
    """
    jobs = fine_jobs(chosen)
    processes = axis_processes(math.prod(cells.shape), direct_limit)
    # The two-point models of the diagonal flows and their floors, made once and inherited.
    models = ({kind: fine_two_point(cells, partition, kind == "floor") for kind in ("diagonal", "floor")}
              if "diagonal" in chosen else {})
    shared = (fine, coarse, cells, partition, models, transient or {}, tolerance, direct_limit)
    results = forked_map(_solve, shared, jobs, processes)
    out: dict = {}
    for (kind, key), result in zip(jobs, results):
        if kind == "transient":
            out[kind] = result
        elif kind == "steady":
            out.setdefault(kind, []).append(result)
        else:
            out.setdefault(kind, {})[key.name] = result
    return out


def _solve(shared, job):
    """One fine solve (in a forked worker, on the data it inherited)."""
    with one_blas_thread():
        return _solve_job(shared, job)


def _solve_job(shared, job):
    """The solve of one job of :func:`fine_jobs`."""
    fine, coarse, cells, partition, models, transient, tolerance, direct_limit = shared
    kind, key = job
    if kind == "transient":
        return fine_transient_run(fine, coarse, **transient)
    if kind == "steady":
        return fine_model_check(cells, key, tolerance=tolerance, direct_limit=direct_limit)
    return fine_patch_rate(cells, partition, key, models[kind], tolerance, direct_limit)
