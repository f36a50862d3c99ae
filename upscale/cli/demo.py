"""The built-in demo: a synthetic sector, coarsened, checked and summarised end to end."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from ..about import CAUTION
from ..checks.blocks import block_errors
from ..checks.faces import barrier_summary
from ..checks.summary import field_summary
from ..core.partition import make_partition
from ..core.two_phase import LIMITS
from ..gallery.demo_field import demo_field
from ..gallery.demo_rocks import DEMO_ROCKS
from ..io.coarse_file import coarse_effective
from ..io.reading import open_field
from ..io.rock_table import read_rock_table
from ..io.schema import arrays
from ..io.writing import atomic_write, multiplier_csv
from ..report.curve_report import two_phase_section
from ..report.figures import fine_coarse_maps, save
from ..report.text import format_static_versus_flow, format_summary
from ..scale.coarsen import coarsen
from ..scale.stream import write
from ..scale.two_phase import two_phase
from .check import run_check

DEMO_RATIO = (5, 5, 5)


#: the demo's curve file of each two-phase limit (keys of its paths)
CURVE_PATHS = {"capillary": "curves", "viscous": "viscous_curves"}


#: The demo's transient check takes 4 time steps per doubling of time from 0.01 to
#: about 1.3 drainage time scales (``upscale check`` by default: 8 steps per doubling from
#: 0.001 to 3): the fine model's time steps are most of the demo's run time, the last
#: doublings (the model nearly drained) the dearest; both models share the time grid, so the
#: comparison stays fair.
DEMO_TRANSIENT = {"drainage": "face", "face": "x-", "steps_per_doubling": 4, "span": (1e-2, 1.0)}


def _static_versus_flow(cells, partition, coarse) -> str:
    """Text table: per direction, how far each static average is from the flow-based value."""
    _, errors = block_errors(cells, partition, coarse_effective(coarse))
    return format_static_versus_flow(errors)


def _barriers(coarse, label: str) -> str:
    """Text: faces whose flow-based multiplier is below 0.1, per direction."""
    summary = barrier_summary({n: coarse[f"t{n}_multiplier"].values for n in "xyz"})
    counts = ", ".join(f"{n}: {summary[n]['below']} of {summary[n]['faces']}" for n in "xyz")
    return f"Faces with multiplier < {summary['threshold']} relative to {label}: {counts}"


def run_demo(folder: str | Path = ".", quiet: bool = False) -> dict[str, Path]:
    """``upscale demo``: write the demo field, coarsen it, check the coarse grid against the
    fine field and write the report.

    Parameters
    ----------
    folder : str or Path
        Where ``fields/`` and ``reports/demo/`` are written.
    quiet : bool
        No progress lines.

    Returns
    -------
    dict of Path
        The paths written: fine, coarse, sealed, static, rocks, curves (capillary limit),
        viscous curves, multipliers, summary, figure, report, metrics.
    """
    started = time.perf_counter()
    paths = _demo_paths(Path(folder))
    write(demo_field(), paths["fine"])
    fine = open_field(paths["fine"])
    coarse, static = _coarse_grids(fine, paths)
    cells = arrays(fine)
    partition = make_partition(cells.shape, ratio=DEMO_RATIO)
    save(_kx_maps(cells, partition, coarse), paths["figure"])
    sections, curves = _two_phase(fine, paths)
    text = "\n\n".join([_summary(fine, cells, partition, coarse, static, paths)]
                       + [_two_phase_summary(curves[limit], paths, limit) for limit in LIMITS])
    atomic_write(paths["summary"], lambda tmp: Path(tmp).write_text(text + "\n"))
    print(f"coarse grids and two-phase curves written after {time.perf_counter() - started:.0f} s; now the "
          "whole-model steady and transient checks of the fine and coarse models (about a minute on 2 cores)", flush=True)
    run_check(paths["fine"], paths["coarse"], report_dir=paths["report"].parent, transient=DEMO_TRANSIENT,
              quiet=quiet, compare=[paths["sealed"]], sections=sections)
    print(f"upscale demo finished in {time.perf_counter() - started:.1f} s")
    for name, path in paths.items():
        print(f"  {name:<12} {path}")
    print(f"report: {paths['report']}  (open it in a browser)")
    return paths


def _demo_paths(root: Path) -> dict[str, Path]:
    """The demo's output paths under ``root``; their folders are created."""
    fields, reports = root / "fields", root / "reports" / "demo"
    fields.mkdir(parents=True, exist_ok=True)
    reports.mkdir(parents=True, exist_ok=True)
    return {"fine": fields / "demo.nc", "coarse": fields / "demo_coarse.nc",
            "sealed": fields / "demo_coarse_sealed.nc", "static": fields / "demo_coarse_arithmetic.nc",
            "rocks": fields / "demo_rocks.toml", "curves": fields / "demo_curves.nc",
            "viscous_curves": fields / "demo_curves_viscous.nc",
            "multipliers": reports / "multipliers.csv",
            "summary": reports / "summary.txt", "figure": reports / "fine_coarse_kx.png",
            "report": reports / "index.html", "metrics": reports / "metrics.json"}


