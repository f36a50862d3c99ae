"""The coarse grid Dataset: per-block variables, cell sizes, fine-index ranges, face
transmissibilities and multipliers, provenance (the coarse grid schema); and the warnings
its values call for.
"""

from __future__ import annotations

import logging
from datetime import datetime, timezone

import numpy as np
import xarray as xr

from ..about import CAUTION, tool_version
from ..core.face_problems import multipliers as face_multipliers
from ..core.grid import AXES
from ..core.partition import Partition
from ..core.two_point import harmonic_pair, pinch_out_faces
from ..core.units import unit_system
from ..core.upscaling import Recipe, method_label, parse_methods
from .schema import PINCH_CONNECTIONS, PINCH_THICKNESS, PINCH_THICKNESS_UNITS, pinch_connections

log = logging.getLogger(__name__)


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


def _pinch_out_faces(half, dz):
    """The coarse z faces with pinch-out connections across coarse cells entirely pinched
    out (dz = 0), on numpy arrays or on dask arrays made whole along z (a run of such
    cells may cross the boxes)."""
    def faces(h, d):
        return pinch_out_faces(h, d == 0)[0]

    if not hasattr(half, "dask"):
        return faces(half, dz)
    import dask.array as da

    half = half.rechunk({2: -1})
    return da.map_blocks(faces, half, dz.rechunk(half.chunks), chunks=half.chunks[:2] + ((half.shape[2] - 1,),),
                         dtype=float)


def _beside_pinched(dz):
    """The coarse z faces with a coarse cell entirely pinched out on either side."""
    return (dz[:, :, :-1] == 0) | (dz[:, :, 1:] == 0)


def assemble(variables: dict, fine: xr.Dataset, partition: Partition, recipe: Recipe) -> xr.Dataset:
    """The coarse Dataset from :func:`block_variables` (numpy, or dask for a lazy field):
    per-block variables, cell sizes, fine index ranges, face transmissibilities from the
    written permeability (harmonic pair of the half-cell values; with pinch-out
    connections, :func:`upscale.core.two_point.pinch_out_faces` across coarse cells of
    dz = 0) and multipliers (1 beside such a cell: no two-block problem has its volume)."""
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
    pinch = pinch_connections(fine) and variables["dz"].shape[2] > 1
    for axis, name in enumerate(AXES):
        dims = tuple(f"{name}_face" if d == name else d for d in cell)
        half = variables[f"half_{name}"]
        n = half.shape[axis]
        first = half[tuple(slice(0, n - 1) if a == axis else slice(None) for a in range(3))]
        second = half[tuple(slice(1, n) if a == axis else slice(None) for a in range(3))]
        t = _pinch_out_faces(half, variables["dz"]) if pinch and axis == 2 else _blockwise(harmonic_pair, first, second)
        data[f"t{name}"] = (dims, t, {"units": unit_name, "long_name":
                                     f"transmissibility between coarse cells i and i+1 along {name}"})
        if recipe.multipliers:
            multiplier = _blockwise(face_multipliers, variables[f"t{name}_flow"], t)
            if pinch and axis == 2:
                multiplier = np.where(_beside_pinched(variables["dz"]), 1.0, multiplier)
            data[f"t{name}_multiplier"] = (dims, multiplier, {
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


def _provenance(fine: xr.Dataset, partition: Partition, recipe: Recipe) -> dict:
    describe = partition.describe()
    methods, bc, border, omega, units = recipe.methods, recipe.bc, recipe.border, recipe.omega, recipe.units
    attrs = {
        "Conventions": "CF-1.10",
        "title": "coarse grid written by upscale",
        "method": method_label(methods),
        "boundary_condition": bc,
        "border": int(border),
        "partition": "; ".join(f"{a}: {describe[a]}" for a in AXES),
        "ratio": " ".join("-" if r is None else str(r) for r in partition.ratio),
        "edges_x": " ".join(map(str, partition.edges[0])),
        "edges_y": " ".join(map(str, partition.edges[1])),
        "edges_z": " ".join(map(str, partition.edges[2])),
        "fine_shape": " ".join(map(str, partition.fine_shape)),
        "transmissibility_units": units,
        PINCH_CONNECTIONS: "yes" if pinch_connections(fine) else "no",
        PINCH_THICKNESS: float(fine.attrs.get(PINCH_THICKNESS, 0.0)),
        PINCH_THICKNESS_UNITS: str(fine.attrs.get(PINCH_THICKNESS_UNITS, "m")),
        "ntg_convention": "kx, ky, kxy are net: multiply by ntg for effective; kz, kxz, kyz are effective",
        "tool": "upscale",
        "tool_version": tool_version(),
        "input_file": fine.attrs.get("source_path", ""),
        "input_sha256": fine.attrs.get("source_sha256", ""),
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "caution": CAUTION,
    }
    if omega is not None:
        attrs["omega"] = float(omega)
    return attrs
