"""The two-phase section of a report: the limit used and where it holds, and the curves
of a few coarse blocks against the fine rock curves of their cells."""

from __future__ import annotations

import html
from pathlib import Path

import numpy as np
import xarray as xr

from ..about import tool_version
from ..core.grid import AXES
from ..core.rock_curves import RockCurves
from ..core.two_phase import cell_rocks, rock_index
from ..io.curve_file import LIMIT_NOTES, TWO_PHASE_CAUTION
from ..io.rock_table import RockTable, facies_rocks
from ..io.schema import arrays
from . import figures
from .page import figure_html, table, write_report

#: points of each fine rock curve drawn
ROCK_POINTS = 60


def chosen_blocks(curves: xr.Dataset, count: int = 3) -> list[tuple[int, int, int]]:
    """A few blocks that flow along x and z, spread over the range of end points: the
    10th, 50th and 90th percentiles of their connate water saturation (for ``count`` = 3;
    different mixes of rock types).

    Parameters
    ----------
    curves : xarray.Dataset
        A curve file.
    count : int
        Most blocks.

    Returns
    -------
    list of (int, int, int)
        Coarse indices, distinct.
    """
    swc = curves["swc"].values
    flowing = (curves["kx"].values > 0) & (curves["kz"].values > 0) & (curves["pore_volume"].values > 0)
    valid = np.flatnonzero((np.isfinite(swc) & flowing).ravel())
    if valid.size == 0:
        return []
    ordered = valid[np.argsort(swc.ravel()[valid], kind="stable")]
    where = np.linspace(0.1, 0.9, count) if count > 1 else np.array([0.5])
    picks = dict.fromkeys(ordered[(where * (ordered.size - 1)).round().astype(int)].tolist())
    return [tuple(int(i) for i in np.unravel_index(p, swc.shape)) for p in picks]


def _block_rocks(curves: xr.Dataset, fine: xr.Dataset, rock_table: RockTable, block) -> tuple[list[dict], dict]:
    """The fine rock curves of one block's cells (each rock type with pore volume; its Pc at
    the pore-volume-weighted mean Leverett scale of its cells) and their pore-volume shares."""
    window = {name: slice(int(curves[f"{name}_start"].values[i]), int(curves[f"{name}_stop"].values[i]))
              for name, i in zip(AXES, block)}
    part = fine.isel(window)
    cells = arrays(part)
    rock = rock_index(*facies_rocks(part, rock_table), part["facies"].values, cells.active)
    rocks = cell_rocks(cells, rock, rock_table.curves, rock_table.fluids)
    pore = cells.pore_volume
    total = pore.sum()
    out, shares = [], {}
    for r, name in enumerate(rock_table.curves.names):
        own = pore * (rock == r) * np.isfinite(rocks.scale)
        if own.sum() <= 0:
            continue
        shares[name] = float((pore * (rock == r)).sum() / total)
        scale = float((own * np.where(np.isfinite(rocks.scale), rocks.scale, 0.0)).sum() / own.sum())
        out.append(_rock_curve(rock_table.curves, r, name, scale))
    return out, shares


def _rock_curve(curves: RockCurves, r: int, name: str, scale: float) -> dict:
    """One rock type's curves from swc to 1 - sor, its Pc at the Leverett ``scale`` (bar)."""
    rock = np.full(ROCK_POINTS, r)
    sw = np.linspace(curves.swc[r], 1.0 - curves.sor[r], ROCK_POINTS)[1:]
    return {"name": name, "sw": sw, "krw": curves.water(sw, rock[1:]), "kro": curves.oil(sw, rock[1:]),
            "pc": scale * curves.leverett_j(sw, rock[1:])}


def two_phase_section(curves: xr.Dataset, fine: xr.Dataset, rock_table: RockTable) -> str:
    """HTML: the limit and where it holds, the caution, a table and the figure of a few blocks."""
    limit = curves.attrs["two_phase_limit"]
    panels, rows = [], []
    for block in chosen_blocks(curves):
        rocks, shares = _block_rocks(curves, fine, rock_table, block)
        mix = ", ".join(f"{name} {share:.0%}" for name, share in shares.items())
        kr = {f"kr{p} {a}": curves[f"kr{p}_{a}"].values[block] for a in ("x", "z") for p in "wo"}
        panels.append({"title": f"block {block}: {mix}", "sw": curves["sw"].values[block], "kr": kr,
                       "pc": curves["pc"].values[block], "rocks": rocks})
        rows.append([str(block), mix, float(curves["swc"].values[block]), float(curves["sor"].values[block]),
                     float(curves["krw_x"].values[block][-1]), float(curves["kro_x"].values[block][0])])
    text = (f"<p>Limit: <strong>{html.escape(limit)}</strong>. {html.escape(LIMIT_NOTES[limit][0].upper())}"
            f"{html.escape(LIMIT_NOTES[limit][1:])}. The other limit ({'viscous' if limit == 'capillary' else 'capillary'}: "
            f"{html.escape(LIMIT_NOTES['viscous' if limit == 'capillary' else 'capillary'].split(': ', 1)[1])}) gives "
            f"other curves from the same rocks. {html.escape(TWO_PHASE_CAUTION)}</p>"
            f"<p>Rock table {html.escape(rock_table.path)} (SHA-256 {rock_table.sha256}); {curves.sizes['saturation_point']} "
            "saturation points per block; kr per direction = phase effective permeability / single-phase "
            "effective permeability. The blocks shown flow along x and z; they sit at the 10th, 50th and 90th "
            "percentiles of the blocks' connate water saturation.</p>")
    return text + _blocks_table(rows) + (figure_html(figures.two_phase_curves(panels), "Upscaled curves of the blocks "
                                                  "(thick, markers) against the fine rock curves of their cells "
                                                  "(thin; Pc at the cells' mean Leverett scale).") if panels else "")


def _blocks_table(rows: list[list]) -> str:
    """The table of the blocks shown."""
    return table(["block (i, j, k)", "rock types by pore volume", "swc", "sor", "krw x at 1 - sor", "kro x at swc"],
                 rows, 2)


def build_curve_report(folder, curves: xr.Dataset, fine: xr.Dataset, rocks: RockTable) -> dict[str, Path]:
    """Write ``index.html`` (the two-phase section) and ``metrics.json`` (the limit, the points,
    the blocks shown and the range of the block end points) into ``folder``."""
    metrics = {"two_phase": {"limit": curves.attrs["two_phase_limit"], "points": int(curves.sizes["saturation_point"]),
                             "rock_table": rocks.path, "rock_table_sha256": rocks.sha256,
                             "blocks_shown": [list(b) for b in chosen_blocks(curves)],
                             "swc_range": [float(np.nanmin(curves["swc"])), float(np.nanmax(curves["swc"]))],
                             "sor_range": [float(np.nanmin(curves["sor"])), float(np.nanmax(curves["sor"]))],
                             "tool_version": tool_version()}}
    header = _header(curves)
    return write_report(folder, "upscale two-phase curves", header,
                        [("Two-phase curves", two_phase_section(curves, fine, rocks))], metrics)


def _header(curves: xr.Dataset) -> str:
    """The header table: input, rock table, partition, boundary condition."""
    rows = [["fine field", curves.attrs.get("input_file", "")], ["rock table", curves.attrs.get("rock_table", "")],
            ["partition", curves.attrs.get("partition", "")],
            ["boundary condition, border", f"{curves.attrs.get('boundary_condition')}, {curves.attrs.get('border')}"],
            ["coarse shape", " x ".join(str(curves.sizes[d]) for d in AXES)]]
    return table(["input", "value"], rows, 2)
