"""Per-block quality of static averages against flow-based permeability, and the
``upscale check`` run that gathers every check into ``metrics.json`` and a report."""

from __future__ import annotations

import sys
import time

import numpy as np
import xarray as xr

from .errors import InputError
from .field import FineArrays
from .local import flow_tensors
from .partition import AXES, Partition, partition_from_ranges
from .static import STATIC_METHODS, cardwell_parsons, static_average

TOLERANCE = 0.10


def coarse_partition(coarse: xr.Dataset, fine_shape) -> Partition:
    """The partition of a coarse file (from x_start/x_stop, ...), checked against the fine grid."""
    names = [f"{a}_{end}" for a in AXES for end in ("start", "stop")]
    missing = [n for n in names if n not in coarse]
    if missing:
        raise InputError(f"coarse file lacks {', '.join(missing)}: it was not written by upscale coarsen")
    partition = partition_from_ranges([coarse[f"{a}_start"].values for a in AXES],
                                      [coarse[f"{a}_stop"].values for a in AXES])
    if partition.fine_shape != tuple(fine_shape):
        raise InputError(f"coarse file maps onto a fine grid of {partition.fine_shape}, "
                         f"but the fine field has {tuple(fine_shape)}: not the same model")
    return partition


def coarse_effective(coarse: xr.Dataset) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Effective (flow) permeability of a coarse file along x, y, z, mD."""
    ntg = coarse["ntg"].values
    return coarse["kx"].values * ntg, coarse["ky"].values * ntg, coarse["kz"].values


def _distribution(values: np.ndarray) -> dict:
    if values.size == 0:
        return {"median": None, "p90": None, "max": None}
    magnitude = np.abs(values)
    return {"median": float(np.median(magnitude)), "p90": float(np.percentile(magnitude, 90)),
            "max": float(magnitude.max())}


def block_errors(cells: FineArrays, partition: Partition, flow_k, tolerance: float = TOLERANCE,
                 worst: int = 5) -> tuple[dict, dict]:
    """Each static average against the flow-based value per block and direction.

    ``flow_k``: effective flow-based permeability per axis (NX, NY, NZ), mD. Returns
    (summary for metrics.json, arrays for figures). A block is flagged when a static
    average misses the flow value by more than ``tolerance`` (relative) or falls outside
    the Cardwell-Parsons bounds.
    """
    k = cells.flow_permeability()
    weight = cells.bulk_volume * cells.active
    active = partition.block_sum(cells.active) > 0
    summary, arrays = {"tolerance": tolerance}, {}
    for axis, name in enumerate(AXES):
        lower, upper = cardwell_parsons(k[axis], cells.dx, cells.dy, cells.dz, partition, axis)
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
            flagged = valid & ((np.abs(error) > tolerance) | outside)
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


def flow_reference(cells: FineArrays, partition: Partition, coarse: xr.Dataset):
    """The flow-based permeability per block: the coarse file's own values when it was
    built with sealed flow upscaling, otherwise a fresh sealed computation."""
    if coarse.attrs.get("method") == "flow" and coarse.attrs.get("boundary_condition") == "sealed" \
            and int(coarse.attrs.get("border", 0)) == 0:
        return coarse_effective(coarse), "coarse file (flow, sealed)"
    tensor = flow_tensors(cells, partition, "sealed").tensor
    return tuple(tensor[..., a, a] for a in range(3)), "computed here (flow, sealed)"


def _layering(cells: FineArrays, partition: Partition) -> dict:
    """The coarse file's layer grouping judged against the optimal and the uniform one."""
    from .layering import compare_groupings

    nz = len(partition.edges[2]) - 1
    return compare_groupings(cells, nz, edges=[int(e) for e in partition.edges[2]])


def check_models(fine: xr.Dataset, coarse: xr.Dataset, tolerance: float = TOLERANCE,
                 transient: dict | None = None, say=None) -> tuple[dict, dict]:
    """Every check of a coarse grid against its fine field.

    ``transient``: keyword arguments of :func:`upscale.transient.transient_check` (drainage,
    face, column, compressibility, viscosity, steps_per_doubling, ...); ``say``: called with
    a short line as each stage starts (progress), or None.

    Returns (metrics, arrays): metrics is JSON-ready (see README: global, layer_flow_share,
    pressure_rms, transient, blocks, layering, multipliers, pore_volume); arrays holds what
    the figures need.
    """
    from .field import arrays as fine_arrays, validate
    from .globalflow import steady_check
    from .transient import check_options, transient_check
    from .transmissibility import barrier_summary

    fine = validate(fine, where="fine field")
    coarse = validate(coarse, where="coarse grid")
    cells = fine_arrays(fine)
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
    metrics["layering"] = _layering(cells, partition) if cells.shape[2] > 1 else None
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
    """``upscale.check``: every check of a coarse grid against its fine field, as the
    JSON-ready metrics dict written to metrics.json (``metrics["global"]["x"]`` ...)."""
    return check_models(fine, coarse, tolerance, transient)[0]


def run_check(fine_path, coarse_path, report_dir=None, tolerance: float = TOLERANCE,
              transient: dict | None = None, quiet: bool = False) -> dict:
    """``upscale check``: print the whole-model comparison; write the report if asked."""
    from .field import open_field

    fine = open_field(fine_path)
    coarse = open_field(coarse_path)
    started = time.perf_counter()

    def say(line: str) -> None:
        if not quiet:
            print(f"upscale check [{time.perf_counter() - started:5.0f} s] {line}", file=sys.stderr, flush=True)

    metrics, arrays = check_models(fine, coarse, tolerance, transient, say)
    print(format_check(metrics))
    if report_dir is not None:
        from .report import build_report

        paths = build_report(report_dir, metrics, arrays)
        print(f"wrote {paths['html']} and {paths['metrics']}")
    return metrics


def format_check(metrics: dict) -> str:
    """A short terminal table of the whole-model check and the transient check."""
    lines = ["whole-model steady flow (no-flow sides, unit pressure drop):",
             f"{'axis':<6}{'fine k (mD)':>14}{'coarse k (mD)':>15}{'rel. error':>12}"]
    for axis in AXES:
        g = metrics["global"][axis]
        error = "-" if g["relative_error"] is None else f"{g['relative_error']:+.2%}"
        fine = "-" if g["fine_k"] is None else f"{g['fine_k']:.4g}"
        coarse = "-" if g["coarse_k"] is None else f"{g['coarse_k']:.4g}"
        lines.append(f"{axis:<6}{fine:>14}{coarse:>15}{error:>12}")
    transient = metrics.get("transient") or {}
    final = transient.get("final_cumulative_relative_error")
    if final is not None:
        lines.append(f"transient drainage: relative error of the final cumulative volume {final:+.2%}")
    pv = metrics["pore_volume"]
    if pv["relative_difference"] is not None:
        lines.append(f"pore volume: fine {pv['fine']:.6g} m3, coarse {pv['coarse']:.6g} m3 "
                     f"(relative difference {pv['relative_difference']:.1e})")
    return "\n".join(lines)
