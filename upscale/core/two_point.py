"""Two-point flux transmissibilities on Cartesian cells with per-cell thickness.

Geometric transmissibilities here are in mD*m (multiply by a constant from
:mod:`upscale.core.units` for m3*cP/(day*bar)). Arrays may carry leading batch axes:
the last three axes are always (x, y, z) and ``axis`` counts among those three.

Examples
--------
Two cells of 10 m x 1 m x 1 m side by side along x, 100 mD and 300 mD: the face between
them carries T = 1 / (1/20 + 1/60) = 15 mD*m (k A / (dx / 2) per half cell).

>>> import numpy as np
>>> k = np.array([100.0, 300.0]).reshape(2, 1, 1)
>>> half, face = transmissibilities((k, k, k), np.array([10.0, 10.0]), np.array([1.0]), np.ones((2, 1, 1)))
>>> half[0].ravel().tolist(), face[0].ravel().tolist()
([20.0, 60.0], [15.0])
"""

from __future__ import annotations

import numpy as np


def half_transmissibility(k: np.ndarray, volume: np.ndarray, length: np.ndarray) -> np.ndarray:
    """Cell-centre-to-face transmissibility k A / (l / 2) = 2 k V / l^2.

    Parameters
    ----------
    k : ndarray
        Permeability along the flow direction, mD.
    volume : ndarray
        Cell bulk volume, m3.
    length : ndarray
        Cell length along the flow direction, m (broadcastable with ``k`` and ``volume``).

    Returns
    -------
    ndarray
        mD*m, broadcast shape; 0 where the length is 0 (a pinched cell).

    Examples
    --------
    >>> half_transmissibility(100.0, 2.0, 2.0).item()   # 2 * 100 * 2 / 2**2
    100.0
    """
    out = np.zeros(np.broadcast(k, volume, length).shape)
    np.divide(2.0 * k * volume, length ** 2, out=out, where=length > 0)
    return out


