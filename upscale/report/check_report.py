"""The report of ``upscale check``: the whole-model checks, the per-block errors, the
layering, the transient check and the multipliers, each with its figures.
"""

from __future__ import annotations

import html
from pathlib import Path

import numpy as np

from ..core.layering import layer_statistics
from ..io.coarse_file import coarse_effective
from . import figures
from .figures import layer_profile_figure
from .page import figure_html, table, write_report


def _header(metrics: dict) -> str:
    inputs, coarse = metrics["inputs"], metrics["coarse"]
    rows = [["fine field", inputs["fine"]["path"], inputs["fine"]["sha256"]],
            ["coarse grid", inputs["coarse"]["path"], inputs["coarse"]["sha256"]]]
    method = [["method", coarse.get("method")], ["boundary condition", coarse.get("boundary_condition")],
              ["border (fine cells)", coarse.get("border")], ["partition", coarse.get("partition")],
              ["coarse shape", " x ".join(map(str, coarse["shape"]))],
              ["checked", f"a sector only: {metrics['sector']} (fine indices), as a model of its own with no-flow "
                          "sides" if metrics.get("sector") else "the whole model"],
              ["written by", f"upscale {coarse.get('tool_version')}"],
              ["coarse grid made from this fine file", "yes" if coarse.get("input_matches_fine") else
               "no (checksums differ)"]]
    return table(["input", "path", "SHA-256"], rows, 3) + table(["setting", "value"], method, 2)


def _global_section(metrics: dict) -> str:
    rows = []
    for axis, g in metrics["global"].items():
        rows.append([f"along {axis}", g["fine_k"], g["coarse_k"], g["relative_error"],
                     metrics["pressure_rms"].get(axis), g["fine_residual"], g["coarse_residual"]])
    text = ("<p>Each model is solved with no-flow sides and a unit pressure drop between the two "
            "faces normal to the axis; the coarse model uses the coarse file's transmissibilities "
            "and multipliers. Pressure RMS: coarse pressures against the bulk-weighted block "
            "averages of the fine pressures, as a fraction of the drop.</p>")
    shares = metrics.get("layer_flow_share") or {}
    return (text + table(["flow", "fine k (mD)", "coarse k (mD)", "relative error", "pressure RMS",
                          "fine residual", "coarse residual"], rows)
            + (figure_html(figures.layer_flow_shares(shares), "Share of the total flow carried by each coarse "
                           "layer, fine and coarse (the fine layers summed onto the coarse ones).")
               if shares else ""))


def _block_section(metrics: dict) -> str:
    blocks = metrics["blocks"]
    rows = []
    for axis in ("x", "y", "z"):
        d = blocks[axis]
        for method, m in d["methods"].items():
            e = m["relative_error"]
            rows.append([axis, method, e["median"], e["p90"], e["max"], m["flagged_blocks"], m["outside_bounds"],
                         d["blocks"]])
    widths = [[axis, blocks[axis]["bound_width"]["median"], blocks[axis]["bound_width"]["p90"],
               blocks[axis]["bound_width"]["max"], blocks[axis]["flow_outside_bounds"]] for axis in ("x", "y", "z")]
    return (f"<p>Flow-based reference: {html.escape(blocks['flow_reference'])}. A block is flagged when a "
            f"static average misses it by more than {blocks['tolerance']:.0%}. Apart from that, the blocks "
            "whose average lies outside their Cardwell-Parsons bounds are counted (the arithmetic and "
            "harmonic averages do wherever a block is heterogeneous both along and across the flow).</p>"
            + table(["direction", "static method", "median |error|", "p90 |error|", "max |error|", "flagged",
                     "outside bounds", "blocks"], rows, 2)
            + "<p>Width of the Cardwell-Parsons bounds (upper / lower) per block:</p>"
            + table(["direction", "median", "p90", "max", "flow value outside bounds"], widths))


def _layering_section(metrics: dict) -> str:
    layering = metrics.get("layering")
    if not layering:
        return "<p>One fine layer: no layering to judge.</p>"
    rows = []
    for name, judged in layering.items():
        rows.append([name, " ".join(map(str, judged.get("edges", []))), judged.get("variance_kept"),
                     judged.get("worst_std")])
    return ("<p>Share of the variance of ln(kx·ntg) kept between coarse layers (1 = all heterogeneity "
            "is between layers), for the coarse file's grouping, the optimal grouping with the same "
            "number of layers (dynamic programming, least within-layer variance) and the uniform one.</p>"
            + table(["grouping", "edges", "variance kept", "largest within-layer std of ln k"], rows, 2))


