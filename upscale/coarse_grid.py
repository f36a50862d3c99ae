"""Build the coarse grid: partition, upscale permeability, conserve pore volume, faces.

The coarse Dataset is itself a valid field (see DESIGN.md, coarse grid schema): its
``kx``, ``ky`` are net values (``kx * ntg`` is the effective horizontal permeability),
``kz`` is effective as written, and ``pore_volume`` equals the sum of fine pore volumes.
"""

from __future__ import annotations

import logging
from datetime import datetime, timezone

import numpy as np
import xarray as xr

from .errors import InputError
from .field import FineArrays, arrays, validate
from .local import BOUNDARY_CONDITIONS, flow_tensors
from .partition import AXES, Partition, make_partition
from .static import STATIC_METHODS, block_length, cardwell_parsons, divide_or_zero, static_average
from .transmissibility import coarse_transmissibility, flow_transmissibility, multipliers as face_multipliers, unit_system
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


def coarsen(fine: xr.Dataset, ratio=None, edges: dict | None = None, method="flow",
            bc: str = "sealed", border: int = 0, omega: float | None = None,
            multipliers: bool = False, units: str = "metric", progress=None) -> xr.Dataset:
    """Coarsen a fine field.

    ratio: (rx, ry, rz) fine cells per coarse cell (remainders give a smaller last block);
    edges: fine-index edges per axis, e.g. ``{"z": [0, 3, 10, 20]}``; method: one of
    arithmetic, harmonic, geometric, power (with ``omega``) or flow, or one per axis
    ("arithmetic,arithmetic,harmonic" or a dict); bc, border: local boundary condition and
    border ring (fine cells) for ``flow``; multipliers: compute flow-based transmissibility
    multipliers; units: transmissibility units, metric or field.
    """
    fine = validate(fine)
    methods = parse_methods(method)
    if "flow" in methods and bc not in BOUNDARY_CONDITIONS:
        raise InputError(f"unknown boundary condition '{bc}'; choose from {', '.join(BOUNDARY_CONDITIONS)}")
    if bc in FULL_TENSOR and "flow" in methods and set(methods) != {"flow"}:
        raise InputError(f"boundary condition '{bc}' gives a full tensor: use method 'flow' on all axes")
    if "power" in methods and (omega is None or not np.isfinite(omega)):
        raise InputError("method 'power' needs a finite exponent omega (e.g. --omega 0.5)")
    unit_system(units)
    cells = arrays(fine)
    partition = make_partition(cells.shape, ratio=ratio, edges=edges)
    if border < 0 or int(border) != border:
        raise InputError(f"border must be a whole number of fine cells >= 0, got {border}")

    volumes = _volumes(cells, partition)
    k_flow = cells.flow_permeability()
    weight = cells.bulk_volume * cells.active
    effective = np.zeros(partition.shape + (3, 3))
    flow = None
    if "flow" in methods:
        flow = flow_tensors(cells, partition, bc=bc, border=int(border), progress=progress)
        effective[:] = flow.tensor
    for axis, name in enumerate(methods):
        if name != "flow":
            effective[..., axis, axis] = static_average(k_flow[axis], weight, partition, name, omega)
    full = flow is not None and bc in FULL_TENSOR
    if not full:
        effective *= np.eye(3)
    coarse = _dataset(cells, partition, volumes, effective, full, units)
    for axis, name in enumerate(AXES):
        lower, upper = cardwell_parsons(k_flow[axis], cells.dx, cells.dy, cells.dz, partition, axis)
        coarse[f"k{name}_lower_bound"] = (AXES, lower, {"units": "mD", "long_name":
                                          f"Cardwell-Parsons lower bound along {name} (effective)"})
        coarse[f"k{name}_upper_bound"] = (AXES, upper, {"units": "mD", "long_name":
                                          f"Cardwell-Parsons upper bound along {name} (effective)"})
    if flow is not None:
        coarse["solve_residual"] = (AXES, flow.residual, {"long_name": "largest relative residual of the local solves"})
        if bc == "linear":
            coarse["tensor_asymmetry"] = (AXES, flow.asymmetry, {
                "long_name": "||K - K^T|| / ||K|| of the local tensor before symmetrising"})
        worst = float(flow.residual.max(initial=0.0))
        if worst > 1e-10:
            log.warning("largest relative residual of the local solves is %.2e (> 1e-10)", worst)
    _warn_flagged(effective, volumes["active"], coarse,
                  sealed_axes=[a for a, m in enumerate(methods) if m == "flow" and bc == "sealed"])
    if multipliers:
        flow_faces, residuals = flow_transmissibility(cells, partition, border=int(border), units=units,
                                                      progress=progress)
        for axis, name in enumerate(AXES):
            t_name = f"t{name}"
            ratio_values = face_multipliers(flow_faces[axis], coarse[t_name].values)
            coarse[f"{t_name}_multiplier"] = (coarse[t_name].dims, ratio_values, {
                "units": "1", "long_name": f"flow-based transmissibility multiplier on {name} faces",
                "computed": "flow-based: two-block local solve, relative to the written permeability"})
            worst = float(residuals[axis].max(initial=0.0))
            if worst > 1e-10:
                log.warning("largest relative residual of the %s face solves is %.2e (> 1e-10)", name, worst)
    coarse.attrs.update(_provenance(fine, partition, methods, bc if flow is not None else "none",
                                    border, omega, units))
    return coarse


