"""``upscale.coarsen``: a fine field to its coarse grid, in memory or lazily in boxes."""

from __future__ import annotations

import xarray as xr

from ..core.grid import AXES
from ..core.partition import make_partition
from ..core.upscaling import block_variables, global_stage, make_recipe
from ..errors import InputError
from ..io.coarse_grid import assemble, warn_flagged
from ..io.pinch_outs import with_pinch_outs
from ..io.schema import arrays
from ..io.validation import is_lazy, validate
from .boxes import lazy_block_variables
from .global_boxes import global_in_boxes


def coarsen(fine: xr.Dataset, ratio=None, edges: dict | None = None, method="flow",
            bc: str = "sealed", border: int = 0, omega: float | None = None,
            multipliers: bool = False, units: str = "metric", progress=None,
            memory: int | None = None, box: tuple[int, int, int] | None = None,
            global_solves: str = "coarse", passes: int | None = None, pinch_connections: bool = True,
            pinch_thickness: float = 0.0) -> xr.Dataset:
    """``upscale.coarsen``: the coarse grid of a fine field.

    Parameters
    ----------
    fine : xarray.Dataset
        A field in the schema (``open_field``); a lazy one (``open_field(path, chunks=...)``)
        gives a lazy result, computed when written (:func:`upscale.write`) or loaded.
    ratio : tuple of int, optional
        (rx, ry, rz) fine cells per coarse cell; remainders give a smaller last block.
    edges : dict, optional
        Fine-index edges per axis, e.g. ``{"z": [0, 3, 10, 20]}`` (groups of layers).
    method : str or dict
        arithmetic, harmonic, geometric, power (with ``omega``) or flow; or one per axis,
        "arithmetic,arithmetic,harmonic" or ``{"x": ..., "y": ..., "z": ...}``.
    bc : str
        Boundary condition of the local problems for ``flow``: sealed, periodic, linear, or
        global: local-global face transmissibilities (and sealed k), written as multipliers.
    border : int
        Fine cells of the border ring around each block's local problem (for ``global``,
        around each face's two blocks).
    omega : float, optional
        The power-average exponent.
    multipliers : bool
        Compute flow-based transmissibility multipliers (two-block problems).
    units : str
        Transmissibility units, metric (m3*cP/(day*bar)) or field (rb*cP/(day*psi)).
    progress : callable, optional
        In-memory fields: receives the number of blocks finished by each batch of solves.
    memory : int, optional
        Lazy fields: bytes a process holding one box may use (sizes the boxes).
    box : tuple of int, optional
        Lazy fields: coarse blocks per box along x, y, z instead.
    global_solves : str
        For ``bc="global"``: 'coarse', local problems driven by the coarse model's own
        flows (local-global), or 'fine', face transmissibilities fitted to the fine
        model's whole-model flows (needs the fine model solved three times).
    passes : int, optional
        For ``bc="global"``: the most passes (default 3 for coarse, 10 for fine).
    pinch_connections : bool
        Vertical flow passes across pinched cells (dz = 0) between the real cells of a
        column, as if they were neighbours (pinch-out connections), fine and coarse (a
        coarse cell entirely pinched out is crossed the same way); False: a pinched cell
        seals its column.
    pinch_thickness : float
        Cells thinner than this, in the field's thickness units (those of its dz, m or
        ft), count as pinched out too: their volume is left out and they carry no flow of
        their own. 0: only cells with dz = 0.

    Returns
    -------
    xarray.Dataset
        The coarse grid (coarse grid schema: itself a valid field, with face
        transmissibilities, multipliers, fine-index ranges and provenance).
    """
    recipe = make_recipe(method, bc, border, omega, multipliers, units, global_solves, passes)
    pinch = dict(connections=pinch_connections, thickness=pinch_thickness)
    if is_lazy(fine):
        if recipe.global_options is not None and recipe.global_options.solves == "fine":
            raise InputError("global solves 'fine' need the fine model in memory (three whole-model solves); "
                             "open the field without chunks, give --memory large enough, or use global solves "
                             "'coarse' (local-global), which runs in boxes")
        if "length_units_in" not in fine.attrs:  # not from open_field / validate: check it (one pass)
            fine = validate(fine)
        fine = with_pinch_outs(fine, **pinch)
        partition = make_partition(tuple(fine.sizes[d] for d in AXES), ratio=ratio, edges=edges)
        if recipe.global_options is not None:
            variables, report = global_in_boxes(fine, partition, recipe, memory, box)
            coarse = assemble(variables, fine, partition, recipe)
            coarse.attrs.update(global_attributes(recipe.global_options, report))
            return coarse
        variables = lazy_block_variables(fine, partition, recipe, memory, box)
        return assemble(variables, fine, partition, recipe)
    fine = with_pinch_outs(validate(fine), **pinch)
    cells = arrays(fine)
    partition = make_partition(cells.shape, ratio=ratio, edges=edges)
    everything = tuple(slice(0, n) for n in partition.shape)
    variables = block_variables(cells, partition, everything, recipe, progress=progress)
    report = None if recipe.global_options is None else global_stage(cells, partition, variables, recipe, progress)
    coarse = assemble(variables, fine, partition, recipe)
    if report is not None:
        coarse.attrs.update(global_attributes(recipe.global_options, report))
    warn_flagged(coarse)
    return coarse


def global_attributes(options, report) -> dict:
    """The coarse file's record of the global stage: its options and what each pass did."""
    return {"global_solves": options.solves, "global_ring": options.ring if options.solves == "coarse" else 0,
            "global_weighting": options.weighting, "global_passes": report.passes,
            "global_faces_solved": " ".join(map(str, report.faces_solved)),
            "global_faces_kept_local": " ".join(str(sum(f)) for f in report.fallback),
            "global_rate_change": " ".join(f"{c:.3g}" for c in report.rate_change)}
