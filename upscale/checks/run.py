"""``upscale.check``: every check of a coarse grid against its fine field, gathered into
one JSON-ready metrics dict (the metrics.json of ``upscale check``).
"""

from __future__ import annotations

import xarray as xr

from ..core.grid import AXES
from ..io.coarse_file import coarse_partition
from ..io.schema import arrays
from ..io.validation import validate
from .blocks import TOLERANCE, block_errors, flow_reference
from .faces import barrier_summary
from .layering import grouping_of_coarse_grid
from .steady import steady_check
from .transient import check_options, transient_check


def check_models(fine: xr.Dataset, coarse: xr.Dataset, tolerance: float = TOLERANCE,
                 transient: dict | None = None, say=None) -> tuple[dict, dict]:
    """Every check of a coarse grid against its fine field.

    ``transient``: keyword arguments of :func:`upscale.checks.transient.transient_check` (drainage,
    face, column, compressibility, viscosity, steps_per_doubling, ...); ``say``: called with
    a short line as each stage starts (progress), or None.

    Returns (metrics, arrays): metrics is JSON-ready (see README: global, layer_flow_share,
    pressure_rms, transient, blocks, layering, multipliers, pore_volume); arrays holds what
    the figures need.
    """
    fine = validate(fine, where="fine field")
    coarse = validate(coarse, where="coarse grid")
    cells = arrays(fine)
    partition = coarse_partition(coarse, cells.shape)
    check_options(coarse, cells.shape, **(transient or {}))  # fail before the long solves
    say = say or (lambda line: None)
    say(f"whole-model steady check along x, y, z: fine model ({int(cells.active.sum()):,} active cells) "
        "and coarse grid")
    metrics = steady_check(fine, coarse)
    say("static averages against flow-based values, block by block")
    flow_k, source = flow_reference(cells, partition, coarse)
    blocks, block_arrays = block_errors(cells, partition, flow_k, tolerance)
    blocks["flow_reference"] = source
    metrics["blocks"] = blocks
    say("transient drainage check, fine and coarse (the fine model's time steps take longest)")
    metrics["transient"] = transient_check(fine, coarse, **(transient or {}))
    say("layer grouping")
    metrics["layering"] = grouping_of_coarse_grid(cells, partition) if cells.shape[2] > 1 else None
    fine_pv = float(cells.pore_volume.sum())
    coarse_pv = float(coarse["pore_volume"].values.sum())
    metrics["pore_volume"] = {"fine": fine_pv, "coarse": coarse_pv,
                              "relative_difference": (coarse_pv - fine_pv) / fine_pv if fine_pv else None}
    computed = [coarse[f"t{a}_multiplier"].attrs.get("computed", "") for a in AXES if f"t{a}_multiplier" in coarse]
    has_multipliers = bool(computed) and all(c.startswith("flow-based") for c in computed)
    metrics["multipliers"] = (barrier_summary({a: coarse[f"t{a}_multiplier"].values for a in AXES})
                              if has_multipliers else None)
    metrics["inputs"] = {
        "fine": {"path": fine.attrs.get("source_path", ""), "sha256": fine.attrs.get("source_sha256", "")},
        "coarse": {"path": coarse.attrs.get("source_path", ""), "sha256": coarse.attrs.get("source_sha256", "")},
    }
    metrics["coarse"] = {key: coarse.attrs.get(key) for key in
                         ("method", "boundary_condition", "border", "partition", "tool_version", "input_sha256")}
    metrics["coarse"]["shape"] = list(partition.shape)
    metrics["coarse"]["input_matches_fine"] = coarse.attrs.get("input_sha256") == fine.attrs.get("source_sha256")
    return metrics, {"cells": cells, "partition": partition, "blocks": block_arrays, "coarse": coarse,
                     "fine": fine}


def check(fine: xr.Dataset, coarse: xr.Dataset, tolerance: float = TOLERANCE,
          transient: dict | None = None) -> dict:
    """``upscale.check``: every check of a coarse grid against its fine field.

    Parameters
    ----------
    fine : xarray.Dataset
        The fine field (``open_field``).
    coarse : xarray.Dataset
        Its coarse grid (``coarsen``, or a coarse file opened with ``open_field``).
    tolerance : float
        Relative difference above which a block's static average counts as off the
        flow-based value.
    transient : dict, optional
        Options of the transient drainage check: drainage, face, column, compressibility
        (1/bar), viscosity (cP), steps_per_doubling.

    Returns
    -------
    dict
        The JSON-ready metrics of metrics.json: ``metrics["global"]["x"]`` with
        ``fine_k``, ``coarse_k`` (mD) and ``relative_error``, and ``layer_flow_share``,
        ``pressure_rms``, ``blocks``, ``transient``, ``layering``, ``multipliers``,
        ``pore_volume``, ``inputs``, ``coarse``.
    """
    return check_models(fine, coarse, tolerance, transient)[0]