def _transient_section(metrics: dict) -> str:
    t = metrics.get("transient") or {}
    setup = t.get("drainage") or {}
    if setup.get("type") == "well":
        where = f"well in fine column {setup.get('column')} (coarse column {setup.get('coarse_column')})"
    else:
        where = f"constant-pressure face {setup.get('face')}"
    times = t.get("times") or []
    rows = [["drainage", where],
            ["pressures (bar): initial, drainage", f"{t.get('p_initial_bar')}, {t.get('p_drain_bar')}"],
            ["total compressibility (1/bar), viscosity (cP)",
             f"{t.get('compressibility_per_bar')}, {t.get('viscosity_cP')}"],
            ["time steps (the same for both models)", len(times)],
            ["relative error of the final cumulative volume", t.get("final_cumulative_relative_error")],
            ["pore volume, relative difference", t.get("pore_volume_relative_difference")],
            ["fine: drained fraction at the end", (t.get("fine") or {}).get("drained_fraction_end")],
            ["coarse: drained fraction at the end", (t.get("coarse") or {}).get("drained_fraction_end")]]
    return ("<p>Slightly compressible single-phase drainage, second order in time (BDF2): a test of pore "
            "volumes and transmissibilities together.</p>" + table(["quantity", "value"], rows, 1))


def _multiplier_section(metrics: dict) -> str:
    m = metrics.get("multipliers")
    if not m:
        return "<p>The coarse file carries no flow-based multipliers (coarsen with --multipliers).</p>"
    rows = [[axis, m[axis]["faces"], m[axis]["below"], m[axis]["closed"]] for axis in ("x", "y", "z")]
    return (f"<p>Faces whose flow-based multiplier is below {m['threshold']}: barriers the coarse "
            "permeability alone would miss.</p>" + table(["direction", "faces", "below threshold", "closed (0)"], rows))


def _diagonal_section(metrics: dict) -> str:
    rows = [[name, d["description"], d["fine_rate"], d["coarse_rate"], d["relative_error"], d["floor"],
             d["above_floor"]] for name, d in metrics["diagonal"].items()]
    return ("<p>Constant pressure on a patch of one model face against a patch of the opposite face, no flow "
            "elsewhere: flows the upscaling was not fitted to. Part of their error no two-point coarse grid "
            "can remove (it resolves the pressure near the patch edges worse than the fine one); the floor "
            "is that part, measured as the same flow on a homogeneous field of the same grids. Rates in "
            "mD·m per unit pressure drop.</p>"
            + table(["flow", "patches", "fine rate", "coarse rate", "relative error", "floor", "above floor"],
                    rows, 2))


def _comparison_section(metrics: dict) -> str:
    comparison = metrics["comparison"]
    flows = list(next(iter(comparison.values())))
    rows = [[label] + [None if errors[f] is None else round(100 * errors[f], 2) for f in flows]
            for label, errors in comparison.items()]
    floors = (["floor (homogeneous, same grids)"] + [None] * sum(f in "xyz" for f in flows)
              + [None if metrics["diagonal"][f]["floor"] is None else round(100 * metrics["diagonal"][f]["floor"], 2)
                 for f in flows if f not in "xyz"]) if metrics.get("diagonal") else None
    return ("<p>The coarse grid checked here beside other coarse grids of the same fine field and blocks, "
            "each against the same fine solutions: relative error of the rate, %.</p>"
            + table(["coarse grid"] + [f if f in "xyz" else f.replace("_", " ") for f in flows],
                    rows + ([floors] if floors else []), 1))


def build_report(folder, metrics: dict, arrays: dict, extra: tuple = ()) -> dict[str, Path]:
    """Compose the figures and tables of the checks that ran and write the report;
    ``extra``: more (title, HTML) sections, placed last."""
    ran = metrics["checks"]["run"]
    sections = [("Whole-model check", _steady_part(metrics))] if "steady" in ran else []
    if "diagonal" in ran:
        sections.append(("Diagonal flows", _diagonal_section(metrics) + figure_html(
            figures.diagonal_bars(metrics["diagonal"]), "Relative error of each diagonal flow beside its floor.")))
    if metrics.get("comparison"):
        sections.append(("Coarse grids compared", _comparison_section(metrics)))
    sections.append(("Fine and coarse fields", _fields_part(arrays)))
    if "blocks" in ran:
        sections.append(("Static averages against flow-based permeability", _blocks_part(metrics, arrays)))
    if "layering" in ran:
        sections.append(("Layering", _layering_part(metrics, arrays)))
    if "transient" in ran:
        sections.append(("Transient drainage check", _transient_part(metrics)))
    sections.append(("Transmissibility multipliers", _multipliers_part(metrics, arrays)))
    left_out = metrics["checks"]["left_out"]
    if left_out:
        sections.append(("Checks left out", f"<p>Not run for this report: {html.escape(', '.join(left_out))}.</p>"))
    sections += list(extra)
    return write_report(folder, "upscale check report", _header(metrics), sections, metrics)


