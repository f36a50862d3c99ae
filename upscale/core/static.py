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

from ..errors import InputError
from .partition import Partition
from .two_point import pinch_bypassed

STATIC_METHODS = ("arithmetic", "harmonic", "geometric", "power")


def divide_or_zero(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """numerator / denominator, 0 where the denominator is 0."""
    out = np.zeros(np.broadcast(numerator, denominator).shape)
    np.divide(numerator, denominator, out=out, where=denominator > 0)
    return out


def _resistance(conductance: np.ndarray) -> np.ndarray:
    """1 / conductance, infinite where the conductance is 0."""
    out = np.full(conductance.shape, np.inf)
    np.divide(1.0, conductance, out=out, where=conductance > 0)
    return out


def _conductance(resistance: np.ndarray) -> np.ndarray:
    """1 / resistance, 0 where the resistance is infinite."""
    return divide_or_zero(np.ones_like(resistance), np.where(np.isfinite(resistance), resistance, 0.0))


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


def cell_lengths(dx: np.ndarray, dy: np.ndarray, dz: np.ndarray, axis: int) -> np.ndarray:
    """Cell length along ``axis`` (m), broadcast to (nx, ny, nz)."""
    return np.broadcast_to((dx[:, None, None], dy[None, :, None], dz)[axis], dz.shape)


def block_length(partition: Partition, dx, dy, dz, axis: int) -> np.ndarray:
    """Block length along ``axis`` (m): sum of dx or dy; mean thickness for z."""
    volume = partition.block_sum(dx[:, None, None] * dy[None, :, None] * dz)
    sx = np.add.reduceat(dx, partition.edges[0][:-1])
    sy = np.add.reduceat(dy, partition.edges[1][:-1])
    if axis == 0:
        return np.broadcast_to(sx[:, None, None], volume.shape)
    if axis == 1:
        return np.broadcast_to(sy[None, :, None], volume.shape)
    return divide_or_zero(volume, sx[:, None, None] * sy[None, :, None])


def cardwell_parsons(k: np.ndarray, dx, dy, dz, partition: Partition, axis: int, pinch_connections: bool = True
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
    (which is infinite when such cells join every layer of a block).

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

    Returns
    -------
    lower, upper : ndarray
        (NX, NY, NZ), mD.
    """
    volume = dx[:, None, None] * dy[None, :, None] * dz
    length = cell_lengths(dx, dy, dz, axis)
    conductance = np.zeros_like(volume)          # k A / l = k V / l^2 per cell
    np.divide(k * volume, length ** 2, out=conductance, where=length > 0)
    if axis == 2 and pinch_connections:
        conductance[pinch_bypassed(conductance, dz == 0, partition.edges[2][:-1])] = np.inf
    lower_g = partition.cross_sum(_conductance(partition.line_sum(_resistance(conductance), axis)), axis)
    slice_resistance = _resistance(partition.cross_sum(conductance, axis))
    series = partition.line_sum(slice_resistance, axis)
    upper_g = np.where(series == 0, np.inf, _conductance(series))   # 0: every layer joined by pinch-outs
    block_volume = partition.block_sum(volume)
    scale = divide_or_zero(block_length(partition, dx, dy, dz, axis) ** 2, block_volume)
    return lower_g * scale, upper_g * scale
