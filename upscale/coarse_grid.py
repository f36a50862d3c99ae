"""Build the coarse grid: partition, upscale permeability, conserve pore volume, faces.

The coarse Dataset is itself a valid field (see DESIGN.md, coarse grid schema): its
``kx``, ``ky`` are net values (``kx * ntg`` is the effective horizontal permeability),
``kz`` is effective as written, and ``pore_volume`` equals the sum of fine pore volumes.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from datetime import datetime, timezone

import numpy as np
import xarray as xr

from .errors import InputError
from .field import FineArrays, arrays, validate
from .local import BATCH_BYTES, BOUNDARY_CONDITIONS, flow_tensors
from .partition import AXES, Partition, make_partition
from .static import STATIC_METHODS, block_length, cardwell_parsons, divide_or_zero, static_average
from .tpfa import cell_geometry, half_transmissibility, harmonic_pair
from .transmissibility import (flow_transmissibility, multipliers as face_multipliers, sealed_and_face_flow,
                               unit_system)
from .version import tool_version

log = logging.getLogger(__name__)
METHODS = STATIC_METHODS + ("flow",)
FULL_TENSOR = ("periodic", "linear")


def parse_methods(method) -> tuple[str, str, str]:
    """One method for all axes, 'mx,my,mz', a 3-sequence, or a mapping axis -> method."""
    if isinstance(method, str):
        names = [m.strip() for m in method.split(",")]
        names = names * 3 if len(names) == 1 else names
    elif isinstance(method, dict):
        missing = [a for a in AXES if a not in method]
        if missing or set(method) - set(AXES):
            raise InputError(f"per-direction methods need exactly the axes x, y, z, got {sorted(method)}")
        names = [method[a] for a in AXES]
    else:
        names = list(method)
    if len(names) != 3:
        raise InputError(f"give one method or three (x, y, z), got {len(names)}: {names}")
    for name in names:
        if name not in METHODS:
            raise InputError(f"unknown method '{name}'; choose from {', '.join(METHODS)}")
    return tuple(names)


def _method_label(methods: tuple[str, str, str]) -> str:
    if len(set(methods)) == 1:
        return methods[0]
    return ", ".join(f"{a}: {m}" for a, m in zip(AXES, methods))


@dataclass(frozen=True)
class Recipe:
    """What ``coarsen`` computes: methods per axis, local boundary condition and border
    (fine cells), power exponent, flow-based multipliers, transmissibility units."""

    methods: tuple[str, str, str]
    bc: str
    border: int
    omega: float | None
    multipliers: bool
    units: str

    @property
    def flow(self) -> bool:
        return "flow" in self.methods

    @property
    def full(self) -> bool:
        """A full tensor (kxy, kxz, kyz) is written."""
        return self.flow and self.bc in FULL_TENSOR

    def halo(self, partition: Partition) -> tuple[tuple[int, int, int], tuple[int, int, int]]:
        """Fine cells a box of whole blocks needs beyond its own, below and above per axis:
        the border ring of the local solves, and for face problems the next block too."""
        ring = self.border if (self.flow or self.multipliers) else 0
        high = [ring + (int(partition.sizes(a).max()) if self.multipliers else 0) for a in range(3)]
        return (ring,) * 3, tuple(high)


def make_recipe(method="flow", bc: str = "sealed", border: int = 0, omega: float | None = None,
                multipliers: bool = False, units: str = "metric") -> Recipe:
    """Check ``coarsen``'s options (InputError naming the bad one) and gather them."""
    methods = parse_methods(method)
    if "flow" in methods and bc not in BOUNDARY_CONDITIONS:
        raise InputError(f"unknown boundary condition '{bc}'; choose from {', '.join(BOUNDARY_CONDITIONS)}")
    if bc in FULL_TENSOR and "flow" in methods and set(methods) != {"flow"}:
        raise InputError(f"boundary condition '{bc}' gives a full tensor: use method 'flow' on all axes")
    if "power" in methods and (omega is None or not np.isfinite(omega)):
        raise InputError("method 'power' needs a finite exponent omega (e.g. --omega 0.5)")
    if border < 0 or int(border) != border:
        raise InputError(f"border must be a whole number of fine cells >= 0, got {border}")
    unit_system(units)
    return Recipe(methods, bc if "flow" in methods else "none", int(border), omega, bool(multipliers), units)


