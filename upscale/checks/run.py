"""``upscale.check``: every check of a coarse grid against its fine field, gathered into
one JSON-ready metrics dict (the metrics.json of ``upscale check``).
"""

from __future__ import annotations

import logging
import math

import xarray as xr

from ..core.grid import AXES
from ..core.patch_flows import PATCH_FLOWS
from ..core.units import LENGTH_TO_M
from ..errors import InputError
from ..io.coarse_file import coarse_partition
from ..io.pinch_outs import pinch_settings, thickness_units, with_pinch_outs
from ..io.schema import arrays
from ..io.validation import validate
from .blocks import TOLERANCE, block_errors, flow_reference
from .diagonal import coarse_patch_rates, diagonal_check
from .faces import barrier_summary
from .fine_solves import fine_jobs, fine_solutions
from .layering import grouping_of_coarse_grid
from .steady import coarse_model_check, steady_check
from .transient import check_options, transient_check

log = logging.getLogger(__name__)

CHECKS = ("steady", "diagonal", "transient", "blocks", "layering")


def parse_checks(checks) -> tuple[str, ...]:
    """The checks to run, in their fixed order: all for None, else a list or a text such as
    'steady,diagonal'; InputError for an unknown name or none."""
    if checks is None:
        return CHECKS
    names = [c.strip() for c in checks.split(",")] if isinstance(checks, str) else [str(c) for c in checks]
    unknown = [n for n in names if n not in CHECKS]
    if unknown or not names:
        raise InputError(f"unknown check(s) {', '.join(unknown) or '(none given)'}; choose from {', '.join(CHECKS)}")
    return tuple(c for c in CHECKS if c in names)


def check_models(fine: xr.Dataset, coarse: xr.Dataset, tolerance: float = TOLERANCE,
                 transient: dict | None = None, say=None, checks=None, others: dict | None = None,
                 pinch_connections: bool | None = None, pinch_thickness: float | None = None) -> tuple[dict, dict]:
    """The chosen checks of a coarse grid against its fine field.

    ``transient``: keyword arguments of :func:`upscale.checks.transient.transient_check`
    (drainage, face, column, compressibility, viscosity, steps_per_doubling, ...); ``say``:
    called with a short line as each stage starts (progress), or None; ``checks``: see
    :func:`parse_checks`; ``others``: label -> other coarse grids of the same partition,
    whose steady and diagonal errors are reported beside this one's against the same
    fine solutions (``metrics["comparison"]``); ``pinch_connections``, ``pinch_thickness``:
    the fine model's pinch-out settings (:func:`pinch_outs_of_fine`).

    Returns (metrics, arrays): metrics is JSON-ready (see README: global, layer_flow_share,
    pressure_rms, diagonal, transient, blocks, layering, multipliers, pore_volume, and
    ``checks`` with what ran and what was left out); arrays holds what the figures need.
    """
    chosen = parse_checks(checks)
    coarse = validate(coarse, where="coarse grid")
    fine = pinch_outs_of_fine(validate(fine, where="fine field"), coarse, pinch_connections, pinch_thickness)
    cells = arrays(fine)
    partition = coarse_partition(coarse, cells.shape)
    if "transient" in chosen:
        check_options(coarse, cells.shape, **(transient or {}))  # fail before the long solves
    say = say or (lambda line: None)
    metrics = {"checks": {"run": list(chosen), "left_out": [c for c in CHECKS if c not in chosen]}}
    arrays_ = {"cells": cells, "partition": partition, "coarse": coarse, "fine": fine}
    solved = _fine_solves(fine, coarse, cells, partition, chosen, transient, say)
    for name in chosen:
        STAGES[name](fine, coarse, cells, partition, metrics, arrays_, say, tolerance=tolerance,
                     transient=transient, solved=solved)
    if others:
        metrics["comparison"] = compare_grids(metrics, coarse, others, partition)
    metrics.update(_file_facts(fine, coarse, cells, partition))
    return metrics, arrays_


