"""The array bundle of a grid (fine field or coarse grid) and the one definition of the axes.

Arrays are ordered [x, y, z], z counting layers from the top down; lengths in m,
permeability in mD.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError

AXES = ("x", "y", "z")


@dataclass(frozen=True)
class GridArrays:
    """A normalised field as plain numpy arrays, shapes (nx, ny, nz) unless noted.

    Attributes
    ----------
    dx, dy : ndarray, (nx,), (ny,)
        Cell sizes, m.
    dz : ndarray
        Cell thicknesses, m.
    kx, ky, kz : ndarray
        Permeability, mD (inactive cells 0).
    porosity, ntg : ndarray
        Fractions.
    active : ndarray of bool
    pinch_connections : bool
        Vertical flow passes across pinched cells (dz = 0) between the real cells of a
        column (pinch-out connections, :func:`upscale.core.two_point.pinch_out_faces`);
        False: a pinched cell seals its column.
    """

    dx: np.ndarray
    dy: np.ndarray
    dz: np.ndarray
    kx: np.ndarray
    ky: np.ndarray
    kz: np.ndarray
    porosity: np.ndarray
    ntg: np.ndarray
    active: np.ndarray
    pinch_connections: bool = True

    @property
    def shape(self) -> tuple[int, int, int]:
        """(nx, ny, nz)."""
        return self.kx.shape

    @property
    def bulk_volume(self) -> np.ndarray:
        """Cell bulk volume, m3."""
        return self.dx[:, None, None] * self.dy[None, :, None] * self.dz

    @property
    def pore_volume(self) -> np.ndarray:
        """Cell pore volume porosity * ntg * bulk volume, m3 (0 in inactive cells)."""
        return self.porosity * self.ntg * self.bulk_volume * self.active

    def crop(self, cells: tuple[slice, slice, slice]) -> "GridArrays":
        """The arrays of a box of cells.

        Parameters
        ----------
        cells : tuple of three slices
            Fine index slices per axis.

        Returns
        -------
        GridArrays
        """
        sx, sy, _ = cells
        three = {n: getattr(self, n)[cells] for n in ("dz", "kx", "ky", "kz", "porosity", "ntg", "active")}
        return GridArrays(dx=self.dx[sx], dy=self.dy[sy], pinch_connections=self.pinch_connections, **three)

    def flow_permeability(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Permeability that carries flow.

        Returns
        -------
        (ndarray, ndarray, ndarray)
            kx*ntg, ky*ntg, kz in mD; 0 in inactive cells.
        """
        a = self.active
        return self.kx * self.ntg * a, self.ky * self.ntg * a, self.kz * a


def axis_index(axis) -> int:
    """The axis number of an axis given by number or name.

    Parameters
    ----------
    axis : int or str
        0, 1, 2 or 'x', 'y', 'z'.

    Returns
    -------
    int
        0, 1 or 2; InputError for anything else.
    """
    if isinstance(axis, str) and axis in AXES:
        return AXES.index(axis)
    if isinstance(axis, (int, np.integer)) and not isinstance(axis, bool) and 0 <= int(axis) < 3:
        return int(axis)
    raise InputError(f"unknown flow axis {axis!r}; use 'x', 'y' or 'z'")
