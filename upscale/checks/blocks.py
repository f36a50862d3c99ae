"""Per-block quality of static averages against flow-based permeability."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core.block_problems import flow_tensors
from ..core.grid import AXES, GridArrays
from ..core.partition import Partition
from ..core.static import STATIC_METHODS, cardwell_parsons, static_average
from ..io.coarse_file import coarse_effective

TOLERANCE = 0.10


def _distribution(values: np.ndarray) -> dict:
    """Median, 90th percentile and largest of the magnitudes; None for no values."""
    if values.size == 0:
        return {"median": None, "p90": None, "max": None}
    magnitude = np.abs(values)
    return {"median": float(np.median(magnitude)), "p90": float(np.percentile(magnitude, 90)),
            "max": float(magnitude.max())}


def block_errors(cells: GridArrays, partition: Partition, flow_k, tolerance: float = TOLERANCE,
                 worst: int = 5) -> tuple[dict, dict]:
    """Each static average against the flow-based value per block and direction.

    A block is flagged when a static average misses the flow value by more than
    ``tolerance`` (relative); whether it lies outside the Cardwell-Parsons bounds is
    counted apart (the arithmetic and harmonic averages lie outside them by construction
    wherever the block is heterogeneous across and along the flow).

    Parameters
    ----------
    cells : GridArrays
        The fine field.
    partition : Partition
        The coarse blocks.
    flow_k : sequence of numpy.ndarray
        Effective flow-based permeability per axis, each (NX, NY, NZ), mD.
    tolerance : float
        Relative error beyond which a block is flagged.
    worst : int
        Blocks listed with the largest errors, per method and direction.

    Returns
    -------
    tuple of dict
        (summary for metrics.json, arrays for figures), each by direction x, y, z.
    """
    k = cells.flow_permeability()
    weight = cells.bulk_volume * cells.active
    active = partition.block_sum(cells.active) > 0
    summary, arrays = {"tolerance": tolerance}, {}
    for axis, name in enumerate(AXES):
        lower, upper = cardwell_parsons(k[axis], cells.dx, cells.dy, cells.dz, partition, axis,
                                        cells.pinch_connections)
        reference = flow_k[axis]
        valid = active & (reference > 0)
        width = np.divide(upper, lower, out=np.full(lower.shape, np.inf), where=lower > 0)
        direction = {"bound_width": _distribution(width[valid & np.isfinite(width)]),
                     "flow_outside_bounds": int((valid & ((reference < lower * (1 - 1e-9))
                                                          | (reference > upper * (1 + 1e-9)))).sum()),
                     "blocks": int(valid.sum()), "methods": {}}
        arrays[name] = {"flow": reference, "lower": lower, "upper": upper, "valid": valid, "static": {}}
        for method in STATIC_METHODS[:3]:
            value = static_average(k[axis], weight, partition, method)
            error = np.divide(value - reference, reference, out=np.zeros(value.shape), where=valid)
            outside = valid & ((value < lower * (1 - 1e-9)) | (value > upper * (1 + 1e-9)))
            flagged = valid & (np.abs(error) > tolerance)
            order = np.argsort(-np.abs(np.where(valid, error, 0.0)), axis=None)[:worst]
            direction["methods"][method] = {
                "relative_error": _distribution(error[valid]),
                "flagged_blocks": int(flagged.sum()),
                "outside_bounds": int(outside.sum()),
                "worst": [{"block": [int(i) for i in np.unravel_index(o, value.shape)],
                           "relative_error": float(error.flat[o])} for o in order if valid.flat[o]],
            }
            arrays[name]["static"][method] = {"value": value, "error": error, "flagged": flagged}
        summary[name] = direction
    return summary, arrays


def flow_reference(cells: GridArrays, partition: Partition, coarse: xr.Dataset):
    """The flow-based permeability per block.

    Parameters
    ----------
    cells : GridArrays
        The fine field.
    partition : Partition
        The coarse blocks.
    coarse : xarray.Dataset
        The coarse grid.

    Returns
    -------
    tuple
        (kx, ky, kz per block (NX, NY, NZ), mD; where they come from): the coarse file's
        own values when it was built with sealed flow upscaling and no border, otherwise a
        fresh sealed computation.
    """
    if coarse.attrs.get("method") == "flow" and coarse.attrs.get("boundary_condition") == "sealed" \
            and int(coarse.attrs.get("border", 0)) == 0:
        return coarse_effective(coarse), "coarse file (flow, sealed)"
    tensor = flow_tensors(cells, partition, "sealed").tensor
    return tuple(tensor[..., a, a] for a in range(3)), "computed here (flow, sealed)"
