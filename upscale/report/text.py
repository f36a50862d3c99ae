"""Text tables for a terminal: the field summary, the check, the layer groupings."""

from __future__ import annotations

import math

import numpy as np

from ..checks.summary import HETEROGENEITY, STATISTICS
from ..core.grid import AXES


def _number(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return str(int(value))
    return f"{float(value):.4g}"


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    """Columns left-aligned for the first, right-aligned for the others, two spaces apart."""
    widths = [max(len(row[i]) for row in [header, *rows]) for i in range(len(header))]
    lines = []
    for row in [header, *rows]:
        cells = [row[0].ljust(widths[0])] + [c.rjust(w) for c, w in zip(row[1:], widths[1:])]
        lines.append("  ".join(cells).rstrip())
    return lines


def _pinch_note(pinch: dict) -> str:
    """What the pinched cells between active cells of a column do: the pinch-out
    connections made across them, or the caution that they seal their columns."""
    threshold = f" or thinner than {_number(pinch['thickness'])} {pinch['units']}" if pinch["thickness"] else ""
    runs, cells = pinch["runs_between_active"], pinch["cells_in_those_runs"]
    if not runs:
        return f" (dz = 0{threshold})"
    if pinch["connections"] == "yes":
        return (f" (dz = 0{threshold}), {cells} of them between active cells of their column: {runs} pinch-out "
                f"connection(s) made, vertical flow passes across them")
    return (f" (dz = 0{threshold}), {cells} of them between active cells of their column: no flow crosses them "
            f"(pinch-out connections off), so they seal their columns vertically")


def format_summary(summary: dict) -> str:
    """A plain aligned text table of a :func:`field_summary` dict, for a terminal."""
    nx, ny, nz = summary["shape"]
    sizes, volumes = summary["sizes"], summary["volumes"]
    thickness = sizes["thickness"]
    lines = [
        f"Field {nx} x {ny} x {nz} = {summary['cells']} cells: {summary['active_cells']} active, "
        f"{summary['pinched_cells']} pinched" + _pinch_note(summary["pinch_outs"]),
        f"Cell sizes (m): dx {_number(sizes['dx']['min'])} .. {_number(sizes['dx']['max'])}, "
        f"dy {_number(sizes['dy']['min'])} .. {_number(sizes['dy']['max'])}, "
        f"dz {_number(sizes['dz']['min'])} .. {_number(sizes['dz']['max'])}",
        f"Extent (m): x {_number(sizes['length_x'])}, y {_number(sizes['length_y'])}, "
        f"column thickness {_number(thickness['min'])} .. {_number(thickness['max'])} "
        f"(mean {_number(thickness['mean'])})",
        f"Volumes (m3): bulk {_number(volumes['bulk'])}, active bulk {_number(volumes['active_bulk'])}, "
        f"pore {_number(volumes['pore'])}",
        "",
        "Cell values (active cells)",
    ]
    rows = [[name, entry.get("units", "")] + [_number(entry[s]) for s in STATISTICS]
            for name, entry in summary["values"].items()]
    lines += _table(["variable", "units", *STATISTICS], rows)

    lines += ["", "Heterogeneity of flow permeability (each cell weighted by its bulk volume; Lorenz: "
                  "storage porosity*ntg)"]
    rows = [[axis, entry.get("permeability", "")] + [_number(entry[key]) for key, _ in HETEROGENEITY]
            for axis, entry in summary["heterogeneity"].items()]
    lines += _table(["direction", "k", *(label for _, label in HETEROGENEITY)], rows)
    bound = max((entry.get("lorenz_bound", 0.0) for entry in summary["heterogeneity"].values()), default=0.0)
    if bound > 0:
        lines.append(f"(Lorenz from logarithmic bins of k / porosity: the sorted cells' value is higher by at most "
                     f"{bound:.1g})")

    if summary.get("transmissibility"):
        lines += ["", "Face values"]
        rows = [[name, entry.get("units", ""), _number(entry["count"]),
                 *(_number(entry[s]) for s in ("min", "max", "mean"))]
                for name, entry in summary["transmissibility"].items()]
        lines += _table(["variable", "units", "faces", "min", "max", "mean"], rows)
    return "\n".join(lines) + "\n"


def format_check(metrics: dict) -> str:
    """A short terminal table of the checks that ran: whole-model steady flow, diagonal
    flows beside their floors, the transient check, pore volumes, what was left out."""
    lines = [f"sector {metrics['sector']} (fine indices), checked as a model of its own"] if metrics.get("sector") else []
    if "global" in metrics:
        lines += ["whole-model steady flow (no-flow sides, unit pressure drop):",
                  f"{'axis':<6}{'fine k (mD)':>14}{'coarse k (mD)':>15}{'rel. error':>12}"]
        for axis in AXES:
            g = metrics["global"][axis]
            lines.append(f"{axis:<6}{_maybe(g['fine_k'], '.4g'):>14}{_maybe(g['coarse_k'], '.4g'):>15}"
                         f"{_maybe(g['relative_error'], '+.2%'):>12}")
    if metrics.get("diagonal"):
        lines += ["diagonal flows, patch to patch (floor: the same flow on a homogeneous field):",
                  f"{'flow':<24}{'rel. error':>12}{'floor':>10}{'above floor':>13}"]
        for name, d in metrics["diagonal"].items():
            lines.append(f"{name:<24}{_maybe(d['relative_error'], '+.2%'):>12}{_maybe(d['floor'], '+.2%'):>10}"
                         f"{_maybe(d['above_floor'], '+.2%'):>13}")
    for label, errors in (metrics.get("comparison") or {}).items():
        lines.append(f"{label}: " + ", ".join(f"{name} {_maybe(e, '+.1%')}" for name, e in errors.items()))
    final = (metrics.get("transient") or {}).get("final_cumulative_relative_error")
    if final is not None:
        lines.append(f"transient drainage: relative error of the final cumulative volume {final:+.2%}")
    pv = metrics["pore_volume"]
    if pv["relative_difference"] is not None:
        lines.append(f"pore volume: fine {pv['fine']:.6g} m3, coarse {pv['coarse']:.6g} m3 "
                     f"(relative difference {pv['relative_difference']:.1e})")
    left_out = (metrics.get("checks") or {}).get("left_out")
    if left_out:
        lines.append(f"not run: {', '.join(left_out)}")
    return "\n".join(lines)


def _maybe(value, spec: str) -> str:
    """``value`` formatted, or '-' where it is None."""
    return "-" if value is None else format(value, spec)


def _digits(value, digits: int = 3) -> str:
    value = float(value)
    if math.isnan(value):
        return "-"
    return f"{value:.{digits}f}"


def _nan_extreme(values, pick) -> float:
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    return float(pick(values)) if values.size else math.nan


def format_comparison(result: dict) -> str:
    """Plain-text tables of a :func:`compare_groupings` result (or any dict name -> judge).

    First a side-by-side summary, one column per grouping; then, per grouping, one row per
    coarse layer.
    """
    names = list(result)
    rows = [
        ("coarse layers", lambda r: str(r["n_groups"])),
        ("variance of ln kh kept between groups", lambda r: _digits(r["variance_kept"])),
        ("  best possible (one layer per group)", lambda r: _digits(r["variance_ceiling"])),
        ("within-group sum, (ln mD)^2 m3", lambda r: f"{r['within_sum']:.4g}"),
        ("worst group (top = 0)", lambda r: str(r["worst_group"]) if r["worst_group"] >= 0 else "-"),
        ("  its std of ln kh, ln mD", lambda r: _digits(r["worst_std"])),
        ("lowest kz ratio (series / arithmetic)", lambda r: _digits(_nan_extreme(r["kz_ratio"], np.min))),
        ("largest front speed-up", lambda r: _digits(_nan_extreme(r["front_speedup"], np.max), 2)),
    ]
    cells = [[label] + [cell(result[n]) for n in names] for label, cell in rows]
    header = ["grouping"] + names
    widths = [max(len(str(line[i])) for line in [header] + cells) for i in range(len(header))]

    def line(parts):
        return "  ".join([str(parts[0]).ljust(widths[0])]
                         + [str(p).rjust(wd) for p, wd in zip(parts[1:], widths[1:])]).rstrip()

    out = [line(header), line(["-" * wd for wd in widths])] + [line(c) for c in cells]
    columns = ("group", "layers", "thick m", "mean ln kh", "std ln kh", "kz ratio", "speed-up",
               "share x", "share y")
    for name in names:
        r = result[name]
        out += ["", f"{name}: edges {r['edges']}"]
        table = [columns]
        for g in range(r["n_groups"]):
            a, b = r["edges"][g], r["edges"][g + 1]
            table.append((str(g), f"{a}-{b - 1}", _digits(r["thickness"][g], 2),
                          _digits(r["lnk_mean"][g]), _digits(r["within_group_std"][g]),
                          _digits(r["kz_ratio"][g]), _digits(r["front_speedup"][g], 2),
                          _digits(r["flow_share_x"][g]), _digits(r["flow_share_y"][g])))
        wide = [max(len(row[i]) for row in table) for i in range(len(columns))]
        out += ["  ".join(cell.rjust(wd) for cell, wd in zip(row, wide)) for row in table]
    return "\n".join(out) + "\n"


def relative_error_text(error: float, signed: bool = True) -> str:
    """A relative error as a percentage (signed unless ``signed`` is False), or beyond
    1000 % as the factor it stands for, 1 + error: ``+12.5%``, ``x 2.7e+05``."""
    if abs(error) > 10.0:
        return f"x {1.0 + error:.2g}"
    return f"{error:+.1%}" if signed else f"{error:.1%}"


def format_static_versus_flow(errors: dict) -> str:
    """Per direction and static method, the median and the largest relative error of the
    static average against the flow-based value over the blocks, and the blocks off by
    more than 10 %; ``errors`` is the arrays part of
    :func:`upscale.checks.blocks.block_errors`."""
    lines = ["Static averages against flow-based (sealed) permeability, per coarse block:",
             f"{'direction':<10}{'method':<12}{'median |error|':>16}{'largest error':>15}{'blocks >10%':>13}"]
    for name in AXES:
        valid = errors[name]["valid"]
        for method, result in errors[name]["static"].items():
            error = result["error"][valid]
            worst = float(error[np.argmax(np.abs(error))]) if error.size else 0.0
            lines.append(f"{name:<10}{method:<12}{relative_error_text(float(np.median(np.abs(error))), signed=False):>16}"
                         f"{relative_error_text(worst):>15}{int((np.abs(error) > 0.1).sum()):>13d}")
    return "\n".join(lines)
