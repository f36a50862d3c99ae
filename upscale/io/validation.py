"""Checking a Dataset against the field schema and normalising it (units, dz, active
cells). Every refusal is an :class:`~upscale.errors.InputError` naming the variable, the
problem, the number of bad cells and the first of them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..core.units import LENGTH_TO_M, PERMEABILITY_TO_MD
from ..errors import InputError
from .schema import PERMEABILITY


@dataclass(frozen=True)
class Check:
    """One rule on the cells.

    Parameters
    ----------
    mask : xarray.DataArray
        True at the bad cells (numpy- or dask-backed).
    name : str
        The variable the rule is about.
    problem : str
        What is wrong with the bad cells, e.g. "is negative".
    fix : str
        A hint for the user, ending the message.
    """

    mask: xr.DataArray
    name: str
    problem: str
    fix: str


def first_flat_index(mask) -> int:
    """C-order flat index of the first set cell of a numpy or dask boolean array."""
    if not hasattr(mask, "dask"):
        return int(np.argmax(np.ravel(mask)))
    import dask.array as da

    def first(block, block_info=None):
        """Global flat index of the block's first set cell (int64 max if none)."""
        found = np.flatnonzero(block)
        if found.size == 0:
            return np.full((1,) * block.ndim, np.iinfo(np.int64).max)
        local = np.unravel_index(found[0], block.shape)
        where = [lo + i for (lo, _), i in zip(block_info[0]["array-location"], local)]
        return np.full((1,) * block.ndim, np.ravel_multi_index(where, mask.shape))

    return int(da.map_blocks(first, mask, dtype=np.int64, chunks=(1,) * mask.ndim).min().compute(scheduler="threads"))


def count_bad(checks: list[Check]) -> tuple[int, ...]:
    """Count the bad cells of every check.

    A lazy field is counted slab by slab along x (its chunks along x), one slab at a
    time, so that the pass holds one slab in memory.

    Parameters
    ----------
    checks : list of Check
        The rules to count.

    Returns
    -------
    tuple of int
        Bad cells of each check, in the order of ``checks``.
    """
    import dask

    cube = next((c.mask for c in checks if c.mask.chunks is not None and c.mask.ndim == 3), None)
    if cube is None:
        return tuple(int(n) for n in dask.compute(*[c.mask.data.sum() for c in checks], scheduler="sync"))
    edges = np.cumsum((0,) + cube.chunksizes["x"])
    totals = np.zeros(len(checks), dtype=np.int64)
    for first, (start, stop) in enumerate(zip(edges[:-1], edges[1:])):
        parts = [c.mask.isel(x=slice(start, stop)).data.sum() if "x" in c.mask.dims
                 else (c.mask.data.sum() if first == 0 else 0) for c in checks]
        totals += np.array(dask.compute(*parts, scheduler="sync"), dtype=np.int64)
    return tuple(int(n) for n in totals)


def refuse_first(checks: list[Check], counts: tuple[int, ...], where: str) -> None:
    """Raise for the first check with bad cells: its count, first index and hint.

    Parameters
    ----------
    checks : list of Check
        The rules, in the order they are judged.
    counts : tuple of int
        Bad cells of each check (:func:`count_bad`).
    where : str
        What the message names first (a file, or "field", "coarse grid").

    Raises
    ------
    InputError
        For the first check whose count is not 0; nothing when all are 0.
    """
    for check, count in zip(checks, counts):
        if count:
            index = np.unravel_index(first_flat_index(check.mask.data), check.mask.shape)
            at = "(" + ", ".join(f"{d}={i}" for d, i in zip(check.mask.dims, index)) + ")"
            raise InputError(f"{where}: variable '{check.name}' {check.problem} in {count} cell(s), first at "
                             f"{at}; {check.fix}")


def _unit_scale(ds: xr.Dataset, name: str, where: str, table: dict, default: str, wanted: str) -> float:
    """Factor converting variable ``name`` from its ``units`` attribute (``default`` when
    absent) with ``table``; an unknown unit is refused, naming the ones accepted."""
    units = str(ds[name].attrs.get("units", default)).strip()
    scale = table.get(units.lower())
    if scale is None:
        raise InputError(f"{where}: variable '{name}' has unknown units {units!r}; use {wanted}")
    return scale


