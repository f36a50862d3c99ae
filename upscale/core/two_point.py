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


def transmissibilities(k: tuple[np.ndarray, np.ndarray, np.ndarray], dx, dy, dz):
    """Half and interior-face two-point transmissibilities per axis.

    Parameters
    ----------
    k : tuple of ndarray
        (kx, ky, kz), each (..., nx, ny, nz), mD.
    dx, dy, dz : ndarray
        Cell sizes as for :func:`cell_geometry`, m.

    Returns
    -------
    half : list of ndarray
        Per axis, (..., nx, ny, nz), mD*m.
    face : list of ndarray
        Per axis, n - 1 faces along that axis, mD*m.
    """
    volume, lengths = cell_geometry(dx, dy, dz)
    half = [half_transmissibility(k[a], volume, lengths[a]) for a in range(3)]
    return half, [face_transmissibility(half[a], a) for a in range(3)]


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
