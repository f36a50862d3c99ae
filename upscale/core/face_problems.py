"""Flow-based face transmissibilities from two-block local problems, and multipliers.

The transmissibility from the coarse permeability written beside them is the two-point
flux value T = C / (1/T1 + 1/T2), T_i = k_i A_i / (L_i / 2) from each block's own face
area and length, 0 where either block is inactive (:func:`upscale.io.coarse_grid.assemble`,
from the blocks' half-cell values). C converts mD*m to m3*cP/(day*bar) (metric) or
mD*ft to rb*cP/(day*psi) (field); see :mod:`upscale.core.units`.
"""

from __future__ import annotations

import logging

import numpy as np

from .block_problems import (
    BATCH_BYTES,
    FlowResult,
    LocalProblem,
    local_domains,
    sealed_boundary,
    sealed_permeability,
    solve_domains,
    solve_with_leading,
)
from .grid import GridArrays
from .partition import Partition
from .units import unit_system

log = logging.getLogger(__name__)


def _pressure_drop(domain, p: np.ndarray, connected: np.ndarray, first: tuple[slice, ...],
                   second: tuple[slice, ...]) -> np.ndarray:
    """Difference of the bulk-volume-weighted mean pressures over the connected cells of
    two regions (nb,); NaN where a region has no connected cell."""
    weight = domain.volume * connected
    weighted = weight * p
    means = []
    for region in (first, second):
        sl = (slice(None),) + region
        total = weight[sl].sum(axis=(1, 2, 3))
        means.append(np.divide(weighted[sl].sum(axis=(1, 2, 3)), total, out=np.full(domain.count, np.nan),
                               where=total > 0))
    return means[0] - means[1]


