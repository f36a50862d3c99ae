"""The field schema: its variable names, building a Dataset in it, and its numpy arrays.

A field is an xarray Dataset on dimensions (x, y, z), z counting layers from the top.
After :func:`upscale.io.reading.open_field` (or :func:`upscale.io.validation.validate`)
a field is *normalised*: sizes are in metres, ``dz`` is three-dimensional, ``kx``, ``ky``,
``kz`` (mD), ``porosity``, ``ntg`` and ``active`` are all present, and inactive cells
hold zeros instead of fill values.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core.grid import AXES, GridArrays

PERMEABILITY = ("kx", "ky", "kz")


CELL_VALUES = PERMEABILITY + ("porosity", "ntg")


#: attributes of a field or coarse grid recording its pinch-out settings (:mod:`upscale.io.pinch_outs`)
PINCH_CONNECTIONS, PINCH_THICKNESS, PINCH_THICKNESS_UNITS = ("pinch_connections", "pinch_thickness",
                                                             "pinch_thickness_units")


def fine_dataset(kx, ky, kz, porosity, dx, dy, dz, ntg=None, active=None,
                 length_units: str = "m", attrs: dict | None = None) -> xr.Dataset:
    """Build a dataset in the fine-field schema from numpy (or dask) arrays.

    Parameters
    ----------
    kx, ky, kz : array_like, shape (nx, ny, nz)
        Permeability along x, y, z, mD.
    porosity : array_like, shape (nx, ny, nz)
        Porosity, fraction.
    dx, dy : array_like, shape (nx,) and (ny,)
        Cell sizes along x and y, in ``length_units``.
    dz : array_like, shape (nz,) or (nx, ny, nz)
        Cell thickness, in ``length_units``.
    ntg : array_like, shape (nx, ny, nz), optional
        Net-to-gross, fraction; left out when None.
    active : array_like, shape (nx, ny, nz), optional
        Active cell flag (1 active, 0 inactive); left out when None.
    length_units : str
        Units of dx, dy, dz, e.g. "m" or "ft".
    attrs : dict, optional
        Global attributes, added to ``Conventions``.

    Returns
    -------
    xarray.Dataset
        The field on dimensions (x, y, z); dask arrays stay lazy.
    """
    def floats(a):
        """Float array; a dask array stays lazy."""
        return a.astype(float) if hasattr(a, "dask") else np.asarray(a, dtype=float)

    kx = floats(kx)
    dz = floats(dz)
    cell = AXES
    data = {
        "dx": (("x",), np.asarray(dx, dtype=float), {"units": length_units, "long_name": "cell size along x"}),
        "dy": (("y",), np.asarray(dy, dtype=float), {"units": length_units, "long_name": "cell size along y"}),
        "dz": (("z",) if dz.ndim == 1 else cell, dz, {"units": length_units, "long_name": "cell thickness"}),
        "kx": (cell, kx, {"units": "mD", "long_name": "permeability along x"}),
        "ky": (cell, floats(ky), {"units": "mD", "long_name": "permeability along y"}),
        "kz": (cell, floats(kz), {"units": "mD", "long_name": "permeability along z"}),
        "porosity": (cell, floats(porosity), {"units": "1", "long_name": "porosity"}),
    }
    if ntg is not None:
        data["ntg"] = (cell, floats(ntg), {"units": "1", "long_name": "net-to-gross"})
    if active is not None:
        data["active"] = (cell, np.asarray(active, dtype=np.int8), {"long_name": "active cell flag"})
    ds = xr.Dataset({name: xr.Variable(*spec) for name, spec in data.items()})
    ds.attrs.update({"Conventions": "CF-1.10"}, **(attrs or {}))
    return ds


def pinch_connections(ds: xr.Dataset) -> bool:
    """Whether a field or coarse grid passes vertical flow across pinched cells: its
    ``pinch_connections`` attribute, 'yes' (the default when absent) or 'no'."""
    return str(ds.attrs.get(PINCH_CONNECTIONS, "yes")).strip().lower() != "no"


def arrays(ds: xr.Dataset) -> GridArrays:
    """The numpy arrays of a normalised field.

    Parameters
    ----------
    ds : xarray.Dataset
        A normalised field (:func:`upscale.io.validation.validate`).

    Returns
    -------
    GridArrays
        dx (nx,), dy (ny,) in m; dz, kx, ky, kz, porosity, ntg (nx, ny, nz) as floats
        (m, mD, fractions); active (nx, ny, nz) as booleans; the pinch-out connections as
        recorded (:func:`pinch_connections`).
    """
    return GridArrays(
        pinch_connections=pinch_connections(ds),
        dx=np.asarray(ds["dx"].values, dtype=float),
        dy=np.asarray(ds["dy"].values, dtype=float),
        dz=np.asarray(ds["dz"].values, dtype=float),
        kx=np.asarray(ds["kx"].values, dtype=float),
        ky=np.asarray(ds["ky"].values, dtype=float),
        kz=np.asarray(ds["kz"].values, dtype=float),
        porosity=np.asarray(ds["porosity"].values, dtype=float),
        ntg=np.asarray(ds["ntg"].values, dtype=float),
        active=np.asarray(ds["active"].values).astype(bool),
    )
