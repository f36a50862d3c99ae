"""A summary of a normalised field (``upscale inspect``): counts, sizes, cell statistics,
volumes, heterogeneity; read slab by slab along x.

:func:`field_summary` returns a plain dict of Python ints, floats, strings and lists
(ready for ``json.dumps``; undefined statistics are ``float('nan')``). Every statistic is
built in passes over slabs of whole x planes (whole columns), one slab in memory at a
time: counts, extremes and sums in the first pass; the percentiles exactly, by searches
over the bits of the values (:mod:`upscale.core.order_statistics`, two passes or three);
the heterogeneity measures by their own passes (:mod:`upscale.core.heterogeneity`). The
counts, extremes and percentiles therefore do not depend on the slabs at all, the sums and
the measures built on them only to round-off, so a field larger than memory is summarised
as it would be in memory (the Lorenz coefficient within the bound it is given with).
"""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from ..core.grid import AXES, GridArrays
from ..core.heterogeneity import CoefficientOfVariation, DykstraParsons, LorenzCurve
from ..core.order_statistics import Percentiles
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


#: bytes per cell of a slab while a pass reads it: the slab read and normalised, its
#: arrays, the flow permeabilities and the keys of the searches (DEVELOPERS.md)
SLAB_BYTES_PER_CELL = 250


#: bytes of decompressed file chunks kept per variable while a field is read in slabs
#: (:func:`upscale.io.reading.limit_chunk_cache`): one stored chunk of the box writer
READ_CACHE_BYTES = 8 * 2 ** 20


#: bytes held whatever the slab: histograms and collected samples of the percentile
#: searches, the Lorenz bins of three axes, the read cache of eight variables
STATISTICS_BYTES = 64 * 2 ** 20 + 8 * READ_CACHE_BYTES


def summary_slab(shape, memory: int, reserved: int = 0) -> int:
    """x planes per slab for a budget, or a refusal when one plane does not fit.

    Parameters
    ----------
    shape : tuple of int
        (nx, ny, nz) of the field.
    memory : int
        The budget, bytes.
    reserved : int
        Bytes of the budget taken before the summary (the process itself).

    Returns
    -------
    int
        Planes per slab, 1 to nx; InputError when even one plane does not fit.
    """
    nx, ny, nz = (int(n) for n in shape)
    plane = SLAB_BYTES_PER_CELL * ny * nz
    planes = (memory - reserved - STATISTICS_BYTES) // plane
    if planes < 1:
        least = math.ceil((reserved + STATISTICS_BYTES + plane) / 2 ** 20)
        raise InputError(f"inspect: one slab of the field (one x plane, {ny} x {nz} cells) needs about "
                         f"{plane / 2 ** 20:.1f} MB beside {(reserved + STATISTICS_BYTES) / 2 ** 20:.0f} MB for the "
                         f"process and the statistics, more than the budget of {memory / 2 ** 20:.0f} MB; "
                         f"give --memory {least}MB or more")
    return int(min(planes, nx))


def _range(values: np.ndarray) -> dict:
    """min and max of the values."""
    return {"min": float(values.min()), "max": float(values.max())}


def _is_transmissibility(name: str, variable: xr.DataArray) -> bool:
    """Whether a variable is tx, ty, tz or tx_*, ty_*, tz_* on face dimensions."""
    on_faces = any(d in FACE_DIMS for d in variable.dims)
    return on_faces and (name in TRANSMISSIBILITY or name.startswith(tuple(t + "_" for t in TRANSMISSIBILITY)))


def _transmissibility(ds: xr.Dataset, slab: int | None) -> dict:
    """min/max/mean over the finite face values of tx, ty, tz and tx_*, ty_*, tz_* (e.g.
    multipliers), read ``slab`` planes of their first dimension at a time."""
    out = {}
    names = [n for n in ds.data_vars if _is_transmissibility(str(n), ds[n])]
    for name in sorted(names, key=lambda n: (str(n)[:2], len(str(n)), str(n))):
        variable = ds[name]
        first = variable.dims[0]
        step = slab or variable.sizes[first]
        count, total, low, high = 0, 0.0, math.inf, -math.inf
        for lo in range(0, variable.sizes[first], step):
            values = np.asarray(variable.isel({first: slice(lo, lo + step)}).values, dtype=float).ravel()
            values = values[np.isfinite(values)]
            if values.size:
                count, total = count + values.size, total + float(values.sum())
                low, high = min(low, float(values.min())), max(high, float(values.max()))
        entry = {"dims": [str(d) for d in variable.dims], "units": str(variable.attrs.get("units", "")),
                 "count": int(count)}
        if count:
            entry.update(min=low, max=high, mean=total / count)
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