def pinch_outs_of_fine(fine: xr.Dataset, coarse: xr.Dataset, connections: bool | None = None,
                       thickness: float | None = None) -> xr.Dataset:
    """The normalised fine field with its pinch-out settings applied
    (:func:`upscale.io.pinch_outs.with_pinch_outs`): those given, else those the coarse grid
    was made with (its attributes; connections and no threshold when it records none).
    A fine model checked with other settings than its coarse grid's is warned about."""
    made = pinch_settings(coarse)
    recorded = made["thickness"] * LENGTH_TO_M.get(made["units"].lower(), 1.0) / LENGTH_TO_M.get(
        thickness_units(fine).lower(), 1.0)
    connections = made["connections"] if connections is None else bool(connections)
    fine = with_pinch_outs(fine, connections, recorded if thickness is None else thickness)
    if connections != made["connections"] or not math.isclose(float(fine.attrs["pinch_thickness"]), recorded):
        log.warning("the fine model is checked with pinch-out connections %s and pinch thickness %g %s, the coarse "
                    "grid was made with connections %s and thickness %g %s", "on" if connections else "off",
                    fine.attrs["pinch_thickness"], fine.attrs["pinch_thickness_units"],
                    "on" if made["connections"] else "off", made["thickness"], made["units"])
    return fine


def compare_grids(metrics: dict, coarse: xr.Dataset, others: dict, partition) -> dict:
    """Relative errors of the axis and diagonal flows of ``coarse`` and of each of
    ``others``, against the fine results already in ``metrics``."""
    coarse = validate(coarse, where="coarse grid")
    label = f"this grid ({coarse.attrs.get('method', '?')}, {coarse.attrs.get('boundary_condition', '?')})"
    out = {label: _errors(metrics, coarse, partition)}
    for label, other in others.items():
        out[label] = _errors(metrics, validate(other, where=f"coarse grid '{label}'"), partition)
    return out


def _errors(metrics: dict, coarse: xr.Dataset, partition) -> dict:
    out = {}
    for axis in AXES if "global" in metrics else ():
        fine_k = metrics["global"][axis]["fine_k"]
        out[axis] = None if not fine_k else coarse_model_check(coarse, axis)["k"] / fine_k - 1.0
    if metrics.get("diagonal"):
        rates = coarse_patch_rates(coarse, partition)
        for name, d in metrics["diagonal"].items():
            out[name] = None if not d["fine_rate"] else rates[name] / d["fine_rate"] - 1.0
    return out


def _fine_solves(fine, coarse, cells, partition, chosen, transient, say) -> dict:
    """The fine solves of the chosen checks, all at once (:mod:`upscale.checks.fine_solves`)."""
    jobs = fine_jobs(chosen)
    if not jobs:
        return {}
    named = {"steady": "steady flow along x, y, z", "diagonal": f"{len(PATCH_FLOWS)} diagonal flows",
             "floor": "their floors on a homogeneous field", "transient": "the transient drainage"}
    kinds = list(dict.fromkeys(kind for kind, _ in jobs))
    say(f"fine model ({int(cells.active.sum()):,} active cells): {', '.join(named[k] for k in kinds)} "
        f"({len(jobs)} solves, the longest part of the check)")
    return fine_solutions(fine, coarse, cells, partition, chosen, transient)


def _steady(fine, coarse, cells, partition, metrics, arrays_, say, solved=None, **_):
    say("whole-model steady check along x, y, z: coarse grid against the fine model")
    metrics.update(steady_check(fine, coarse, fine_results=(solved or {}).get("steady")))


def _diagonal(fine, coarse, cells, partition, metrics, arrays_, say, solved=None, **_):
    say("diagonal flows, patch to patch: coarse grid against the fine model, and their floors")
    solved = solved or {}
    metrics["diagonal"] = diagonal_check(fine, coarse, fine_rates=solved.get("diagonal"),
                                         floor_rates=solved.get("floor"))


def _transient(fine, coarse, cells, partition, metrics, arrays_, say, transient=None, solved=None, **_):
    say("transient drainage check: coarse grid against the fine model")
    metrics["transient"] = transient_check(fine, coarse, **(transient or {}),
                                           fine_run=(solved or {}).get("transient"))


def _blocks(fine, coarse, cells, partition, metrics, arrays_, say, tolerance=TOLERANCE, **_):
    say("static averages against flow-based values, block by block")
    flow_k, source = flow_reference(cells, partition, coarse)
    blocks, arrays_["blocks"] = block_errors(cells, partition, flow_k, tolerance)
    blocks["flow_reference"] = source
    metrics["blocks"] = blocks


