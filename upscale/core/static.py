"""Static (averaging) upscaling per coarse block, and the Cardwell-Parsons bounds.

All functions take fine arrays of shape (nx, ny, nz) and a :class:`Partition` and return
coarse arrays of shape (NX, NY, NZ). Averages are bulk-volume weighted over active cells
(weights 0 elsewhere); a block without weight gets 0. Permeability in mD.

Examples
--------
A 2 x 2 x 1 grid in one block: two columns along x of 1 mD and 100 mD cells in series,
side by side. The arithmetic and harmonic averages are 50.5 mD and 1.98 mD; along x the
Cardwell-Parsons bounds are the mean of the columns' series values (1.98 mD) and the
series of the slices' means (50.5 mD); the true answer lies between.

>>> import numpy as np
>>> from upscale.core.partition import make_partition
>>> k = np.array([[[1.0], [100.0]], [[100.0], [1.0]]])      # k[i, j, 0]
>>> one = make_partition(k.shape, ratio=(2, 2, 1))
>>> weight = np.ones(k.shape)
>>> [round(static_average(k, weight, one, m).item(), 3) for m in ("arithmetic", "harmonic", "geometric")]
[50.5, 1.98, 10.0]
>>> lower, upper = cardwell_parsons(k, np.ones(2), np.ones(2), np.ones(k.shape), one, axis=0)
>>> round(lower.item(), 3), round(upper.item(), 3)
(1.98, 50.5)
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from .._runtime import first_call
from ..errors import InputError
from .partition import Partition
from .two_point import pinch_bypassed

STATIC_METHODS = ("arithmetic", "harmonic", "geometric", "power")


def divide_or_zero(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """numerator / denominator, 0 where the denominator is 0."""
    out = np.zeros(np.broadcast(numerator, denominator).shape)
    np.divide(numerator, denominator, out=out, where=denominator > 0)
    return out


def power_average(k: np.ndarray, weight: np.ndarray, partition: Partition, omega: float) -> np.ndarray:
    """Weighted power average (sum w k^omega / sum w)^(1/omega) per block (Journel et al. 1986).

    Parameters
    ----------
    k : ndarray
        Fine permeability (nx, ny, nz), mD, >= 0.
    weight : ndarray
        Fine weights (nx, ny, nz), e.g. bulk volume in m3 times the active flag.
    partition : Partition
        The coarse blocks.
    omega : float
        1 arithmetic, -1 harmonic, 0 geometric (the limit).

    Returns
    -------
    ndarray
        (NX, NY, NZ), mD. For omega <= 0 a block holding a cell of zero permeability (with
        weight) averages to exactly 0; a block without weight is 0.
    """
    k = np.asarray(k, dtype=float)
    total = partition.block_sum(weight)
    if omega > 0:
        mean = divide_or_zero(partition.block_sum(weight * k ** omega), total)
        return mean ** (1.0 / omega)
    has_zero = partition.block_sum(weight * (k == 0)) > 0
    safe = np.where(k > 0, k, 1.0)
    if omega == 0:
        out = np.exp(divide_or_zero(partition.block_sum(weight * np.log(safe)), total))
    else:
        mean = divide_or_zero(partition.block_sum(weight * safe ** omega), total)
        out = np.zeros_like(mean)
        np.power(mean, 1.0 / omega, out=out, where=mean > 0)
    return np.where(has_zero | (total <= 0), 0.0, out)


def static_average(k: np.ndarray, weight: np.ndarray, partition: Partition, method: str,
                   omega: float | None = None) -> np.ndarray:
    """One of :data:`STATIC_METHODS` per block.

    Parameters
    ----------
    k, weight, partition
        As for :func:`power_average`.
    method : str
        'arithmetic', 'harmonic', 'geometric' or 'power'.
    omega : float, optional
        The exponent, needed for 'power'.

    Returns
    -------
    ndarray
        (NX, NY, NZ), mD. InputError for an unknown method or a missing exponent.
    """
    exponents = {"arithmetic": 1.0, "harmonic": -1.0, "geometric": 0.0}
    if method == "power":
        if omega is None or not np.isfinite(omega):
            raise InputError("method 'power' needs a finite exponent omega (e.g. --omega 0.5)")
        return power_average(k, weight, partition, float(omega))
    if method not in exponents:
        raise InputError(f"unknown static method '{method}'; choose from {', '.join(STATIC_METHODS)}")
    return power_average(k, weight, partition, exponents[method])


def block_length(partition: Partition, dx, dy, dz, axis: int, volume: np.ndarray | None = None) -> np.ndarray:
    """Block length along ``axis`` (m): sum of dx or dy; mean thickness for z (the block's
    bulk volume, ``volume`` (NX, NY, NZ) m3 when the caller has it, over its area)."""
    sx = np.add.reduceat(dx, partition.edges[0][:-1])
    sy = np.add.reduceat(dy, partition.edges[1][:-1])
    shape = partition.shape
    if axis == 0:
        return np.broadcast_to(sx[:, None, None], shape)
    if axis == 1:
        return np.broadcast_to(sy[None, :, None], shape)
    if volume is None:
        volume = block_volumes(dx, dy, dz, partition)["bulk"]
    return divide_or_zero(volume, sx[:, None, None] * sy[None, :, None])


def _edges(partition: Partition) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The partition's edges as int64 arrays, for the compiled kernels."""
    return tuple(np.asarray(e, dtype=np.int64) for e in partition.edges)