def _coarse_layer(arrays: dict) -> tuple[int, int, int]:
    """The fine layer and section shown, and the coarse layer holding that fine layer."""
    cells, partition = arrays["cells"], arrays["partition"]
    layer = cells.shape[2] // 3
    return layer, cells.shape[1] // 2, int(np.searchsorted(partition.edges[2], layer, side="right") - 1)


def _steady_part(metrics: dict) -> str:
    return _global_section(metrics) + figure_html(figures.whole_model_bars(metrics["global"]),
                                                  "Whole-model effective permeability, fine and coarse.")


def _fields_part(arrays: dict) -> str:
    cells, partition, coarse = arrays["cells"], arrays["partition"], arrays["coarse"]
    coarse_k = dict(zip(("x", "y", "z"), coarse_effective(coarse)))
    fine_k = dict(zip(("x", "y", "z"), cells.flow_permeability()))
    active_fine = partition.expand(coarse["active"].values.astype(bool))
    layer, section, _ = _coarse_layer(arrays)
    maps = figures.fine_coarse_maps(fine_k["x"], cells.active, partition.expand(coarse_k["x"]), active_fine,
                                    layer, section, "kx * ntg")
    bulk = coarse["bulk_volume"].values
    hist = figures.histograms({a: (fine_k[a][cells.active], cells.bulk_volume[cells.active]) for a in fine_k},
                              {a: (coarse_k[a].ravel(), bulk.ravel()) for a in coarse_k})
    return (figure_html(maps, f"log10 kx·ntg, layer {layer} and section y = {section}, one colour scale.")
            + figure_html(hist, "Distributions of effective permeability, fine cells and coarse cells, by bulk volume."))


def _blocks_part(metrics: dict, arrays: dict) -> str:
    errors = arrays["blocks"]
    _, _, coarse_layer = _coarse_layer(arrays)
    worst = max(("x", "y", "z"), key=lambda a: metrics["blocks"][a]["methods"]["arithmetic"]["flagged_blocks"])
    error = errors[worst]["static"]["arithmetic"]
    return (_block_section(metrics)
            + figure_html(figures.crossplot(errors, metrics["blocks"]["tolerance"]),
                          "Static averages against the flow-based value per coarse block.")
            + figure_html(figures.error_map(error["error"][:, :, coarse_layer], errors[worst]["valid"][:, :, coarse_layer],
                                            f"arithmetic vs flow along {worst}, coarse layer {coarse_layer}"),
                          f"Relative error of the arithmetic average along {worst} (the direction with most "
                          "flagged blocks)."))


def _layering_part(metrics: dict, arrays: dict) -> str:
    layering = metrics.get("layering")
    if not layering:
        return _layering_section(metrics)
    groupings = {name: judged["edges"] for name, judged in layering.items() if "edges" in judged}
    return _layering_section(metrics) + figure_html(
        layer_profile_figure(layer_statistics(arrays["cells"]), groupings), "Fine-layer profile with the group boundaries.")


def _transient_part(metrics: dict) -> str:
    transient = metrics.get("transient")
    figure = (figure_html(figures.transient_curves(transient), "Drainage rate and cumulative volume, fine and coarse.")
              if transient and "times" in transient else "")
    return _transient_section(metrics) + figure


def _multipliers_part(metrics: dict, arrays: dict) -> str:
    coarse = arrays["coarse"]
    if not (metrics.get("multipliers") and coarse.sizes["z"] > 1):
        return _multiplier_section(metrics)
    face_layer = min(_coarse_layer(arrays)[2], coarse.sizes["z"] - 2)
    return _multiplier_section(metrics) + figure_html(
        figures.multiplier_map(coarse["tz_multiplier"].values[:, :, face_layer], "z", face_layer),
        "Vertical multipliers on one layer of coarse faces.")