def _layering(fine, coarse, cells, partition, metrics, arrays_, say, **_):
    say("layer grouping")
    metrics["layering"] = grouping_of_coarse_grid(cells, partition) if cells.shape[2] > 1 else None


STAGES = {"steady": _steady, "diagonal": _diagonal, "transient": _transient, "blocks": _blocks,
          "layering": _layering}


def _file_facts(fine, coarse, cells, partition) -> dict:
    """Pore volumes, barrier counts, the inputs and the coarse grid's own record."""
    fine_pv = float(cells.pore_volume.sum())
    coarse_pv = float(coarse["pore_volume"].values.sum())
    computed = [coarse[f"t{a}_multiplier"].attrs.get("computed", "") for a in AXES if f"t{a}_multiplier" in coarse]
    has_multipliers = bool(computed) and all(c.startswith("flow-based") for c in computed)
    facts = {
        "pore_volume": {"fine": fine_pv, "coarse": coarse_pv,
                        "relative_difference": (coarse_pv - fine_pv) / fine_pv if fine_pv else None},
        "multipliers": (barrier_summary({a: coarse[f"t{a}_multiplier"].values for a in AXES})
                        if has_multipliers else None),
        "inputs": {"fine": {"path": fine.attrs.get("source_path", ""), "sha256": fine.attrs.get("source_sha256", "")},
                   "coarse": {"path": coarse.attrs.get("source_path", ""),
                              "sha256": coarse.attrs.get("source_sha256", "")}},
        "coarse": {key: coarse.attrs.get(key) for key in
                   ("method", "boundary_condition", "border", "partition", "tool_version", "input_sha256",
                    "global_solves", "global_passes")},
    }
    facts["sector"] = fine.attrs.get("sector")  # a window of the model checked on its own, or None
    facts["pinch_outs"] = {"fine": pinch_settings(fine), "coarse": pinch_settings(coarse)}
    facts["coarse"]["shape"] = list(partition.shape)
    facts["coarse"]["input_matches_fine"] = coarse.attrs.get("input_sha256") == fine.attrs.get("source_sha256")
    return facts


def check(fine: xr.Dataset, coarse: xr.Dataset, checks=None, tolerance: float = TOLERANCE,
          transient: dict | None = None, pinch_connections: bool | None = None,
          pinch_thickness: float | None = None) -> dict:
    """``upscale.check``: every check of a coarse grid against its fine field.

    Parameters
    ----------
    fine : xarray.Dataset
        The fine field (``open_field``).
    coarse : xarray.Dataset
        Its coarse grid (``coarsen``, or a coarse file opened with ``open_field``).
    checks : str or list of str, optional
        Which of steady, diagonal, transient, blocks, layering to run (None: all); the
        metrics hold only what ran, and ``metrics["checks"]`` says what was left out.
    tolerance : float
        Relative difference above which a block's static average counts as off the
        flow-based value.
    transient : dict, optional
        Options of the transient drainage check: drainage, face, column, compressibility
        (1/bar), viscosity (cP), steps_per_doubling.
    pinch_connections : bool, optional
        Whether the fine model passes vertical flow across pinched cells (pinch-out
        connections); None: as the coarse grid was made (its attribute ``pinch_connections``).
    pinch_thickness : float, optional
        Fine cells thinner than this (the fine field's thickness units) count as pinched
        out; None: as the coarse grid was made.

    Returns
    -------
    dict
        The JSON-ready metrics of metrics.json: ``metrics["global"]["x"]`` with
        ``fine_k``, ``coarse_k`` (mD) and ``relative_error``, and ``layer_flow_share``,
        ``pressure_rms``, ``diagonal`` (per flow ``fine_rate``, ``coarse_rate``,
        ``relative_error``, ``floor``), ``blocks``, ``transient``, ``layering``,
        ``multipliers``, ``pore_volume``, ``inputs``, ``coarse``, ``checks``.
    """
    return check_models(fine, coarse, tolerance, transient, checks=checks, pinch_connections=pinch_connections,
                        pinch_thickness=pinch_thickness)[0]
