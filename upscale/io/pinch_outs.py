"""The pinch-out settings of a field: which cells count as pinched out, and whether
vertical flow passes across them (pinch-out connections).

A cell with dz = 0 is pinched out; with a threshold, so is every cell thinner than it
(given in the field's own thickness units, those of its ``dz``): such a cell is treated as
if its dz were 0, so it leaves the model's volumes and carries no flow of its own. With
connections (the default), vertical flow passes across a run of pinched cells between
the real cells of a column as if they were neighbours
(:func:`upscale.core.two_point.pinch_out_faces`); without, a pinched cell seals its
column. :func:`with_pinch_outs` applies the settings to a normalised field and records
them in its attributes, where :func:`upscale.io.schema.arrays` reads the connections and
the coarse grid's provenance copies both.
"""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from ..core.units import LENGTH_TO_M
from ..errors import InputError
from .schema import PINCH_CONNECTIONS, PINCH_THICKNESS, PINCH_THICKNESS_UNITS, pinch_connections


def thickness_threshold(value, where: str = "pinch thickness") -> float:
    """The pinch thickness, checked: a finite number >= 0 (InputError otherwise).

    Parameters
    ----------
    value : float or str
        The threshold as given.
    where : str
        The option's name in the refusal.

    Returns
    -------
    float
    """
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{where} must be a number >= 0 (the field's thickness units, m or ft), "
                         f"got {value!r}") from None
    if not math.isfinite(number) or number < 0:
        raise InputError(f"{where} must be a finite number >= 0 (the field's thickness units, m or ft), "
                         f"got {value!r}")
    return number


def thickness_units(ds: xr.Dataset) -> str:
    """The units of a normalised field's dz as written in its file (m or ft)."""
    return str(ds.attrs.get("dz_units_in", ds["dz"].attrs.get("units", "m")))


def with_pinch_outs(ds: xr.Dataset, connections: bool = True, thickness=0.0) -> xr.Dataset:
    """A normalised field with its pinch-out settings applied and recorded.

    Parameters
    ----------
    ds : xarray.Dataset
        A normalised field (numpy- or dask-backed; stays lazy).
    connections : bool
        Vertical flow passes across pinched cells between the real cells of a column.
    thickness : float
        Cells thinner than this (in the field's thickness units, :func:`thickness_units`)
        count as pinched out: dz 0 and inactive. 0: only cells with dz = 0.

    Returns
    -------
    xarray.Dataset
        The field, with attributes ``pinch_connections`` ('yes' or 'no'), ``pinch_thickness``
        and ``pinch_thickness_units``.
    """
    thickness = thickness_threshold(thickness)
    units = thickness_units(ds)
    out = ds.copy()
    if thickness > 0:
        thin = ds["dz"] < thickness * LENGTH_TO_M.get(units.lower(), 1.0)
        out["dz"] = ds["dz"].where(~thin, 0.0)
        out["active"] = ds["active"].where(~thin, 0).astype(np.int8)
        for name in ("kx", "ky", "kz", "porosity", "ntg"):
            out[name] = ds[name].where(~thin, 0.0)
    out.attrs.update({PINCH_CONNECTIONS: "yes" if connections else "no", PINCH_THICKNESS: thickness,
                      PINCH_THICKNESS_UNITS: units})
    return out


def pinch_settings(ds: xr.Dataset) -> dict:
    """The pinch-out settings recorded in a field's or coarse grid's attributes.

    Parameters
    ----------
    ds : xarray.Dataset

    Returns
    -------
    dict
        'connections' (bool; True when not recorded), 'thickness' (float, 0 when not
        recorded), 'units' (str).
    """
    return {"connections": pinch_connections(ds), "thickness": float(ds.attrs.get(PINCH_THICKNESS, 0.0)),
            "units": str(ds.attrs.get(PINCH_THICKNESS_UNITS, thickness_units(ds)))}
