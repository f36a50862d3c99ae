"""Two-point flux transmissibilities on Cartesian cells with per-cell thickness.

Geometric transmissibilities here are in mD*m (multiply by a constant from
:mod:`upscale.units` for m3*cP/(day*bar)). Arrays may carry leading batch axes: the
last three axes are always (x, y, z) and ``axis`` counts among those three.
"""

from __future__ import annotations

import numpy as np


def half_transmissibility(k: np.ndarray, volume: np.ndarray, length: np.ndarray) -> np.ndarray:
    """Cell-centre-to-face transmissibility k A / (l / 2) = 2 k V / l^2, mD*m; 0 where l = 0."""
    out = np.zeros(np.broadcast(k, volume, length).shape)
    np.divide(2.0 * k * volume, length ** 2, out=out, where=length > 0)
    return out


def harmonic_pair(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Series combination a b / (a + b) of two half transmissibilities, 0 if either is 0."""
    total = a + b
    out = np.zeros(total.shape)
    np.divide(a * b, total, out=out, where=total > 0)
    return out


def face_transmissibility(half: np.ndarray, axis: int) -> np.ndarray:
    """Interior-face transmissibilities along ``axis`` (length n - 1 on that axis)."""
    ax = half.ndim - 3 + axis
    n = half.shape[ax]
    first = np.take(half, np.arange(n - 1), axis=ax)
    second = np.take(half, np.arange(1, n), axis=ax)
    return harmonic_pair(first, second)


def cell_geometry(dx: np.ndarray, dy: np.ndarray, dz: np.ndarray):
    """Per-cell bulk volume and lengths along x, y, z, each broadcast to dz's shape.

    ``dx`` has shape (..., nx), ``dy`` (..., ny), ``dz`` (..., nx, ny, nz); metres.
    """
    lx = np.broadcast_to(dx[..., :, None, None], dz.shape)
    ly = np.broadcast_to(dy[..., None, :, None], dz.shape)
    return lx * ly * dz, (lx, ly, dz)


def transmissibilities(k: tuple[np.ndarray, np.ndarray, np.ndarray], dx, dy, dz):
    """Half and interior-face transmissibilities per axis for permeabilities (kx, ky, kz).

    Returns ``(half, face)``: lists of three arrays (mD*m); ``face[a]`` has n - 1 on axis a.
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
