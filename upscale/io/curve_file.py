"""The two-phase curve file: the coarse grid (a valid field for its geometry) with, per
block and saturation point, the upscaled water saturation, capillary pressure and
relative permeability per direction (CF conventions: units, long_name, dimensions)."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..core.two_phase import POINT_VARIABLES, TwoPhaseRecipe
from .rock_table import RockTable

#: where each limit holds, said by the file and the reports
LIMIT_NOTES = {
    "capillary": ("capillary limit: capillary equilibrium inside each block (gravity neglected); holds for low "
                  "rates and small blocks, where capillary forces dominate viscous ones"),
    "viscous": ("viscous limit: every fine cell at the same fractional flow; holds for high rates, where viscous "
                "forces dominate capillary ones"),
}


TWO_PHASE_CAUTION = ("Upscaled two-phase curves depend on the flow regime assumed; these are screening values "
                     "to be reviewed by qualified engineers before use.")


PC_NOTES = {
    "capillary": ("the one capillary pressure at which the pore-volume-weighted fine saturations equal sw; "
                  "missing at the block's connate water saturation (Brooks-Corey J grows without bound)"),
    "viscous": ("pore-volume-weighted mean of the fine capillary pressures at their saturations (cells of zero "
                "permeability left out); missing where unbounded (cells at connate water saturation)"),
}


def _point_attrs(limit: str) -> dict[str, dict]:
    """The attributes of the per-point variables."""
    attrs = {"sw": {"units": "1", "long_name": "water saturation of the coarse block at the saturation point"},
             "pc": {"units": "bar", "long_name": "capillary pressure (oil minus water) of the coarse block",
                    "comment": PC_NOTES[limit]}}
    for phase, label in (("w", "water"), ("o", "oil")):
        for axis in AXES:
            attrs[f"kr{phase}_{axis}"] = {
                "units": "1", "long_name": f"{label} relative permeability of the coarse block along {axis}",
                "comment": f"{label} phase effective permeability / single-phase effective permeability along {axis}"}
    return attrs


def curve_dataset(coarse: xr.Dataset, variables: dict, recipe: TwoPhaseRecipe, table: RockTable,
                  regions: tuple[np.ndarray, dict] | None = None) -> xr.Dataset:
    """The curve file's Dataset.

    Parameters
    ----------
    coarse : xarray.Dataset
        The coarse grid of the single-phase recipe (:func:`upscale.io.coarse_grid.assemble`).
    variables : dict of ndarray
        :func:`upscale.core.two_phase.two_phase_variables` of the whole grid (numpy).
    recipe : TwoPhaseRecipe
    table : RockTable
    regions : (ndarray, dict), optional
        :func:`upscale.core.two_phase.region_curves`: the region codes (G,) and the curves
        (G, P) by variable name.

    Returns
    -------
    xarray.Dataset
        ``coarse`` plus ``sw``, ``pc``, ``krw_x`` ... ``kro_z`` on (x, y, z, saturation_point),
        ``swc``, ``sor``, ``two_phase_residual`` on (x, y, z), the points' coordinate, the
        region curves, and the two-phase attributes. Infinite capillary pressures are
        written as missing (NaN).
    """
    ds = coarse.copy()
    cell = AXES + ("saturation_point",)
    for name, attrs in _point_attrs(recipe.limit).items():
        values = np.asarray(variables[name], dtype=float)
        ds[name] = xr.Variable(cell, np.where(np.isfinite(values), values, np.nan), attrs)
    block = {"swc": {"units": "1", "long_name": "connate water saturation of the coarse block (lowest sw)"},
             "sor": {"units": "1", "long_name": "residual oil saturation of the coarse block (1 - highest sw)"},
             "two_phase_residual": {"long_name": "largest relative residual of the block's phase solves"}}
    for name, attrs in block.items():
        ds[name] = xr.Variable(AXES, np.asarray(variables[name], dtype=float), attrs)
    ds["saturation_point"] = xr.Variable(("saturation_point",), np.arange(recipe.points, dtype=np.int32),
                                         {"long_name": "saturation point index"})
    if recipe.limit == "capillary":
        ds["normalised_saturation"] = xr.Variable(("saturation_point",), recipe.fraction, {
            "units": "1", "long_name": "the point's normalised water saturation of the block, (sw - swc) / (1 - swc - sor)"})
    else:
        ds["fractional_flow"] = xr.Variable(("saturation_point",), recipe.fraction, {
            "units": "1", "long_name": "fractional flow of water of every fine cell at the point"})
    if regions is not None:
        _add_regions(ds, variables, recipe, regions)
    ds.attrs.update(_attributes(recipe, table))
    return ds


def _add_regions(ds: xr.Dataset, variables: dict, recipe: TwoPhaseRecipe, regions) -> None:
    """The per-block region code and one curve set per region."""
    codes, curves = regions
    ds["block_region"] = xr.Variable(AXES, np.asarray(variables["block_region"]).astype(np.int32), {
        "long_name": f"region of the coarse block: the code of '{recipe.regions}' holding most of its pore volume"})
    ds["region_code"] = xr.Variable(("region",), codes.astype(np.int32), {"long_name": f"code of '{recipe.regions}'"})
    attrs = _point_attrs(recipe.limit)
    for name in POINT_VARIABLES:
        values = curves[name]
        long_name = attrs[name]["long_name"].replace("of the coarse block", "of the region")
        ds[f"region_{name}"] = xr.Variable(("region", "saturation_point"), np.where(np.isfinite(values), values, np.nan),
                                           {"units": attrs[name]["units"], "long_name": long_name + ", pore-volume "
                                            "weighted over its blocks"})


def _attributes(recipe: TwoPhaseRecipe, table: RockTable) -> dict:
    """The file's two-phase attributes: limit, points, fluids, rock table and its checksum."""
    fluids = table.fluids
    return {"title": "two-phase curves per coarse block written by upscale",
            "two_phase_limit": recipe.limit, "two_phase_limit_note": LIMIT_NOTES[recipe.limit],
            "saturation_points": int(recipe.points),
            "rock_table": table.path, "rock_table_sha256": table.sha256,
            "rock_types": " ".join(table.curves.names),
            "water_viscosity_cP": fluids.water_viscosity, "oil_viscosity_cP": fluids.oil_viscosity,
            "interfacial_tension_N_per_m": fluids.interfacial_tension,
            "leverett_permeability": "geometric mean of the net kx and ky of each fine cell",
            "relative_permeability": "Corey (1954); capillary pressure: Brooks-Corey (1964) J with Leverett (1941) "
                                     "scaling Pc = sigma J sqrt(phi / k)",
            "two_phase_caution": TWO_PHASE_CAUTION}