def coarsen(fine: xr.Dataset, ratio=None, edges: dict | None = None, method="flow",
            bc: str = "sealed", border: int = 0, omega: float | None = None,
            multipliers: bool = False, units: str = "metric", progress=None,
            memory: int | None = None, box: tuple[int, int, int] | None = None) -> xr.Dataset:
    """Coarsen a fine field.

    ratio: (rx, ry, rz) fine cells per coarse cell (remainders give a smaller last block);
    edges: fine-index edges per axis, e.g. ``{"z": [0, 3, 10, 20]}``; method: one of
    arithmetic, harmonic, geometric, power (with ``omega``) or flow, or one per axis
    ("arithmetic,arithmetic,harmonic" or a dict); bc, border: local boundary condition and
    border ring (fine cells) for ``flow``; multipliers: compute flow-based transmissibility
    multipliers; units: transmissibility units, metric or field.

    A lazy field (``open_field(path, chunks=...)``) gives a lazy result, computed when
    written (:func:`upscale.write`) or loaded: boxes of ``box`` whole coarse blocks per
    axis, or sized so that a process holding one stays within ``memory`` bytes
    (:mod:`upscale.parallel`). ``progress`` (in-memory fields only) receives the number
    of blocks finished by each batch of local solves.
    """
    recipe = make_recipe(method, bc, border, omega, multipliers, units)
    if is_lazy(fine):
        from .parallel import lazy_block_variables

        if "length_units_in" not in fine.attrs:  # not from open_field / validate: check it (one pass)
            fine = validate(fine)
        partition = make_partition(tuple(fine.sizes[d] for d in AXES), ratio=ratio, edges=edges)
        variables = lazy_block_variables(fine, partition, recipe, memory, box)
        return assemble(variables, fine, partition, recipe)
    fine = validate(fine)
    cells = arrays(fine)
    partition = make_partition(cells.shape, ratio=ratio, edges=edges)
    everything = tuple(slice(0, n) for n in partition.shape)
    variables = block_variables(cells, partition, everything, recipe, progress=progress)
    coarse = assemble(variables, fine, partition, recipe)
    warn_flagged(coarse)
    return coarse


def is_lazy(ds: xr.Dataset) -> bool:
    """Does the dataset hold dask (lazy) arrays?"""
    return any(v.chunks is not None for v in ds.variables.values())