def _warn_flagged(effective: np.ndarray, active: np.ndarray, coarse: xr.Dataset, sealed_axes) -> None:
    """Warn about active blocks that do not flow along an axis, and about sealed flow-based
    values outside the Cardwell-Parsons bounds (beyond round-off), which would be a fault."""
    for axis, name in enumerate(AXES):
        k = effective[..., axis, axis]
        closed = active & (k == 0)
        if closed.any():
            first = tuple(int(i) for i in np.argwhere(closed)[0])
            log.warning("%d active coarse block(s) have zero k%s (no connected path across), first at %s",
                        int(closed.sum()), name, first)
        if axis not in sealed_axes:
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


def _dataset(cells: FineArrays, partition: Partition, volumes, effective, full: bool, units: str):
    dx = np.add.reduceat(cells.dx, partition.edges[0][:-1])
    dy = np.add.reduceat(cells.dy, partition.edges[1][:-1])
    dz = block_length(partition, cells.dx, cells.dy, cells.dz, 2)
    active = volumes["active"]
    ntg = volumes["ntg"]
    k = np.where(active[..., None, None], effective, 0.0)
    horizontal = np.array([[1, 1, 0], [1, 1, 0], [0, 0, 0]], dtype=bool)
    # Net convention: horizontal components are divided by ntg, vertical ones are effective.
    net = np.where(horizontal, divide_or_zero(k, ntg[..., None, None]), k)
    cell = AXES
    data = {
        "dx": (("x",), dx, {"units": "m", "long_name": "coarse cell size along x"}),
        "dy": (("y",), dy, {"units": "m", "long_name": "coarse cell size along y"}),
        "dz": (cell, dz, {"units": "m", "long_name": "coarse cell mean thickness"}),
        "kx": (cell, net[..., 0, 0], {"units": "mD", "long_name": "net permeability along x (times ntg: effective)"}),
        "ky": (cell, net[..., 1, 1], {"units": "mD", "long_name": "net permeability along y (times ntg: effective)"}),
        "kz": (cell, net[..., 2, 2], {"units": "mD", "long_name": "effective permeability along z"}),
        "porosity": (cell, volumes["porosity"], {"units": "1"}),
        "ntg": (cell, ntg, {"units": "1", "long_name": "net-to-gross"}),
        "pore_volume": (cell, volumes["pore"], {"units": "m3"}),
        "bulk_volume": (cell, volumes["bulk"], {"units": "m3"}),
        "active": (cell, active.astype(np.int8), {"long_name": "active coarse cell (has an active fine cell)"}),
    }
    if full:
        data["kxy"] = (cell, net[..., 0, 1], {"units": "mD", "long_name": "net xy permeability (times ntg: effective)"})
        data["kxz"] = (cell, net[..., 0, 2], {"units": "mD", "long_name": "effective xz permeability"})
        data["kyz"] = (cell, net[..., 1, 2], {"units": "mD", "long_name": "effective yz permeability"})
    for axis, name in enumerate(AXES):
        e = partition.edges[axis]
        data[f"{name}_start"] = ((name,), e[:-1].astype(np.int32), {"long_name": f"first fine {name} index"})
        data[f"{name}_stop"] = ((name,), e[1:].astype(np.int32), {"long_name": f"fine {name} index past the block"})
    unit_name, _, _ = unit_system(units)
    faces = coarse_transmissibility((k[..., 0, 0], k[..., 1, 1], k[..., 2, 2]), dx, dy, dz, active, units)
    for axis, name in enumerate(AXES):
        dims = tuple(f"{name}_face" if d == name else d for d in cell)
        data[f"t{name}"] = (dims, faces[axis], {"units": unit_name, "long_name":
                            f"transmissibility between coarse cells i and i+1 along {name}"})
        data[f"t{name}_multiplier"] = (dims, np.ones_like(faces[axis]), {
            "units": "1", "long_name": f"transmissibility multiplier on {name} faces",
            "computed": "no: all 1; request flow-based multipliers (multipliers=True) to compute them"})
    return xr.Dataset({n: xr.Variable(*spec) for n, spec in data.items()})


def _provenance(fine: xr.Dataset, partition: Partition, methods, bc, border, omega, units) -> dict:
    describe = partition.describe()
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