def block_volumes(dx, dy, dz, partition: Partition, porosity=None, ntg=None, active=None) -> dict[str, np.ndarray]:
    """Per block the bulk volume of all its cells and, given the cell values, the net and
    pore volume and the number of active cells, in one compiled pass over the cells.

    Parameters
    ----------
    dx, dy : ndarray
        Cell sizes (nx,), (ny,), m.
    dz : ndarray
        Cell thickness (nx, ny, nz), m.
    partition : Partition
    porosity, ntg : ndarray, optional
        (nx, ny, nz) fractions.
    active : ndarray of bool, optional
        (nx, ny, nz).

    Returns
    -------
    dict of ndarray
        (NX, NY, NZ): ``bulk`` (m3, sum of dx dy dz); with the cell values also ``net``
        (sum of ntg dx dy dz over active cells), ``pore`` (porosity ntg dx dy dz over
        active cells), m3, and ``active`` (count of active cells).
    """
    dz = np.ascontiguousarray(dz, dtype=float)
    values = porosity is not None
    if not values:  # placeholders the kernel does not read
        porosity, ntg, active = np.zeros((1, 1, 1)), np.zeros((1, 1, 1)), np.zeros((1, 1, 1), dtype=bool)
    out = {name: np.zeros(partition.shape) for name in ("bulk", "net", "pore", "active")}
    with first_call(_block_volumes):
        _block_volumes(np.asarray(dx, dtype=float), np.asarray(dy, dtype=float), dz,
                       np.ascontiguousarray(porosity, dtype=float), np.ascontiguousarray(ntg, dtype=float),
                       np.ascontiguousarray(active, dtype=bool), *_edges(partition), values,
                       out["bulk"], out["net"], out["pore"], out["active"])
    return out if values else {"bulk": out["bulk"]}


@njit(parallel=True, cache=True)
def _block_volumes(dx, dy, dz, porosity, ntg, active, ex, ey, ez, values, bulk, net, pore, count
                   ):  # pragma: no cover - compiled
    """The sums of :func:`block_volumes`, one block per iteration."""
    nby, nbz = ey.shape[0] - 1, ez.shape[0] - 1
    for b in prange(bulk.size):
        bx, by, bz = b // (nby * nbz), (b // nbz) % nby, b % nbz
        total = net_total = pore_total = cells = 0.0
        for i in range(ex[bx], ex[bx + 1]):
            for j in range(ey[by], ey[by + 1]):
                area = dx[i] * dy[j]
                for k in range(ez[bz], ez[bz + 1]):
                    volume = area * dz[i, j, k]
                    total += volume
                    if values and active[i, j, k]:
                        net_total += ntg[i, j, k] * volume
                        pore_total += porosity[i, j, k] * ntg[i, j, k] * volume
                        cells += 1.0
        bulk[bx, by, bz], net[bx, by, bz], pore[bx, by, bz], count[bx, by, bz] = total, net_total, pore_total, cells