def block_variables(cells: FineArrays, partition: Partition, blocks: tuple[slice, slice, slice],
                    recipe: Recipe, progress=None, budget: int = BATCH_BYTES) -> dict[str, np.ndarray]:
    """Everything ``coarsen`` writes per coarse block, for the box ``blocks`` (coarse index
    slices of ``partition``), from ``cells``, which hold the box and its halo
    (:meth:`Recipe.halo`).

    Per block: dz, kx, ky, kz (and kxy, kxz, kyz), porosity, ntg, pore and bulk volume,
    active, the Cardwell-Parsons bounds, solve residuals; ``half_x`` ... half-cell
    transmissibilities in the recipe's units (for the faces); with multipliers
    ``tx_flow`` ... on the faces after each block of the box (none after the grid's last).
    """
    box = tuple(slice(int(partition.edges[a][b.start]), int(partition.edges[a][b.stop])) for a, b in enumerate(blocks))
    core = cells.crop(box)
    core_partition = partition.crop(blocks)
    shape = core_partition.shape
    only = tuple(np.arange(b.start, b.stop) for b in blocks)
    volumes = _volumes(core, core_partition)
    k_flow = core.flow_permeability()
    weight = core.bulk_volume * core.active
    effective = np.zeros(shape + (3, 3))
    out = {}
    solves = dict(border=recipe.border, progress=progress, budget=budget, only=only)
    together = recipe.flow and recipe.multipliers and recipe.bc == "sealed"
    if together:  # the sealed solves share their elimination with the face problems
        flow, faces, residuals = sealed_and_face_flow(cells, partition, units=recipe.units, **solves)
    elif recipe.flow:
        flow = flow_tensors(cells, partition, bc=recipe.bc, **solves)
    if recipe.flow:
        effective[:] = flow.tensor[blocks]
        out["solve_residual"] = flow.residual[blocks]
        if recipe.bc == "linear":
            out["tensor_asymmetry"] = flow.asymmetry[blocks]
    for axis, name in enumerate(recipe.methods):
        if name != "flow":
            effective[..., axis, axis] = static_average(k_flow[axis], weight, core_partition, name, recipe.omega)
    if not recipe.full:
        effective *= np.eye(3)
    active = volumes["active"]
    k = np.where(active[..., None, None], effective, 0.0)
    # Net convention: horizontal components are divided by ntg, vertical ones are effective.
    net = np.where(HORIZONTAL, divide_or_zero(k, volumes["ntg"][..., None, None]), k)
    dx = np.add.reduceat(core.dx, core_partition.edges[0][:-1])
    dy = np.add.reduceat(core.dy, core_partition.edges[1][:-1])
    dz = block_length(core_partition, core.dx, core.dy, core.dz, 2)
    out.update(dz=dz, kx=net[..., 0, 0], ky=net[..., 1, 1], kz=net[..., 2, 2], porosity=volumes["porosity"],
               ntg=volumes["ntg"], pore_volume=volumes["pore"], bulk_volume=volumes["bulk"],
               active=active.astype(np.int8))
    if recipe.full:
        out.update(kxy=net[..., 0, 1], kxz=net[..., 0, 2], kyz=net[..., 1, 2])
    _, constant, to_length = unit_system(recipe.units)
    volume, lengths = cell_geometry(dx, dy, dz)
    for axis, name in enumerate(AXES):
        lower, upper = cardwell_parsons(k_flow[axis], core.dx, core.dy, core.dz, core_partition, axis)
        out[f"k{name}_lower_bound"], out[f"k{name}_upper_bound"] = lower, upper
        # T scales with length (A / L): mD*m -> mD*ft multiplies by the metres-to-feet factor.
        out[f"half_{name}"] = constant * to_length * half_transmissibility(k[..., axis, axis], volume, lengths[axis])
    if recipe.multipliers:
        if not together:
            faces, residuals = flow_transmissibility(cells, partition, units=recipe.units, **solves)
        residual = out.get("solve_residual", np.zeros(shape))
        for axis, name in enumerate(AXES):
            owned = list(blocks)
            owned[axis] = slice(blocks[axis].start, min(blocks[axis].stop, partition.shape[axis] - 1))
            out[f"t{name}_flow"] = faces[axis][tuple(owned)]
            local = tuple(slice(0, o.stop - o.start) for o in owned)
            residual[local] = np.maximum(residual[local], residuals[axis][tuple(owned)])
        out["solve_residual"] = residual
    return out


def block_variable_names(recipe: Recipe) -> list[str]:
    """The names :func:`block_variables` returns for ``recipe`` (a lazy run declares
    them before any box is computed)."""
    names = ["dz", "kx", "ky", "kz", "porosity", "ntg", "pore_volume", "bulk_volume", "active"]
    if recipe.flow or recipe.multipliers:
        names.append("solve_residual")
    if recipe.flow and recipe.bc == "linear":
        names.append("tensor_asymmetry")
    if recipe.full:
        names += ["kxy", "kxz", "kyz"]
    names += [f"k{a}_{side}_bound" for a in AXES for side in ("lower", "upper")]
    names += [f"half_{a}" for a in AXES]
    if recipe.multipliers:
        names += [f"t{a}_flow" for a in AXES]
    return names


HORIZONTAL = np.array([[1, 1, 0], [1, 1, 0], [0, 0, 0]], dtype=bool)

