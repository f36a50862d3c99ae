"""A summary of a normalised field (``upscale inspect``): counts, sizes, cell statistics,
volumes, heterogeneity.

:func:`field_summary` returns a plain dict of Python ints, floats, strings and lists
(ready for ``json.dumps``; undefined statistics are ``float('nan')``).
"""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..core.heterogeneity import coefficient_of_variation, dykstra_parsons, lorenz
from ..core.two_point import run_ends
from ..errors import InputError
from ..io.pinch_outs import pinch_settings
from ..io.schema import CELL_VALUES, arrays

PERCENTILES = (10, 50, 90)


STATISTICS = ("min", "p10", "p50", "p90", "max", "mean")


UNITS = {"kx": "mD", "ky": "mD", "kz": "mD", "porosity": "1", "ntg": "1"}


FACE_DIMS = ("x_face", "y_face", "z_face")


TRANSMISSIBILITY = ("tx", "ty", "tz")


HETEROGENEITY = (("coefficient_of_variation", "CV"), ("dykstra_parsons", "Dykstra-Parsons"),
                 ("lorenz", "Lorenz"))


FLOW_PERMEABILITY = {"x": "kx*ntg", "y": "ky*ntg", "z": "kz"}


def _range(values: np.ndarray) -> dict:
    """min and max of the values."""
    return {"min": float(values.min()), "max": float(values.max())}


def _cell_statistics(values: np.ndarray) -> dict:
    """min, p10, p50, p90, max, mean of the samples (each counts once; numpy 'linear' percentiles)."""
    p10, p50, p90 = np.percentile(values, PERCENTILES)
    return {"min": float(values.min()), "p10": float(p10), "p50": float(p50), "p90": float(p90),
            "max": float(values.max()), "mean": float(values.mean())}


def _is_transmissibility(name: str, variable: xr.DataArray) -> bool:
    """Whether a variable is tx, ty, tz or tx_*, ty_*, tz_* on face dimensions."""
    on_faces = any(d in FACE_DIMS for d in variable.dims)
    return on_faces and (name in TRANSMISSIBILITY or name.startswith(tuple(t + "_" for t in TRANSMISSIBILITY)))


def _transmissibility(ds: xr.Dataset) -> dict:
    """min/max/mean over the finite face values of tx, ty, tz and tx_*, ty_*, tz_* (e.g. multipliers)."""
    out = {}
    names = [n for n in ds.data_vars if _is_transmissibility(str(n), ds[n])]
    for name in sorted(names, key=lambda n: (str(n)[:2], len(str(n)), str(n))):
        values = np.asarray(ds[name].values, dtype=float).ravel()
        values = values[np.isfinite(values)]
        entry = {"dims": [str(d) for d in ds[name].dims], "units": str(ds[name].attrs.get("units", "")),
                 "count": int(values.size)}
        if values.size:
            entry.update(min=float(values.min()), max=float(values.max()), mean=float(values.mean()))
        else:
            entry.update(min=math.nan, max=math.nan, mean=math.nan)
        out[str(name)] = entry
    return out


def _pinched_between_active(dz: np.ndarray, active: np.ndarray) -> int:
    """Pinched cells (dz = 0) with an active cell above and below them in their column."""
    active = np.asarray(active, dtype=bool)
    above = np.zeros_like(active)
    above[:, :, 1:] = np.logical_or.accumulate(active, axis=2)[:, :, :-1]
    below = np.zeros_like(active)
    below[:, :, :-1] = np.logical_or.accumulate(active[:, :, ::-1], axis=2)[:, :, ::-1][:, :, 1:]
    return int(np.count_nonzero((dz == 0) & above & below))


def _pinch_outs(ds: xr.Dataset, fine) -> dict:
    """The pinch-out settings and the connections they make: a run of pinched cells in a
    column with an active cell just above and just below it (the real cells on either
    side) is one connection."""
    pinched = fine.dz == 0
    above, below = run_ends(pinched)
    # one more layer, inactive, stands for the column's ends: index nz, and -1 (from the end)
    active = np.concatenate([fine.active, np.zeros_like(fine.active[..., :1])], axis=2)
    joined = pinched & np.take_along_axis(active, above, axis=2) & np.take_along_axis(active, below, axis=2)
    continued = np.concatenate([np.zeros_like(pinched[..., :1]), pinched[..., :-1]], axis=2)  # pinched above
    runs = int(np.count_nonzero(joined & ~continued))
    settings = pinch_settings(ds)
    made = runs if settings["connections"] else 0
    return {**settings, "connections": "yes" if settings["connections"] else "no", "runs_between_active": runs,
            "cells_in_those_runs": int(np.count_nonzero(joined)), "connections_made": made}