def flow_transmissibility(cells: GridArrays, partition: Partition, border: int = 0, units: str = "metric",
                          progress=None, budget: int = BATCH_BYTES, only=(None, None, None)
                          ) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Flow-based transmissibility of every interior coarse face (Romeu & Noetinger 1995;
    Chen, Durlofsky, Gerritsen & Wen 2003).

    For the face between blocks I and I+1 along an axis: a local problem over the fine
    cells of both blocks (plus the border ring), no-flow sides, unit pressure drop between
    its far ends; T = C Q / (p1 - p2) with p1, p2 the bulk-volume-weighted mean pressures
    of each block's connected fine cells. Exactly 0 where no fine path crosses.

    Parameters
    ----------
    cells : GridArrays
    partition : Partition
    border : int
        Fine cells of border ring.
    units : str
        'metric' or 'field' (:func:`upscale.core.units.unit_system`).
    progress : callable, optional
        Receives the number of blocks finished in each batch.
    budget : int
        Bytes per batch.
    only : tuple
        Per axis, the coarse indices of the blocks whose following faces are wanted, or
        None for all (the others stay 0).

    Returns
    -------
    faces : list of three ndarray
        Transmissibilities per axis, (NX-1, NY, NZ), (NX, NY-1, NZ), (NX, NY, NZ-1), in ``units``.
    residuals : list of three ndarray
        Relative residuals of the face problems, per axis.
    """
    faces, residuals, _ = _face_problems(cells, partition, border, units, progress, budget, only, sealed=False,
                                         permeability=cells.flow_permeability())
    return faces, residuals


def sealed_and_face_flow(cells: GridArrays, partition: Partition, border: int = 0, units: str = "metric",
                         progress=None, budget: int = BATCH_BYTES, only=(None, None, None)
                         ) -> tuple[FlowResult, list[np.ndarray], list[np.ndarray]]:
    """``flow_tensors(..., 'sealed')`` and :func:`flow_transmissibility` in one pass.

    Along each axis, block I's sealed domain is the leading part of the face problem
    between I and I+1 (the same cells up to I's far end, or its border ring), so both
    systems are solved in one kernel call that eliminates their common cells once
    (:func:`upscale.core.block_problems.solve_with_leading`); the same numbers as the two
    separate calls to rounding. Blocks without a face after them, and face problems whose
    band order does not start with the block, get their own sealed solve.

    Parameters
    ----------
    cells, partition, border, units, progress, budget, only
        As for :func:`flow_transmissibility`.

    Returns
    -------
    flow : FlowResult
        The sealed tensors (diagonal).
    faces, residuals : list of three ndarray
        As :func:`flow_transmissibility` returns them.
    """
    permeability = cells.flow_permeability()
    faces, residuals, (diagonal, residual, done) = _face_problems(cells, partition, border, units, progress,
                                                                  budget, only, True, permeability)
    wanted = np.zeros(partition.shape, dtype=bool)
    wanted[np.ix_(*(np.arange(n) if o is None else np.asarray(o) for n, o in zip(partition.shape, only)))] = True
    total = int(wanted.sum())
    for axis in range(3):
        remaining = wanted & ~done[axis]
        if remaining.any():
            k, r = _own_sealed_solves(cells, partition, border, budget, permeability, axis, remaining)
            diagonal[axis] = np.where(remaining, k, diagonal[axis])
            residual[axis] = np.where(remaining, r, residual[axis])
        if progress is not None:
            progress(total // 3 + int(axis < total % 3))
    tensor = np.zeros(partition.shape + (3, 3))
    for axis in range(3):
        tensor[..., axis, axis] = diagonal[axis]
    tensor[partition.block_sum(cells.active) == 0] = 0.0
    flow = FlowResult(tensor=tensor, residual=np.maximum.reduce(residual), asymmetry=np.zeros(partition.shape))
    return flow, faces, residuals


def _own_sealed_solves(cells, partition, border, budget, permeability, axis: int, remaining: np.ndarray):
    """Sealed permeability and residual along ``axis`` of the blocks in the hull of
    ``remaining`` (the others 0), each from its own solve."""
    hull = tuple(np.flatnonzero(remaining.any(axis=tuple(b for b in range(3) if b != a))) for a in range(3))
    k, r = np.zeros(partition.shape), np.zeros(partition.shape)
    for batch, domain in local_domains(cells, partition, border, budget=budget, only=hull, permeability=permeability):
        tensor, batch_residual, _ = solve_domains(domain, "sealed", directions=(axis,))
        batch.scatter(k, tensor[:, axis, axis])
        batch.scatter(r, batch_residual)
    return k, r


def _face_problems(cells: GridArrays, partition: Partition, border: int, units: str, progress, budget: int, only,
                   sealed: bool, permeability):
    """Face transmissibilities and residuals per axis; with ``sealed``, also per axis each
    block's sealed permeability from the face problems' leading parts, the residual of
    those solves and the mask of blocks done (else None). ``permeability``:
    ``cells.flow_permeability()``."""
    _, constant, to_length = unit_system(units)
    faces, residuals = [], []
    diagonal = [np.zeros(partition.shape) for _ in range(3)]
    sealed_residual = [np.zeros(partition.shape) for _ in range(3)]
    done = [np.zeros(partition.shape, dtype=bool) for _ in range(3)]
    for axis in range(3):
        shape = list(partition.shape)
        shape[axis] -= 1
        t = np.zeros(shape)
        residual = np.zeros(shape)
        if shape[axis] > 0:
            extend = tuple(int(a == axis) for a in range(3))
            owners = list(only)
            if owners[axis] is not None:
                owners[axis] = np.asarray(owners[axis])[np.asarray(owners[axis]) < shape[axis]]
            for batch, domain in local_domains(cells, partition, border, extend, budget, tuple(owners), permeability):
                problem = LocalProblem(domain, periodic=False, slowest=axis)
                pair = None
                if sealed:
                    stop = min(domain.target[axis].stop + border, domain.shape[axis])
                    lead = LocalProblem.leading(problem, axis, stop)
                    pair = solve_with_leading(problem, lead, axis)
                if pair is None:
                    solved = problem.solve(sealed_boundary(axis), "sealed", (axis,))
                else:
                    solved, lead_solved, lead_rate = pair
                    batch.scatter(diagonal[axis], sealed_permeability(lead, lead_solved, axis, lead_rate))
                    batch.scatter(sealed_residual[axis], lead_solved.residual)
                    batch.scatter(done[axis], np.ones(batch.count, dtype=bool))
                batch.scatter(t, constant * to_length * _face_value(problem, solved, batch, axis, border))
                batch.scatter(residual, solved.residual)
                if progress is not None:
                    progress(batch.count)
        faces.append(t)
        residuals.append(residual)
    if border and any(np.isnan(t).any() for t in faces):
        against = sum(int(np.isnan(t).sum()) for t in faces)
        log.warning("%d face(s) carry bordered flow against their blocks' pressure drop (round a barrier through "
                    "the border ring); they take their value without a border", against)
        plain, _, _ = _face_problems(cells, partition, 0, units, None, budget, only, False, permeability)
        faces = [np.where(np.isnan(t), p, t) for t, p in zip(faces, plain)]
    return faces, residuals, ((diagonal, sealed_residual, done) if sealed else None)


def _face_value(problem: LocalProblem, solved, batch, axis: int, border: int) -> np.ndarray:
    """Geometric face transmissibility (nb,) of solved face problems, mD*m: the rate through
    the shared coarse face over the difference of the two blocks' bulk-volume-averaged
    pressures; 0 where no fine path crosses. With a border the rate is that through the
    face's own cross-section (the ring takes part in the solve only), and a face whose
    rate runs against the drop (round a barrier through the ring) is NaN, to be replaced."""
    domain, p = problem.domain, solved.pressures[0]
    rate = problem.face_flux(p, batch.target, axis) if border else problem.inflow(p, axis)
    drop = _pressure_drop(domain, p, solved.connected, batch.target, _neighbour_region(batch, axis))
    through = problem.connected_through(solved.touch, axis) & (drop > 0)
    value = np.divide(rate, drop, out=np.zeros(domain.count), where=through)
    if border:
        value[through & ~(rate > 0)] = np.nan
    return value


def _neighbour_region(batch, axis: int) -> tuple[slice, ...]:
    """The second block of a face problem: the neighbour slice along ``axis``, the target
    block's extent on the other axes."""
    return tuple(batch.neighbour[a] if a == axis else batch.target[a] for a in range(3))


def multipliers(flow: np.ndarray, from_k: np.ndarray) -> np.ndarray:
    """Transmissibility multipliers T_flow / T_from_k per face.

    Parameters
    ----------
    flow, from_k : ndarray
        Flow-based and from-permeability transmissibilities of the same faces.

    Returns
    -------
    ndarray
        1 where T_from_k is 0 (the face stays closed).
    """
    return np.divide(flow, from_k, out=np.ones_like(from_k), where=from_k > 0)