#: attributes of the per-block variables written to a coarse file
BLOCK_ATTRS = {
    "dz": {"units": "m", "long_name": "coarse cell mean thickness"},
    "kx": {"units": "mD", "long_name": "net permeability along x (times ntg: effective)"},
    "ky": {"units": "mD", "long_name": "net permeability along y (times ntg: effective)"},
    "kz": {"units": "mD", "long_name": "effective permeability along z"},
    "kxy": {"units": "mD", "long_name": "net xy permeability (times ntg: effective)"},
    "kxz": {"units": "mD", "long_name": "effective xz permeability"},
    "kyz": {"units": "mD", "long_name": "effective yz permeability"},
    "porosity": {"units": "1"},
    "ntg": {"units": "1", "long_name": "net-to-gross"},
    "pore_volume": {"units": "m3"},
    "bulk_volume": {"units": "m3"},
    "active": {"long_name": "active coarse cell (has an active fine cell)"},
    "solve_residual": {"long_name": "largest relative residual of the local solves (blocks and faces)"},
    "tensor_asymmetry": {"long_name": "||K - K^T|| / ||K|| of the local tensor before symmetrising"},
    **{f"k{a}_{side}_bound": {"units": "mD", "long_name": f"Cardwell-Parsons {side} bound along {a} (effective)"}
       for a in AXES for side in ("lower", "upper")},
}


def _blockwise(function, *values):
    """``function`` on numpy arrays, or chunk by chunk on dask arrays, on the chunks of
    the first (the others are rechunked to match)."""
    if hasattr(values[0], "dask"):
        import dask.array as da

        chunks = values[0].chunks
        return da.map_blocks(function, *[v.rechunk(chunks) for v in values], dtype=float)
    return function(*values)


def assemble(variables: dict, fine: xr.Dataset, partition: Partition, recipe: Recipe) -> xr.Dataset:
    """The coarse Dataset from :func:`block_variables` (numpy, or dask for a lazy field):
    per-block variables, cell sizes, fine index ranges, face transmissibilities from the
    written permeability (harmonic pair of the half-cell values) and multipliers."""
    cell = AXES
    dx_fine, dy_fine = (np.asarray(fine[n].values, dtype=float) for n in ("dx", "dy"))  # m (normalised)
    data = {
        "dx": (("x",), np.add.reduceat(dx_fine, partition.edges[0][:-1]),
               {"units": "m", "long_name": "coarse cell size along x"}),
        "dy": (("y",), np.add.reduceat(dy_fine, partition.edges[1][:-1]),
               {"units": "m", "long_name": "coarse cell size along y"}),
    }
    for name, attrs in BLOCK_ATTRS.items():
        if name in variables:
            data[name] = (cell, variables[name], attrs)
    for axis, name in enumerate(AXES):
        e = partition.edges[axis]
        data[f"{name}_start"] = ((name,), e[:-1].astype(np.int32), {"long_name": f"first fine {name} index"})
        data[f"{name}_stop"] = ((name,), e[1:].astype(np.int32), {"long_name": f"fine {name} index past the block"})
    unit_name, _, _ = unit_system(recipe.units)
    for axis, name in enumerate(AXES):
        dims = tuple(f"{name}_face" if d == name else d for d in cell)
        half = variables[f"half_{name}"]
        n = half.shape[axis]
        first = half[tuple(slice(0, n - 1) if a == axis else slice(None) for a in range(3))]
        second = half[tuple(slice(1, n) if a == axis else slice(None) for a in range(3))]
        t = _blockwise(harmonic_pair, first, second)
        data[f"t{name}"] = (dims, t, {"units": unit_name, "long_name":
                                     f"transmissibility between coarse cells i and i+1 along {name}"})
        if recipe.multipliers:
            data[f"t{name}_multiplier"] = (dims, _blockwise(face_multipliers, variables[f"t{name}_flow"], t), {
                "units": "1", "long_name": f"flow-based transmissibility multiplier on {name} faces",
                "computed": "flow-based: two-block local solve, relative to the written permeability"})
        else:
            data[f"t{name}_multiplier"] = (dims, _blockwise(np.ones_like, t), {
                "units": "1", "long_name": f"transmissibility multiplier on {name} faces",
                "computed": "no: all 1; request flow-based multipliers (multipliers=True) to compute them"})
    coarse = xr.Dataset({n: xr.Variable(*spec) for n, spec in data.items()})
    coarse.attrs.update(_provenance(fine, partition, recipe))
    return coarse