def _length_scale(ds: xr.Dataset, name: str, where: str) -> float:
    """Factor from the units of length variable ``name`` to metres."""
    return _unit_scale(ds, name, where, LENGTH_TO_M, "m", "'m' or 'ft'")


def _permeability_scale(ds: xr.Dataset, name: str, where: str) -> float:
    """Factor from the units of permeability variable ``name`` to mD."""
    return _unit_scale(ds, name, where, PERMEABILITY_TO_MD, "mD", "'mD'")


def _require_dims(ds: xr.Dataset, name: str, allowed: tuple[tuple[str, ...], ...], where: str) -> None:
    """Refuse variable ``name`` unless its dimensions are one of ``allowed``; a mere
    wrong order is told apart, with the transpose that fixes it."""
    dims = ds[name].dims
    if dims in allowed:
        return
    wanted = " or ".join("(" + ", ".join(a) + ")" for a in allowed)
    got = "(" + ", ".join(dims) + ")"
    if any(sorted(dims) == sorted(a) for a in allowed):
        raise InputError(f"{where}: variable '{name}' has dimension order {got}, expected {wanted}; "
                         f"transpose it, e.g. ds.transpose('x', 'y', 'z')")
    raise InputError(f"{where}: variable '{name}' has dimensions {got}, expected {wanted}")


def _require_variables(ds: xr.Dataset, where: str) -> bool:
    """Refuse a dataset missing a required variable; True when it holds the permeability
    tensor kx, ky, kz (else it holds one isotropic ``k``)."""
    missing = [n for n in ("dx", "dy", "dz", "porosity") if n not in ds]
    has_tensor = all(n in ds for n in PERMEABILITY)
    if not has_tensor and "k" not in ds:
        present = [n for n in PERMEABILITY if n in ds]
        missing += [n for n in PERMEABILITY if n not in ds] if present else ["kx, ky, kz (or k)"]
    if missing:
        found = ", ".join(sorted(map(str, ds.data_vars))) or "none"
        raise InputError(f"{where}: missing variable(s) {', '.join(missing)} (found: {found})")
    return has_tensor


def _require_grid(ds: xr.Dataset, where: str) -> None:
    """Refuse a dataset without the dimensions x, y, z, or with one of length 0."""
    for name in AXES:
        if name not in ds.dims:
            raise InputError(f"{where}: missing dimension '{name}' (dimensions are x, y, z)")
        if ds.sizes[name] == 0:
            raise InputError(f"{where}: dimension '{name}' has length 0")


def _require_layout(ds: xr.Dataset, k_names: tuple[str, ...], where: str) -> None:
    """Refuse schema variables on the wrong dimensions or not holding numbers."""
    _require_dims(ds, "dx", (("x",),), where)
    _require_dims(ds, "dy", (("y",),), where)
    _require_dims(ds, "dz", (("z",), AXES), where)
    optional = [n for n in ("ntg", "active") if n in ds]
    for name in (*k_names, "porosity", *optional):
        _require_dims(ds, name, (AXES,), where)
    for name in ("dx", "dy", "dz", *k_names, "porosity", *optional):
        if ds[name].dtype.kind not in "biuf":
            raise InputError(f"{where}: variable '{name}' is not numeric (type {ds[name].dtype}); "
                             f"store it as numbers")


def _floats(ds: xr.Dataset, name: str, scale: float = 1.0) -> xr.DataArray:
    """Variable ``name`` as floats times ``scale``, without its coordinates."""
    return xr.DataArray(ds[name].variable.astype(float) * scale)


def _size_checks(sizes: dict[str, xr.DataArray]) -> list[Check]:
    """The rules on dx, dy, dz (m): finite; dx, dy > 0; dz >= 0 (0 = pinched out)."""
    checks = []
    for name, values in sizes.items():
        checks.append(Check(~np.isfinite(values), name, "is NaN or infinite", "cell sizes must be finite"))
        if name == "dz":
            checks.append(Check(values < 0, name, "is negative", "thickness must be >= 0 (0 = pinched out)"))
        else:
            checks.append(Check(values <= 0, name, "is zero or negative", "cell sizes must be > 0"))
    return checks