def harmonic_pair(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Series combination a b / (a + b) of two half transmissibilities, 0 if either is 0.

    Parameters
    ----------
    a, b : ndarray
        Half transmissibilities of the two cells (any one unit), same shape.

    Returns
    -------
    ndarray
        The face transmissibility in the same unit.

    Examples
    --------
    >>> import numpy as np
    >>> harmonic_pair(np.array([20.0, 5.0]), np.array([60.0, 0.0])).tolist()
    [15.0, 0.0]
    """
    total = a + b
    out = np.zeros(total.shape)
    np.divide(a * b, total, out=out, where=total > 0)
    return out


def face_transmissibility(half: np.ndarray, axis: int) -> np.ndarray:
    """Interior-face transmissibilities along ``axis``: the harmonic pair of neighbours.

    Parameters
    ----------
    half : ndarray
        Half transmissibilities (..., nx, ny, nz) along ``axis``.
    axis : int
        0, 1 or 2 among the last three axes.

    Returns
    -------
    ndarray
        Shape of ``half`` with n - 1 along ``axis``.
    """
    ax = half.ndim - 3 + axis
    n = half.shape[ax]
    first = np.take(half, np.arange(n - 1), axis=ax)
    second = np.take(half, np.arange(1, n), axis=ax)
    return harmonic_pair(first, second)


def cell_geometry(dx: np.ndarray, dy: np.ndarray, dz: np.ndarray):
    """Per-cell bulk volume and lengths along x, y, z.

    Parameters
    ----------
    dx, dy : ndarray
        Cell sizes, shapes (..., nx) and (..., ny), m.
    dz : ndarray
        Cell thickness (..., nx, ny, nz), m.

    Returns
    -------
    volume : ndarray
        Bulk volume (..., nx, ny, nz), m3.
    lengths : tuple of ndarray
        (lx, ly, lz), each broadcast to the shape of ``dz``, m.
    """
    lx = np.broadcast_to(dx[..., :, None, None], dz.shape)
    ly = np.broadcast_to(dy[..., None, :, None], dz.shape)
    return lx * ly * dz, (lx, ly, dz)


def transmissibilities(k: tuple[np.ndarray, np.ndarray, np.ndarray], dx, dy, dz, pinch_connections: bool = True):
    """Half and interior-face two-point transmissibilities per axis.

    Parameters
    ----------
    k : tuple of ndarray
        (kx, ky, kz), each (..., nx, ny, nz), mD.
    dx, dy, dz : ndarray
        Cell sizes as for :func:`cell_geometry`, m.
    pinch_connections : bool
        Vertical flow passes across pinched cells (dz = 0) between the real cells of a
        column (:func:`pinch_out_faces`); else a pinched cell seals its column.

    Returns
    -------
    half : list of ndarray
        Per axis, (..., nx, ny, nz), mD*m; with pinch-out connections, along z a pinched
        cell at either end of a column holds the value through which a pressure held on
        that end reaches the column's first real cell.
    face : list of ndarray
        Per axis, n - 1 faces along that axis, mD*m.
    """
    volume, lengths = cell_geometry(dx, dy, dz)
    half = [half_transmissibility(k[a], volume, lengths[a]) for a in range(3)]
    faces = [face_transmissibility(half[a], a) for a in range(2)]
    if pinch_connections:
        z_faces, half[2] = pinch_out_faces(half[2], lengths[2] == 0)
    else:
        z_faces = face_transmissibility(half[2], 2)
    return half, faces + [z_faces]


def run_ends(pinched: np.ndarray, first=0, stop=None) -> tuple[np.ndarray, np.ndarray]:
    """The real cells around runs of pinched cells, in columns along the last axis.

    Parameters
    ----------
    pinched : ndarray of bool, (..., nz)
    first, stop : int or ndarray of int, (nz,)
        Per index, the first index of its segment and the one past its last: runs stop at
        segment ends (e.g. coarse blocks, each a column of its own). Default: one segment,
        0 to nz.

    Returns
    -------
    above, below : ndarray of int, (..., nz)
        Per cell, the index of the nearest real (not pinched) cell at or above it in its
        segment (first - 1: none, the segment's top end) and at or below it (stop: none).
    """
    n = pinched.shape[-1]
    index = np.arange(n)
    stop = n if stop is None else stop
    above = np.maximum.accumulate(np.where(pinched, np.asarray(first) - 1, index), axis=-1)
    below = np.flip(np.minimum.accumulate(np.flip(np.where(pinched, stop, index), axis=-1), axis=-1), axis=-1)
    return above, below


def _halves_at(half: np.ndarray, above: np.ndarray, below: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The half values at the indices ``above`` and ``below`` along the last axis, indices
    past the column's ends clipped to them."""
    n = half.shape[-1]
    return (np.take_along_axis(half, np.clip(above, 0, n - 1), axis=-1),
            np.take_along_axis(half, np.clip(below, 0, n - 1), axis=-1))


def _joined(half: np.ndarray, above: np.ndarray, below: np.ndarray) -> np.ndarray:
    """The series pair of the half values at the indices ``above`` and ``below`` along the
    last axis; an index past the column's end (-1 or n) stands for a pressure held on that
    end, which adds no resistance (the other half alone); 0 when both are past the ends."""
    n = half.shape[-1]
    h_above, h_below = _halves_at(half, above, below)
    pair = np.where(above < 0, h_below, np.where(below >= n, h_above, harmonic_pair(h_above, h_below)))
    return np.where((above < 0) & (below >= n), 0.0, pair)


def pinch_out_faces(half: np.ndarray, pinched: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Vertical face transmissibilities with pinch-out connections, columns along the last axis.

    Across a run of r pinched cells between real cells a and b of a column, vertical flow
    passes as if a and b were neighbours, through the series pair H of their half values
    (common practice for pinch-out connections, no source). Each of the run's r + 1 faces
    carries (r + 1) H: the chain's resistance is 1 / H, every coupling stays between
    neighbours (the solvers' banded and sparse patterns are unchanged), and the pinched
    cells are nodes without volume. A run at an end of the column joins the real cell to
    that end: its r faces and the end cell's half carry (r + 1) h of the real cell, so a
    pressure held on the end reaches it through its own half. A run beside a real cell
    of h = 0, or without a real cell, carries nothing. Faces between two real cells keep
    their series pair, exactly.

    Parameters
    ----------
    half : ndarray, (..., nz)
        Vertical half transmissibilities (any one unit); those of pinched cells are not read.
    pinched : ndarray of bool, (..., nz)
        The cells of zero thickness.

    Returns
    -------
    faces : ndarray, (..., nz - 1)
        The face transmissibilities.
    half : ndarray, (..., nz)
        ``half`` with each pinched end cell's value (r + 1) h (0 without a real cell).

    Examples
    --------
    Real cells of half values 2 and 6 with two pinched cells between them: H = 1.5, and
    the three faces carry 3 H each.

    >>> faces, ends = pinch_out_faces(np.array([2.0, 0.0, 0.0, 6.0]), np.array([False, True, True, False]))
    >>> faces.tolist(), ends.tolist()
    ([4.5, 4.5, 4.5], [2.0, 0.0, 0.0, 6.0])
    """
    if not np.any(pinched):
        return harmonic_pair(half[..., :-1], half[..., 1:]), half
    above, below = run_ends(pinched)
    faces = (below[..., 1:] - above[..., :-1]) * _joined(half, above[..., :-1], below[..., 1:])
    ends = half.copy()
    top, bottom = below[..., :1], above[..., -1:]
    ends[..., :1] = (top + 1) * _joined(half, np.full(top.shape, -1), top)
    ends[..., -1:] = (half.shape[-1] - bottom) * _joined(half, bottom, np.full(bottom.shape, half.shape[-1]))
    return faces, ends


def pinch_out_faces_cyclic(half: np.ndarray, pinched: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`pinch_out_faces` of columns that wrap round (periodic problems): a run may
    continue from the last cell to the first.

    Parameters
    ----------
    half, pinched : ndarray, (..., nz)
        As for :func:`pinch_out_faces`.

    Returns
    -------
    faces : ndarray, (..., nz - 1)
        The interior faces.
    wrap : ndarray, (...)
        The face from the last cell to the first.
    """
    n = half.shape[-1]
    faces, _ = pinch_out_faces(np.concatenate([half] * 3, axis=-1), np.concatenate([pinched] * 3, axis=-1))
    return faces[..., n:2 * n - 1], faces[..., n - 1]


def pinch_bypassed(half: np.ndarray, pinched: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """The pinched cells a pinch-out connection passes through (:func:`pinch_out_faces`),
    in columns along the last axis cut into segments (e.g. coarse blocks) that each count
    as a column of their own.

    Parameters
    ----------
    half, pinched : ndarray, (..., nz)
        As for :func:`pinch_out_faces`.
    starts : ndarray of int
        The first index of every segment, ascending from 0.

    Returns
    -------
    ndarray of bool, (..., nz)
        Pinched cells whose run in their segment has a real cell of h > 0 or the segment's
        end at each side, and a real cell at one side at least.
    """
    n = pinched.shape[-1]
    segment = np.searchsorted(starts, np.arange(n), side="right") - 1
    first, stop = np.asarray(starts)[segment], np.append(starts, n)[segment + 1]
    above, below = run_ends(pinched, first, stop)
    top, bottom = above < first, below >= stop
    h_above, h_below = _halves_at(half, above, below)
    return pinched & (top | (h_above > 0)) & (bottom | (h_below > 0)) & ~(top & bottom)


def check_faces(face_t, shape) -> list[np.ndarray]:
    """Interior-face transmissibilities per axis as float arrays, checked against a grid of
    ``shape``: n - 1 faces along their own axis, finite and >= 0 (ValueError otherwise)."""
    if len(face_t) != 3:
        raise ValueError(f"face_t needs three arrays (x, y, z faces), got {len(face_t)}")
    faces = [np.asarray(f, dtype=float) for f in face_t]
    for a, f in enumerate(faces):
        wanted = tuple(n - 1 if i == a else n for i, n in enumerate(shape))
        if f.shape != wanted:
            raise ValueError(f"face transmissibilities along {'xyz'[a]} have shape {f.shape}, "
                             f"expected {wanted} for a grid of {tuple(shape)}")
        if not np.all(np.isfinite(f)) or np.any(f < 0):
            raise ValueError(f"face transmissibilities along {'xyz'[a]} must be finite and >= 0")
    return faces