def _runs_between_active(dz: np.ndarray, active: np.ndarray) -> tuple[int, int]:
    """The runs of pinched cells (dz = 0) in whole columns with an active cell just above
    and just below them (the real cells on either side), and the cells in those runs.
    Only the columns holding a pinched cell are worked."""
    pinched = dz == 0
    columns = np.any(pinched, axis=2)
    pinched, active = pinched[columns], np.asarray(active, dtype=bool)[columns]
    above, below = run_ends(pinched)
    # one more layer, inactive, stands for the column's ends: index nz, and -1 (from the end)
    active = np.concatenate([active, np.zeros_like(active[..., :1])], axis=-1)
    joined = pinched & np.take_along_axis(active, above, axis=-1) & np.take_along_axis(active, below, axis=-1)
    continued = np.concatenate([np.zeros_like(pinched[..., :1]), pinched[..., :-1]], axis=-1)  # pinched above
    return int(np.count_nonzero(joined & ~continued)), int(np.count_nonzero(joined))


def _pinch_outs(ds: xr.Dataset, runs: int, cells: int) -> dict:
    """The pinch-out settings and the connections they make: each of the ``runs`` of
    pinched cells between active cells (:func:`_runs_between_active`, ``cells`` in all) is
    one connection."""
    settings = pinch_settings(ds)
    made = runs if settings["connections"] else 0
    return {**settings, "connections": "yes" if settings["connections"] else "no", "runs_between_active": runs,
            "cells_in_those_runs": cells, "connections_made": made}


def field_summary(ds: xr.Dataset, slab: int | None = None, passes: list | None = None) -> dict:
    """Summarise a normalised field (from :func:`upscale.io.reading.open_field` or ``validate``).

    Parameters
    ----------
    ds : xarray.Dataset
        A normalised field or coarse grid, in memory or lazy (read slab by slab).
    slab : int, optional
        x planes per slab (:func:`summary_slab` sizes it for a budget); default: the
        field's x chunks when lazy, else the whole field.
    passes : list, optional
        Receives the number of passes made and of slabs per pass.

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
        over active cells, each cell counting once (numpy's default linear percentiles,
        exact); ``volumes`` (m3): ``bulk`` (all cells), ``active_bulk``, ``pore`` (porosity
        * ntg * bulk over active cells); ``heterogeneity``: for x, y, z the flow
        permeability kx*ntg, ky*ntg, kz over active cells with coefficient of variation and
        Dykstra-Parsons weighted by cell bulk volume, and the Lorenz coefficient with each
        cell weighted by its bulk volume (flow capacity k V, storage capacity porosity ntg V)
        and the cell's pore-volume porosity porosity * ntg (so that net-to-gross alone,
        which scales flow and storage alike, does not count as heterogeneity), with
        ``lorenz_bound``: the most by which the Lorenz coefficient of the sorted cells can
        exceed the one given (:class:`~upscale.core.heterogeneity.LorenzCurve`);
        ``transmissibility``: for each face variable tx, ty, tz, tx_*, ty_*, tz_* present,
        its dims, units, count, min/max/mean over finite values.
    """
    missing = [n for n in ("dx", "dy", "dz", *CELL_VALUES, "active") if n not in ds]
    if missing:
        raise InputError(f"field summary: missing variable(s) {', '.join(missing)}; "
                         f"read the field with open_field() or pass it through validate() first")
    edges = _slab_edges(ds, slab)
    summary = _Passes()
    while not summary.done:
        for lo, hi in edges:
            summary.feed(_slab(ds, lo, hi))
        summary.end_pass()
    if passes is not None:
        passes += [summary.passes, len(edges)]
    dx, dy = (np.asarray(ds[n].values, dtype=float) for n in ("dx", "dy"))
    sizes = {"units": "m", "dx": _range(dx), "dy": _range(dy), **summary.sizes(), "length_x": float(dx.sum()),
             "length_y": float(dy.sum())}
    pinch_outs = _pinch_outs(ds, summary.sums["runs"], summary.sums["run_cells"])
    return {**summary.counts(ds["kx"].shape), "pinch_outs": pinch_outs, "sizes": sizes, "values": summary.values(),
            "volumes": summary.volumes(), "heterogeneity": summary.heterogeneity(),
            "transmissibility": _transmissibility(ds, slab)}


def _slab_edges(ds: xr.Dataset, slab: int | None) -> list[tuple[int, int]]:
    """The x ranges of the slabs: ``slab`` planes each, else the lazy field's chunks, else all."""
    nx = ds.sizes["x"]
    if slab is None:
        chunks = ds["kx"].chunksizes.get("x") if ds["kx"].chunks is not None else None
        starts = np.concatenate([[0], np.cumsum(chunks)]) if chunks else np.array([0, nx])
        return [(int(a), int(b)) for a, b in zip(starts[:-1], starts[1:])]
    if int(slab) != slab or slab < 1:
        raise InputError(f"slab must be a whole number of x planes >= 1, got {slab}")
    return [(lo, min(lo + int(slab), nx)) for lo in range(0, nx, int(slab))]