def _active_cells(ds: xr.Dataset, dz: xr.DataArray) -> tuple[xr.DataArray, list[Check]]:
    """The active cells (dz > 0 and, when present, ``active`` == 1), and the rule on the
    ``active`` flag itself (none without one)."""
    active = dz > 0
    if "active" not in ds:
        return active, []
    flag = _floats(ds, "active")
    check = Check(~flag.isin((0.0, 1.0)), "active", "is not 0 or 1", "use 1 for active, 0 for inactive")
    return active & (flag == 1.0), [check]


def _cell_values(ds: xr.Dataset, k_names: tuple[str, ...], template: xr.DataArray,
                 where: str) -> dict[str, xr.DataArray]:
    """Permeability (mD), porosity and ntg (1 when absent) as floats, by name."""
    values = {name: _floats(ds, name, _permeability_scale(ds, name, where)) for name in k_names}
    values["porosity"] = _floats(ds, "porosity")
    values["ntg"] = _floats(ds, "ntg") if "ntg" in ds else xr.ones_like(template, dtype=float)
    return values


def _value_checks(values: dict[str, xr.DataArray], active: xr.DataArray) -> list[Check]:
    """The rules on the cell values in active cells: finite, >= 0, fractions <= 1."""
    checks = []
    for name, data in values.items():
        fix = ("flag such cells inactive with an 'active' variable, or fill them" if name != "ntg"
               else "flag such cells inactive, or fill them")
        checks.append(Check(active & ~np.isfinite(data), name, "is NaN or infinite in active cells", fix))
        checks.append(Check(active & (data < 0), name, "is negative in active cells",
                            "permeability and fractions must be >= 0"))
        if name in ("porosity", "ntg"):
            checks.append(Check(active & (data > 1), name, "is above 1 in active cells",
                                "give fractions (0..1), not percent"))
    return checks


def _refuse_bad_cells(size_checks: list[Check], checks: list[Check], active: xr.DataArray, where: str) -> None:
    """Judge the cell sizes first (the other rules read dz), then refuse a field without
    any active cell, then judge the remaining rules."""
    refuse_first(size_checks, count_bad(size_checks), where)
    inactive, *counts = count_bad([Check(~active, "active", "", "")] + checks)
    if inactive == active.size:
        raise InputError(f"{where}: no active cell (all cells pinched out or flagged inactive)")
    refuse_first(checks, tuple(counts), where)


def _normalised(ds: xr.Dataset, sizes: dict[str, xr.DataArray], dz: xr.DataArray, active: xr.DataArray,
                values: dict[str, xr.DataArray]) -> xr.Dataset:
    """The normalised dataset: metres, mD, 3-D dz, zeros in inactive cells, the input's
    attributes and its other variables unchanged."""
    normal = {n: xr.where(active, values[n], 0.0) for n in (*PERMEABILITY, "porosity", "ntg")}
    out = xr.Dataset(
        {
            "dx": (("x",), sizes["dx"].data, {"units": "m"}),
            "dy": (("y",), sizes["dy"].data, {"units": "m"}),
            # in memory, a real array rather than the broadcast view of a dz(z): kernels read it often
            "dz": (AXES, dz.data if dz.chunks is not None else np.ascontiguousarray(dz.data), {"units": "m"}),
            **{n: (AXES, normal[n].data, {"units": "mD"}) for n in PERMEABILITY},
            "porosity": (AXES, normal["porosity"].data, {"units": "1"}),
            "ntg": (AXES, normal["ntg"].data, {"units": "1"}),
            "active": (AXES, active.astype(np.int8).data, {}),
        },
        attrs=dict(ds.attrs),
    )
    for name in ds.data_vars:
        if name not in out and name != "k":
            out[name] = ds[name]  # carried along unchanged: coarse-file extras such as tx, x_start
    out.attrs["length_units_in"] = _units_in(ds, "dx", "length_units_in")
    out.attrs["dz_units_in"] = _units_in(ds, "dz", "dz_units_in")
    return out


def _units_in(ds: xr.Dataset, name: str, key: str) -> str:
    """The units variable ``name`` was read in: its ``units``, or for a field normalised
    already (in m, with ``key`` recorded) the units recorded then."""
    units = str(ds[name].attrs.get("units", "m"))
    return str(ds.attrs[key]) if key in ds.attrs and units == "m" else units