def _coarse_grids(fine, paths: dict[str, Path]):
    """The demo's coarse grids, written: local-global (the one checked), flow-based with
    the sealed condition and multipliers (compared beside it), and arithmetic (with
    multipliers, also as a CSV table)."""
    coarse = coarsen(fine, ratio=DEMO_RATIO, method="flow", bc="global")
    write(coarse, paths["coarse"])
    write(coarsen(fine, ratio=DEMO_RATIO, method="flow", bc="sealed", multipliers=True), paths["sealed"])
    static = coarsen(fine, ratio=DEMO_RATIO, method="arithmetic", multipliers=True)
    write(static, paths["static"])
    face_multipliers = {n: static[f"t{n}_multiplier"].values for n in "xyz"}
    atomic_write(paths["multipliers"], lambda tmp: Path(tmp).write_text(multiplier_csv(face_multipliers)))
    return coarse, static


def _two_phase(fine, paths: dict[str, Path]):
    """The demo's rock table and its two-phase curves in both limits, written; a report
    section per limit with the curves of a few blocks."""
    atomic_write(paths["rocks"], lambda tmp: Path(tmp).write_text(DEMO_ROCKS))
    table = read_rock_table(paths["rocks"])
    curves, sections = {}, []
    for limit in LIMITS:
        curves[limit] = two_phase(fine, table, ratio=DEMO_RATIO, limit=limit)
        write(curves[limit], paths[CURVE_PATHS[limit]])
        sections.append((f"Two-phase curves ({limit} limit)", two_phase_section(curves[limit], fine, table)))
    return tuple(sections), curves


def _two_phase_summary(curves, paths: dict[str, Path], limit: str) -> str:
    """Text: the two-phase curve file, its limit and the range of the block end points."""
    swc, sor = curves["swc"].values, curves["sor"].values
    return (f"Two-phase curves ({limit} limit, {curves.sizes['saturation_point']} points per block, rock table "
            f"{paths['rocks']}): {paths[CURVE_PATHS[limit]]}\nBlock end points: swc {np.nanmin(swc):.3f} to "
            f"{np.nanmax(swc):.3f}, sor {np.nanmin(sor):.3f} to {np.nanmax(sor):.3f}. "
            + curves.attrs["two_phase_caution"])


def _kx_maps(cells, partition, coarse):
    """Fine and coarse kx * ntg on one layer and one section."""
    active_fine = partition.expand(coarse["active"].values.astype(bool))
    kx_effective = partition.expand(coarse_effective(coarse)[0])
    return fine_coarse_maps(cells.kx * cells.ntg, cells.active, kx_effective, active_fine,
                            layer=cells.shape[2] // 3, section_y=cells.shape[1] // 2, label="kx * ntg")


def _summary(fine, cells, partition, coarse, static, paths: dict[str, Path]) -> str:
    """The demo's text summary: scenario, caution, field summary, coarse grid, static
    averages against flow, barriers."""
    fine_pv = float(cells.pore_volume.sum())
    coarse_pv = float(coarse["pore_volume"].values.sum())
    return "\n\n".join([
        f"upscale demo: {fine.attrs.get('title', 'synthetic sector')}",
        str(fine.attrs.get("scenario", "")),
        "Caution: " + CAUTION,
        "Fine field\n" + format_summary(field_summary(fine)),
        f"Coarse grid: ratio {DEMO_RATIO}, method {coarse.attrs['method']}, boundary condition "
        f"{coarse.attrs['boundary_condition']}; {coarse.sizes['x']} x {coarse.sizes['y']} x "
        f"{coarse.sizes['z']} cells.\nPore volume fine {fine_pv:.6e} m3, coarse {coarse_pv:.6e} m3 "
        f"(relative difference {abs(coarse_pv - fine_pv) / fine_pv:.1e}).\n"
        f"Largest relative residual of the local solves: {float(coarse['solve_residual'].max()):.1e}",
        _static_versus_flow(cells, partition, coarse),
        _barriers(coarse, "flow-based (sealed) permeability, local-global faces") + "\n"
        + _barriers(static, "arithmetic permeability")
        + f"\nAll multipliers of the arithmetic grid: {paths['multipliers']}",
    ])