def field_summary(ds: xr.Dataset) -> dict:
    """Summarise a normalised field (from :func:`upscale.io.reading.open_field` or ``validate``).

    Parameters
    ----------
    ds : xarray.Dataset
        A normalised field or coarse grid.

    Returns
    -------
    dict
        ``shape`` [nx, ny, nz]; ``cells``, ``active_cells``, ``pinched_cells`` (dz == 0,
        active or not), ``pinched_between_active`` (those with an active cell above and
        below in their column); ``pinch_outs``: the settings (``connections`` 'yes' or 'no',
        ``thickness``, ``units``: :func:`upscale.io.pinch_outs.pinch_settings`), the runs of
        pinched cells with an active cell just above and below (``runs_between_active``,
        ``cells_in_those_runs``) and ``connections_made`` (those runs, or 0 without
        connections); ``sizes`` (m): dx, dy, dz min/max over all cells,
        ``dz_min_positive``, ``length_x`` = sum dx, ``length_y`` = sum dy, and
        ``thickness`` min/max/mean over columns of the column total sum(dz); ``values``:
        for kx, ky, kz (mD), porosity, ntg (fractions) the min, p10, p50, p90, max and mean
        over active cells, each cell counting once (numpy's default linear percentiles);
        ``volumes`` (m3): ``bulk`` (all cells), ``active_bulk``, ``pore`` (porosity * ntg *
        bulk over active cells); ``heterogeneity``: for x, y, z the flow permeability
        kx*ntg, ky*ntg, kz over active cells with coefficient of variation and
        Dykstra-Parsons weighted by cell bulk volume, and the Lorenz coefficient with each
        cell weighted by its bulk volume (flow capacity k V, storage capacity porosity ntg V)
        and the cell's pore-volume porosity porosity * ntg (so that net-to-gross alone,
        which scales flow and storage alike, does not count as heterogeneity);
        ``transmissibility``: for each face variable tx, ty, tz, tx_*, ty_*, tz_* present,
        its dims, units, count, min/max/mean over finite values.
    """
    missing = [n for n in ("dx", "dy", "dz", *CELL_VALUES, "active") if n not in ds]
    if missing:
        raise InputError(f"field summary: missing variable(s) {', '.join(missing)}; "
                         f"read the field with open_field() or pass it through validate() first")
    fine = arrays(ds)
    return {
        **_counts(fine),
        "pinch_outs": _pinch_outs(ds, fine),
        "sizes": _sizes(fine),
        "values": {name: {"units": UNITS[name], **_cell_statistics(getattr(fine, name)[fine.active])}
                   for name in CELL_VALUES},
        "volumes": _volumes(fine),
        "heterogeneity": _heterogeneity(fine),
        "transmissibility": _transmissibility(ds),
    }


def _counts(fine) -> dict:
    """Shape, cells, active cells, pinched cells and those between active cells."""
    return {
        "shape": [int(n) for n in fine.shape],
        "cells": int(fine.active.size),
        "active_cells": int(np.count_nonzero(fine.active)),
        "pinched_cells": int(np.count_nonzero(fine.dz == 0)),
        "pinched_between_active": _pinched_between_active(fine.dz, fine.active),
    }


def _sizes(fine) -> dict:
    """Cell size ranges, model lengths and column thickness, m."""
    column = fine.dz.sum(axis=2)
    positive_dz = fine.dz[fine.dz > 0]
    return {
        "units": "m",
        "dx": _range(fine.dx),
        "dy": _range(fine.dy),
        "dz": _range(fine.dz),
        "dz_min_positive": float(positive_dz.min()) if positive_dz.size else math.nan,
        "length_x": float(fine.dx.sum()),
        "length_y": float(fine.dy.sum()),
        "thickness": {**_range(column), "mean": float(column.mean())},
    }


def _volumes(fine) -> dict:
    """Bulk volume of all cells and of the active ones, pore volume, m3."""
    bulk = fine.bulk_volume
    return {
        "units": "m3",
        "bulk": float(bulk.sum()),
        "active_bulk": float(bulk[fine.active].sum()),
        "pore": float(fine.pore_volume.sum()),
    }


def _heterogeneity(fine) -> dict:
    """Per axis, the heterogeneity measures of the flow permeability over active cells."""
    active = fine.active
    weight = fine.bulk_volume[active]
    storage_porosity = (fine.porosity * fine.ntg)[active]
    out = {}
    for axis, k in zip(AXES, fine.flow_permeability()):
        k = k[active]
        out[axis] = {
            "permeability": FLOW_PERMEABILITY[axis],
            "coefficient_of_variation": coefficient_of_variation(k, weight),
            "dykstra_parsons": dykstra_parsons(k, weight),
            "lorenz": lorenz(k, storage_porosity, weight),
        }
    return out