#: the variables of a normalised field, their dimensions and units
NORMALISED = {"dx": (("x",), "m"), "dy": (("y",), "m"), "dz": (AXES, "m"), **{n: (AXES, "mD") for n in PERMEABILITY},
              "porosity": (AXES, "1"), "ntg": (AXES, "1")}


def _passes_as_normalised(ds: xr.Dataset) -> bool:
    """Whether ``ds`` is a normalised field in memory (as :func:`validate` returns it) whose
    cells pass every rule, so that validating it again would return the same data.

    One reduction or two per variable instead of the rules' masks and copies (``coarsen``
    validates what ``open_field`` already validated); any doubt returns False and the full
    rules run, with their messages.
    """
    recorded = {"length_units_in", "dz_units_in"} <= ds.attrs.keys()
    layout = recorded and "k" not in ds and not ds.coords and "active" in ds
    layout = layout and all(name in ds and ds[name].dims == dims and ds[name].attrs.get("units") == units
                            and ds[name].dtype == np.float64 for name, (dims, units) in NORMALISED.items())
    if not layout or ds["active"].dims != AXES or ds["active"].dtype != np.int8 or is_lazy(ds):
        return False
    values = {name: ds[name].values for name in (*NORMALISED, "active")}
    flag = values.pop("active")
    if not (flag.min() >= 0 and flag.max() <= 1 and flag.any()):
        return False
    active = flag.view(bool)
    dx, dy, dz = values.pop("dx"), values.pop("dy"), values.pop("dz")
    sizes = dx.min() > 0 and dy.min() > 0 and dz.min() >= 0 and np.isfinite([dx.max(), dy.max(), dz.max()]).all()
    if not sizes or np.any((dz <= 0) & active):
        return False
    inactive = None if active.all() else ~active
    for name, cell in values.items():
        top = 1.0 if name in ("porosity", "ntg") else np.inf
        if not (cell.min() >= 0 and cell.max() <= top and np.isfinite(cell.max())):
            return False  # NaN fails both comparisons
        if inactive is not None and np.any(cell[inactive]):
            return False  # the full rules put zeros in inactive cells
    return True


def is_lazy(ds: xr.Dataset) -> bool:
    """Does the dataset hold dask (lazy) arrays?"""
    return any(v.chunks is not None for v in ds.variables.values())


def validate(ds: xr.Dataset, where: str = "field") -> xr.Dataset:
    """Check a dataset against the fine-field schema and return it normalised.

    Numpy- and dask-backed datasets go through the same rules; for a lazy one the cell
    checks run chunk by chunk and the result stays lazy. A normalised field in memory
    whose cells pass every rule is returned as it is.

    Parameters
    ----------
    ds : xarray.Dataset
        A field in the schema (:mod:`upscale.io.schema`): dx (x,), dy (y,), dz (z,) or
        (x, y, z), kx, ky, kz (or one ``k``), porosity, optionally ntg and active.
    where : str
        What refusals name first; the default "field" gives way to the dataset's
        ``source_path`` attribute when it has one.

    Returns
    -------
    xarray.Dataset
        The normalised field (see the module doc of :mod:`upscale.io.schema`), with the
        input's other variables and attributes, and ``length_units_in``.

    Raises
    ------
    InputError
        Naming the variable, the problem, the number of bad cells and the first of them.
    """
    if _passes_as_normalised(ds):
        return ds
    where = ds.attrs.get("source_path", where) if where == "field" else where
    k_names = PERMEABILITY if _require_variables(ds, where) else ("k",)
    _require_grid(ds, where)
    _require_layout(ds, k_names, where)
    sizes = {n: _floats(ds, n, _length_scale(ds, n, where)) for n in ("dx", "dy", "dz")}
    size_checks = _size_checks(sizes)
    template = xr.DataArray(ds[k_names[0]].variable)
    dz = sizes["dz"].broadcast_like(template).transpose(*AXES)
    active, checks = _active_cells(ds, dz)
    values = _cell_values(ds, k_names, template, where)
    _refuse_bad_cells(size_checks, checks + _value_checks(values, active), active, where)
    if k_names == ("k",):
        values.update(kx=values["k"], ky=values["k"], kz=values["k"])
    return _normalised(ds, sizes, dz, active, values)
