"""The one reader of a coarse grid file's own structure: its fine-index ranges (the
partition), its face transmissibilities and their units, its effective permeability.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core.grid import AXES, GridArrays
from ..core.partition import Partition, partition_from_ranges
from ..core.two_point import transmissibilities
from ..core.units import TRANSMISSIBILITY_UNITS
from ..errors import InputError
from .schema import arrays


def coarse_partition(coarse: xr.Dataset, fine_shape=None, required: bool = True) -> Partition | None:
    """The partition of a coarse file, from its fine-index ranges ``x_start``/``x_stop``, ...

    Parameters
    ----------
    coarse : xarray.Dataset
        A coarse grid (as written by ``upscale coarsen``).
    fine_shape : tuple of int, optional
        (nx, ny, nz) of the fine grid the ranges must tile; not checked when None.
    required : bool
        Refuse a file without ranges (InputError); else return None for it.

    Returns
    -------
    Partition or None
        Block edges in fine indices per axis.
    """
    if not all(f"{n}_start" in coarse and f"{n}_stop" in coarse for n in AXES):
        if required:
            raise InputError("coarse grid: missing x_start/x_stop, y_start/y_stop or z_start/z_stop "
                             "(fine index ranges); is it a coarse grid written by upscale?")
        return None
    starts, stops = [], []
    for axis, name in enumerate(AXES):
        start = np.asarray(coarse[f"{name}_start"].values, dtype=np.int64)
        stop = np.asarray(coarse[f"{name}_stop"].values, dtype=np.int64)
        ok = (start.size == coarse.sizes[name] and start.size > 0 and start[0] == 0
              and np.all(stop > start) and np.all(start[1:] == stop[:-1])
              and (fine_shape is None or stop[-1] == fine_shape[axis]))
        if not ok:
            where = f"the fine grid's {fine_shape[axis]} cells" if fine_shape is not None else "a grid"
            raise InputError(f"coarse grid: '{name}_start'/'{name}_stop' do not tile {where} along "
                             f"{name} in order; is it the coarse grid of this field?")
        starts.append(start)
        stops.append(stop)
    return partition_from_ranges(starts, stops)


def coarse_effective(coarse: xr.Dataset) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Effective (flow) permeability of a coarse file along x, y, z.

    Parameters
    ----------
    coarse : xarray.Dataset
        A normalised coarse grid.

    Returns
    -------
    tuple of numpy.ndarray
        kx*ntg, ky*ntg, kz, each (NX, NY, NZ), mD.
    """
    ntg = coarse["ntg"].values
    return coarse["kx"].values * ntg, coarse["ky"].values * ntg, coarse["kz"].values


def coarse_units(coarse: xr.Dataset) -> str:
    """The transmissibility unit system of a coarse file.

    Parameters
    ----------
    coarse : xarray.Dataset
        A coarse grid: its ``transmissibility_units`` attribute, else the units of ``tx``.

    Returns
    -------
    str
        "metric" or "field" (a key of :data:`upscale.core.units.TRANSMISSIBILITY_UNITS`).
    """
    units = coarse.attrs.get("transmissibility_units")
    if units is None and "tx" in coarse:
        written = str(coarse["tx"].attrs.get("units", ""))
        units = next((name for name, spec in TRANSMISSIBILITY_UNITS.items() if spec[0] == written), None)
    if units not in TRANSMISSIBILITY_UNITS:
        raise InputError(f"coarse grid: transmissibility units {units!r} are not known; "
                         f"set attribute 'transmissibility_units' to metric or field")
    return units


def transmissibility_constant(coarse: xr.Dataset) -> float:
    """Factor between the file's transmissibilities and geometric mD*m values.

    Parameters
    ----------
    coarse : xarray.Dataset
        A coarse grid (:func:`coarse_units` gives its units).

    Returns
    -------
    float
        The unit constant times the metres-to-length factor (:mod:`upscale.core.upscaling`
        writes T = constant * to_length * T_geometric).
    """
    _, constant, to_length = TRANSMISSIBILITY_UNITS[coarse_units(coarse)]
    return constant * to_length


def coarse_faces(coarse: xr.Dataset, shape) -> list[np.ndarray]:
    """The file's face transmissibilities times their multipliers.

    Parameters
    ----------
    coarse : xarray.Dataset
        A coarse grid with tx, ty, tz (dims (x_face, y, z) ...) and optionally
        tx_multiplier, ty_multiplier, tz_multiplier.
    shape : tuple of int
        (NX, NY, NZ), the coarse cells.

    Returns
    -------
    list of numpy.ndarray
        tx (NX - 1, NY, NZ), ty (NX, NY - 1, NZ), tz (NX, NY, NZ - 1), in file units;
        refused (InputError) when missing, misshapen, NaN, infinite or negative.
    """
    faces = []
    for axis, name in enumerate(AXES):
        key = f"t{name}"
        if key not in coarse:
            raise InputError(f"coarse grid: missing variable '{key}' (face transmissibilities along {name})")
        dims = tuple(f"{name}_face" if d == name else d for d in AXES)
        if set(coarse[key].dims) != set(dims):
            raise InputError(f"coarse grid: variable '{key}' has dimensions {coarse[key].dims}, expected {dims}")
        values = np.asarray(coarse[key].transpose(*dims).values, dtype=float)
        multiplier = f"{key}_multiplier"
        if multiplier in coarse:
            values = values * np.asarray(coarse[multiplier].transpose(*dims).values, dtype=float)
        wanted = tuple(n - 1 if a == axis else n for a, n in enumerate(shape))
        if values.shape != wanted:
            raise InputError(f"coarse grid: variable '{key}' has shape {values.shape}, expected {wanted}")
        bad = ~np.isfinite(values) | (values < 0)
        if bad.any():
            raise InputError(f"coarse grid: variable '{key}' (times multiplier) is NaN, infinite or "
                             f"negative on {int(bad.sum())} face(s), first at {tuple(np.argwhere(bad)[0])}")
        faces.append(values)
    return faces


def coarse_two_point(coarse: xr.Dataset) -> tuple[GridArrays, list[np.ndarray], list[np.ndarray]]:
    """A validated coarse grid as a two-point model, in mD*m.

    Returns
    -------
    cells : GridArrays
        The coarse cells.
    faces : list of ndarray
        Per axis the file's face transmissibilities times their multipliers, divided by
        the unit constant (:func:`transmissibility_constant`).
    halves : list of ndarray
        Per axis the half-cell transmissibilities 2 k V / l^2 of the cells' effective
        permeability (kx*ntg, ky*ntg, kz; 0 in inactive cells); off-diagonal terms unused.
        With pinch-out connections (the file's ``pinch_connections``), a coarse cell of
        dz = 0 at the top or bottom of its column holds the value through which a
        pressure held there reaches the column's first real cell
        (:func:`upscale.core.two_point.pinch_out_faces`).
    """
    cells = arrays(coarse)
    constant = transmissibility_constant(coarse)
    faces = [t / constant for t in coarse_faces(coarse, cells.shape)]
    halves, _ = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz, cells.pinch_connections)
    return cells, faces, halves