def _slab(ds: xr.Dataset, lo: int, hi: int) -> GridArrays:
    """The cells of x planes lo..hi, read (a lazy field) and as arrays."""
    part = ds[["dx", "dy", "dz", *CELL_VALUES, "active"]].isel(x=slice(lo, hi))
    return arrays(part.compute() if part["kx"].chunks is not None else part)


class _Passes:
    """Every statistic of the summary, fed slab by slab, pass after pass."""

    def __init__(self):
        self.passes = 0
        self.sums = dict.fromkeys(("cells", "active", "pinched", "between", "columns", "runs", "run_cells"), 0)
        self.sums.update(dict.fromkeys(("bulk", "active_bulk", "pore", "thickness"), 0.0))
        self.extremes: dict[str, tuple[float, float]] = {}
        self.cell_values = {name: Percentiles(PERCENTILES, "linear") for name in CELL_VALUES}
        self.measures = {axis: {"coefficient_of_variation": CoefficientOfVariation(),
                                "dykstra_parsons": DykstraParsons(), "lorenz": LorenzCurve()} for axis in AXES}

    def _every(self):
        return [*self.cell_values.values(), *(m for axis in self.measures.values() for m in axis.values())]

    @property
    def done(self) -> bool:
        return self.passes > 0 and all(m.done for m in self._every())

    def feed(self, cells: GridArrays) -> None:
        """One slab in the current pass."""
        if self.passes == 0:
            self._first(cells)
        active = cells.active
        for name, statistics in self.cell_values.items():
            if not statistics.done:
                statistics.feed(getattr(cells, name)[active])
        if not all(m.done for axis in self.measures.values() for m in axis.values()):
            weight = cells.bulk_volume[active]
            storage = (cells.porosity * cells.ntg)[active]
            for axis, k in zip(AXES, cells.flow_permeability()):
                k, measures = k[active], self.measures[axis]
                for name, measure in measures.items():
                    if not measure.done:
                        measure.feed(k, storage, weight) if name == "lorenz" else measure.feed(k, weight)

    def end_pass(self) -> None:
        for measure in self._every():
            if not measure.done:
                measure.end_pass()
        self.passes += 1

    def _first(self, cells: GridArrays) -> None:
        """Counts, extremes and sums: the first pass only."""
        bulk, column = cells.bulk_volume, cells.dz.sum(axis=2)
        positive = cells.dz[cells.dz > 0]
        runs, run_cells = _runs_between_active(cells.dz, cells.active)   # exact: slabs hold whole columns
        for key, value in (("cells", cells.active.size), ("active", np.count_nonzero(cells.active)),
                           ("pinched", np.count_nonzero(cells.dz == 0)),
                           ("between", _pinched_between_active(cells.dz, cells.active)), ("columns", column.size),
                           ("runs", runs), ("run_cells", run_cells),
                           ("bulk", bulk.sum()), ("active_bulk", bulk[cells.active].sum()),
                           ("pore", cells.pore_volume.sum()), ("thickness", column.sum())):
            self.sums[key] += value
        for key, values in (("dz", cells.dz), ("dz_positive", positive), ("column", column)):
            if values.size:
                low, high = self.extremes.get(key, (math.inf, -math.inf))
                self.extremes[key] = (min(low, float(values.min())), max(high, float(values.max())))

    def counts(self, shape) -> dict:
        return {"shape": [int(n) for n in shape], "cells": int(self.sums["cells"]), "active_cells": int(self.sums["active"]),
                "pinched_cells": int(self.sums["pinched"]), "pinched_between_active": int(self.sums["between"])}

    def sizes(self) -> dict:
        low, high = self.extremes["dz"]
        column = self.extremes["column"]
        return {"dz": {"min": low, "max": high},
                "dz_min_positive": self.extremes.get("dz_positive", (math.nan,))[0],
                "thickness": {"min": column[0], "max": column[1],
                              "mean": float(self.sums["thickness"] / self.sums["columns"])}}

    def volumes(self) -> dict:
        return {"units": "m3", **{key: float(self.sums[key]) for key in ("bulk", "active_bulk", "pore")}}

    def values(self) -> dict:
        out = {}
        for name, statistics in self.cell_values.items():
            if statistics.count == 0:
                entry = dict.fromkeys(STATISTICS, math.nan)
            else:
                p10, p50, p90 = statistics.result()
                entry = {"min": statistics.minimum, "p10": float(p10), "p50": float(p50), "p90": float(p90),
                         "max": statistics.maximum, "mean": statistics.sum / statistics.count}
            out[name] = {"units": UNITS[name], **entry}
        return out

    def heterogeneity(self) -> dict:
        out = {}
        for axis, measures in self.measures.items():
            lorenz, bound = measures["lorenz"].result()
            out[axis] = {"permeability": FLOW_PERMEABILITY[axis],
                         "coefficient_of_variation": measures["coefficient_of_variation"].result(),
                         "dykstra_parsons": measures["dykstra_parsons"].result(), "lorenz": lorenz,
                         "lorenz_bound": bound}
        return out