def cardwell_parsons(k: np.ndarray, dx, dy, dz, partition: Partition, axis: int, pinch_connections: bool = True,
                     volume: np.ndarray | None = None
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper Cardwell-Parsons bounds (Cardwell & Parsons 1945) along ``axis``.

    Lower: columns along the axis in parallel, each a series of cells; upper: slices across
    the axis in series, each a parallel of cells. Both are written for the two-point flux
    network of the fine cells (cell conductance k A / l), so they bracket the discrete
    no-flow-sides result; on a regular grid they are the classical arithmetic-of-harmonic
    and harmonic-of-arithmetic. The block permeability of a conductance G is G L^2 / V.
    With pinch-out connections, along z a pinched cell that a connection passes through
    within its block (:func:`upscale.core.two_point.pinch_bypassed`) has no resistance: it
    adds nothing to its column, and joins the two sides of its layer in the upper bound
    (which is infinite when such cells join every layer of a block). One compiled pass
    over the cells of each block.

    Parameters
    ----------
    k : ndarray
        Permeability that carries flow along ``axis`` (nx, ny, nz), mD (0 in inactive cells).
    dx, dy : ndarray
        Cell sizes (nx,), (ny,), m.
    dz : ndarray
        Cell thickness (nx, ny, nz), m.
    partition : Partition
        The coarse blocks.
    axis : int
        0, 1 or 2.
    pinch_connections : bool
        Vertical flow passes across pinched cells (dz = 0) between real cells.
    volume : ndarray, optional
        The blocks' bulk volumes (NX, NY, NZ), m3, when the caller has them (:func:`block_volumes`).

    Returns
    -------
    lower, upper : ndarray
        (NX, NY, NZ), mD.
    """
    lower_g, upper_g = np.zeros(partition.shape), np.zeros(partition.shape)
    bypassed = _bypassed(k, dz, partition) if axis == 2 and pinch_connections else np.zeros((1, 1, 1), dtype=bool)
    with first_call(_bound_conductances):
        _bound_conductances(np.ascontiguousarray(k, dtype=float), np.asarray(dx, dtype=float),
                            np.asarray(dy, dtype=float), np.ascontiguousarray(dz, dtype=float), bypassed,
                            *_edges(partition), int(axis), lower_g, upper_g)
    if volume is None:
        volume = block_volumes(dx, dy, dz, partition)["bulk"]
    scale = divide_or_zero(block_length(partition, dx, dy, dz, axis, volume) ** 2, volume)
    return lower_g * scale, upper_g * scale


def _bypassed(k: np.ndarray, dz: np.ndarray, partition: Partition) -> np.ndarray:
    """The pinched cells a pinch-out connection passes through within their block along z
    (:func:`upscale.core.two_point.pinch_bypassed`, the blocks' layers its segments), bool
    (nx, ny, nz); a (1, 1, 1) stand-in without pinched cells. Only the columns holding a
    pinched cell are worked. The vertical conductance k dx dy / dz of a real cell is > 0
    exactly where its k is, so k stands in for it at the runs' ends."""
    pinched = np.asarray(dz) == 0
    columns = np.any(pinched, axis=2)
    if not columns.any():
        return np.zeros((1, 1, 1), dtype=bool)
    out = np.zeros(pinched.shape, dtype=bool)
    out[columns] = pinch_bypassed(np.asarray(k)[columns], pinched[columns], partition.edges[2][:-1])
    return out


@njit(parallel=True, cache=True)
def _bound_conductances(k, dx, dy, dz, bypassed, ex, ey, ez, axis, lower, upper):  # pragma: no cover - compiled
    """Per block the conductance of its cells' lines along ``axis`` in parallel (each a
    series of cell conductances k V / l^2) and of its slices across ``axis`` in series
    (each a parallel of them); a zero conductance is an infinite resistance, a cell of
    ``bypassed`` (when it has the cells' shape) an infinite conductance. One pass over the
    cells; the blocks of one (x, y) column of blocks share their scratch arrays."""
    joined = bypassed.shape == k.shape
    nby, nbz = ey.shape[0] - 1, ez.shape[0] - 1
    widest = (np.max(np.diff(ex)), np.max(np.diff(ey)), np.max(np.diff(ez)))
    for column in prange((ex.shape[0] - 1) * nby):
        bx, by = column // nby, column % nby
        lines = np.empty(widest[0] * widest[1] * widest[2] // widest[axis])  # resistance of each line
        slices = np.empty(widest[axis])                                        # conductance of each slice
        for bz in range(nbz):
            x0, y0, z0 = ex[bx], ey[by], ez[bz]
            size = (ex[bx + 1] - x0, ey[by + 1] - y0, ez[bz + 1] - z0)
            lines[:] = 0.0
            slices[:] = 0.0
            for i in range(x0, x0 + size[0]):
                for j in range(y0, y0 + size[1]):
                    for c in range(z0, z0 + size[2]):
                        length = dx[i] if axis == 0 else (dy[j] if axis == 1 else dz[i, j, c])
                        g = k[i, j, c] * (dx[i] * dy[j] * dz[i, j, c]) / (length * length) if length > 0 else 0.0
                        g = np.inf if joined and bypassed[i, j, c] else g
                        if axis == 0:
                            step, line = i - x0, (j - y0) * size[2] + c - z0
                        elif axis == 1:
                            step, line = j - y0, (i - x0) * size[2] + c - z0
                        else:
                            step, line = c - z0, (i - x0) * size[1] + j - y0
                        slices[step] += g
                        lines[line] += 1.0 / g if g > 0 else np.inf
            parallel = 0.0
            for line in range(size[0] * size[1] * size[2] // size[axis]):
                r = lines[line]
                parallel += 1.0 / r if 0 < r < np.inf else 0.0
            series = 0.0
            for step in range(size[axis]):
                series += 1.0 / slices[step] if slices[step] > 0 else np.inf
            lower[bx, by, bz] = parallel
            # series 0: every slice joined by pinch-outs
            upper[bx, by, bz] = np.inf if series == 0 else (1.0 / series if series < np.inf else 0.0)