def warn_flagged(coarse: xr.Dataset) -> None:
    """Warn about large local-solve residuals, active blocks that do not flow along an
    axis, and sealed flow-based values outside the Cardwell-Parsons bounds (beyond
    round-off), which would be a fault."""
    if "solve_residual" in coarse:
        worst = float(coarse["solve_residual"].max())
        if worst > 1e-10:
            log.warning("largest relative residual of the local solves is %.2e (> 1e-10)", worst)
    active = coarse["active"].values.astype(bool)
    label = str(coarse.attrs.get("method", "flow"))
    methods = parse_methods(",".join(part.split(": ")[-1] for part in label.split(", ")))
    ntg = coarse["ntg"].values
    for axis, name in enumerate(AXES):
        k = coarse[f"k{name}"].values * (ntg if axis < 2 else 1.0)
        closed = active & (k == 0)
        if closed.any():
            first = tuple(int(i) for i in np.argwhere(closed)[0])
            log.warning("%d active coarse block(s) have zero k%s (no connected path across), first at %s",
                        int(closed.sum()), name, first)
        bordered = int(coarse.attrs.get("border", 0)) > 0  # the bounds bracket the block alone
        if methods[axis] != "flow" or coarse.attrs.get("boundary_condition") != "sealed" or bordered:
            continue
        lower = coarse[f"k{name}_lower_bound"].values
        upper = coarse[f"k{name}_upper_bound"].values
        outside = active & ((k < lower * (1 - 1e-8)) | (k > upper * (1 + 1e-8)))
        if outside.any():
            first = tuple(int(i) for i in np.argwhere(outside)[0])
            log.warning("%d coarse block(s) have sealed flow-based k%s outside the Cardwell-Parsons "
                        "bounds, first at %s: please report this", int(outside.sum()), name, first)


def _volumes(cells: FineArrays, partition: Partition) -> dict[str, np.ndarray]:
    """Coarse bulk and pore volume (m3), net-to-gross and porosity conserving pore volume."""
    bulk = partition.block_sum(cells.bulk_volume)
    pore = partition.block_sum(cells.pore_volume)
    net = partition.block_sum(cells.ntg * cells.bulk_volume * cells.active)
    ntg = divide_or_zero(net, bulk)
    porosity = divide_or_zero(pore, net)
    active = partition.block_sum(cells.active) > 0
    return {"bulk": bulk, "pore": pore, "ntg": ntg, "porosity": porosity, "active": active}


def _provenance(fine: xr.Dataset, partition: Partition, recipe: Recipe) -> dict:
    describe = partition.describe()
    methods, bc, border, omega, units = recipe.methods, recipe.bc, recipe.border, recipe.omega, recipe.units
    attrs = {
        "Conventions": "CF-1.10",
        "title": "coarse grid written by upscale",
        "method": _method_label(methods),
        "boundary_condition": bc,
        "border": int(border),
        "partition": "; ".join(f"{a}: {describe[a]}" for a in AXES),
        "ratio": " ".join("-" if r is None else str(r) for r in partition.ratio),
        "edges_x": " ".join(map(str, partition.edges[0])),
        "edges_y": " ".join(map(str, partition.edges[1])),
        "edges_z": " ".join(map(str, partition.edges[2])),
        "fine_shape": " ".join(map(str, partition.fine_shape)),
        "transmissibility_units": units,
        "ntg_convention": "kx, ky, kxy are net: multiply by ntg for effective; kz, kxz, kyz are effective",
        "tool": "upscale",
        "tool_version": tool_version(),
        "input_file": fine.attrs.get("source_path", ""),
        "input_sha256": fine.attrs.get("source_sha256", ""),
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "caution": "screening tool: results are to be reviewed by a qualified engineer",
    }
    if omega is not None:
        attrs["omega"] = float(omega)
    return attrs
