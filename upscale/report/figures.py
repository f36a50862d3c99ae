"""Figures for summaries and reports (matplotlib, no display needed).

Each builder returns a new ``matplotlib.figure.Figure`` (no global backend state);
:func:`save` writes one atomically as PNG, :func:`png_bytes` encodes one for embedding.
"""

from __future__ import annotations

import io
import os
from pathlib import Path

import numpy as np
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure

from ..core.grid import AXES
from ..core.layering import check_edges
from ..errors import InputError
from ..io.writing import atomic_write, check_output_path


def save(figure: Figure, path: str | Path) -> Path:
    """Save a figure as PNG through a temporary file renamed when complete."""
    return atomic_write(path, lambda tmp: figure.savefig(tmp, format="png", dpi=110, bbox_inches="tight"))


def png_bytes(figure: Figure) -> bytes:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=100, bbox_inches="tight")
    return buffer.getvalue()


def _log_k(k: np.ndarray, active: np.ndarray) -> np.ndarray:
    out = np.full(np.shape(k), np.nan)
    good = active & (k > 0)
    out[good] = np.log10(k[good])
    return out


def fine_coarse_maps(fine_k: np.ndarray, fine_active: np.ndarray, coarse_k_on_fine: np.ndarray,
                     coarse_active_on_fine: np.ndarray, layer: int, section_y: int, label: str) -> Figure:
    """Fine and coarse log10 k side by side for one layer (map) and one x-z section,
    with one colour scale; the coarse values are given repeated onto the fine grid."""
    fine_log = _log_k(fine_k, fine_active)
    coarse_log = _log_k(coarse_k_on_fine, coarse_active_on_fine)
    both = np.concatenate([fine_log[np.isfinite(fine_log)], coarse_log[np.isfinite(coarse_log)]])
    low, high = (np.percentile(both, [1, 99]) if both.size else (0.0, 1.0))
    figure = Figure(figsize=(11, 8), layout="constrained")
    axes = figure.subplots(2, 2)
    panels = [
        (fine_log[:, :, layer].T, f"fine, layer {layer}", "x index", "y index", False),
        (coarse_log[:, :, layer].T, f"coarse, layer {layer}", "x index", "y index", False),
        (fine_log[:, section_y, :].T, f"fine, section y = {section_y}", "x index", "layer (down)", True),
        (coarse_log[:, section_y, :].T, f"coarse, section y = {section_y}", "x index", "layer (down)", True),
    ]
    image = None
    for ax, (data, title, xlabel, ylabel, downward) in zip(axes.ravel(), panels):
        image = ax.imshow(data, origin="upper" if downward else "lower", vmin=low, vmax=high,
                          cmap="viridis", aspect="auto", interpolation="nearest")
        ax.set_title(title)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(ylabel)
    colorbar = figure.colorbar(image, ax=axes, shrink=0.8)
    colorbar.set_label(f"log10 {label} (mD); blank = inactive")
    return figure


def histograms(fine: dict, coarse: dict) -> Figure:
    """Distributions of log10 effective k per direction, fine cells vs coarse cells,
    each weighted by bulk volume. ``fine``/``coarse``: axis -> (k, bulk volume)."""
    figure = Figure(figsize=(12, 3.8), layout="constrained")
    for ax, name in zip(figure.subplots(1, 3), AXES):
        for (k, volume), label, style in ((fine[name], "fine", "step"), (coarse[name], "coarse", "step")):
            good = (k > 0) & (volume > 0)
            ax.hist(np.log10(k[good]), bins=50, weights=volume[good] / volume[good].sum(),
                    histtype=style, linewidth=1.8, label=label)
        ax.set_xlabel(f"log10 effective k{name} (mD)")
        ax.set_ylabel("share of bulk volume")
        ax.legend(fontsize="small")
    return figure


def crossplot(errors: dict, tolerance: float) -> Figure:
    """Static averages against the flow-based value per block, one panel a direction."""
    figure = Figure(figsize=(12, 4.2), layout="constrained")
    for ax, name in zip(figure.subplots(1, 3), AXES):
        data = errors[name]
        valid = data["valid"]
        flow = data["flow"][valid]
        if flow.size == 0:
            ax.set_title(f"{name}: no active block")
            continue
        for method, marker in zip(data["static"], ("o", "s", "^")):
            ax.loglog(flow, np.maximum(data["static"][method]["value"][valid], flow.min() * 1e-3), marker,
                      markersize=2.5, alpha=0.5, linestyle="none", label=method)
        line = np.array([flow.min(), flow.max()])
        ax.loglog(line, line, "k-", linewidth=1, label="1:1")
        ax.loglog(line, line * (1 + tolerance), "k:", linewidth=1, label=f"±{tolerance:.0%}")
        ax.loglog(line, line * (1 - tolerance), "k:", linewidth=1)
        ax.set_xlabel(f"flow-based k{name} (mD)")
        ax.set_ylabel(f"static k{name} (mD)")
        ax.legend(fontsize="small", markerscale=3)
    return figure


def error_map(error: np.ndarray, valid: np.ndarray, title: str) -> Figure:
    """Map of relative errors of one layer of coarse blocks (diverging colours around 0)."""
    data = np.where(valid, error, np.nan)
    limit = float(np.nanmax(np.abs(data))) if np.isfinite(data).any() else 1.0
    limit = min(max(limit, 1e-6), 10.0)
    figure = Figure(figsize=(6.5, 5), layout="constrained")
    ax = figure.subplots()
    image = ax.imshow(data.T, origin="lower", cmap="RdBu_r", norm=TwoSlopeNorm(0.0, -limit, limit),
                      interpolation="nearest", aspect="auto")
    ax.set_xlabel("coarse x index")
    ax.set_ylabel("coarse y index")
    ax.set_title(title)
    figure.colorbar(image, ax=ax, label="relative error (static - flow) / flow; blank = inactive")
    return figure


def whole_model_bars(global_check: dict) -> Figure:
    """Whole-model effective permeability per axis, fine against coarse."""
    figure = Figure(figsize=(6.5, 4), layout="constrained")
    ax = figure.subplots()
    names = [a for a in AXES if a in global_check]
    fine = [global_check[a]["fine_k"] or 0.0 for a in names]
    coarse = [global_check[a]["coarse_k"] or 0.0 for a in names]
    x = np.arange(len(names))
    ax.bar(x - 0.2, fine, 0.4, label="fine")
    ax.bar(x + 0.2, coarse, 0.4, label="coarse")
    for i, name in enumerate(names):
        error = global_check[name].get("relative_error")
        if error is not None:
            ax.annotate(f"{error:+.1%}", (x[i] + 0.2, coarse[i]), ha="center", va="bottom", fontsize="small")
    ax.set_xticks(x, [f"along {n}" for n in names])
    ax.set_yscale("log")
    ax.set_ylabel("whole-model effective k (mD)")
    ax.set_title("whole-model steady flow, no-flow sides")
    ax.legend()
    return figure


def diagonal_bars(diagonal: dict) -> Figure:
    """Relative error of each diagonal flow, coarse against fine, beside its floor."""
    figure = Figure(figsize=(7.5, 4), layout="constrained")
    ax = figure.subplots()
    names = list(diagonal)
    error = [100 * (diagonal[n]["relative_error"] or 0.0) for n in names]
    floor = [100 * (diagonal[n]["floor"] or 0.0) for n in names]
    x = np.arange(len(names))
    ax.bar(x - 0.2, error, 0.4, label="coarse against fine")
    ax.bar(x + 0.2, floor, 0.4, label="floor (homogeneous field, same grids)", color="tab:gray")
    ax.axhline(0.0, color="black", linewidth=0.8)
    ax.set_xticks(x, [n.replace("_", " ") for n in names], fontsize="small")
    ax.set_ylabel("relative error of the rate, %")
    ax.set_title("diagonal flows, patch to patch")
    ax.legend(fontsize="small")
    return figure


def layer_flow_shares(shares: dict) -> Figure:
    """Share of the total flow carried by each coarse layer, fine against coarse: one
    panel per flow direction (``metrics["layer_flow_share"]``), layers downward."""
    names = [a for a in AXES if a in shares]
    figure = Figure(figsize=(4.0 * max(len(names), 1), 5), layout="constrained")
    panels = np.atleast_1d(figure.subplots(1, max(len(names), 1), sharey=True))
    for ax, name in zip(panels, names):
        fine = np.array([np.nan if v is None else v for v in shares[name]["fine"]], dtype=float)
        coarse = np.array([np.nan if v is None else v for v in shares[name]["coarse"]], dtype=float)
        layer = np.arange(fine.size)
        ax.barh(layer - 0.2, fine, 0.4, label="fine")
        ax.barh(layer + 0.2, coarse, 0.4, label="coarse")
        ax.set_title(f"flow along {name}")
        ax.set_xlabel("share of the total flow")
        ax.grid(True, axis="x", alpha=0.3)
    panels[0].set_ylabel("coarse layer (top = 0)")
    panels[0].invert_yaxis()
    panels[0].legend(loc="best", fontsize="small")
    return figure


def transient_curves(result: dict) -> Figure:
    """Drainage rate and cumulative volume over time, fine against coarse."""
    figure = Figure(figsize=(11, 4), layout="constrained")
    rate_ax, cumulative_ax = figure.subplots(1, 2)
    time = np.asarray(result["times"], dtype=float)
    for model, style in (("fine", "-"), ("coarse", "--")):
        rate = np.asarray(result[model]["rate"], dtype=float)
        rate_ax.loglog(time, np.where(rate > 0, rate, np.nan), style, label=model)
        cumulative_ax.semilogx(time, result[model]["cumulative"], style, label=model)
    rate_ax.set_xlabel("time (days)")
    rate_ax.set_ylabel("rate (m3/day)")
    cumulative_ax.set_xlabel("time (days)")
    cumulative_ax.set_ylabel("cumulative volume (m3)")
    rate_ax.legend()
    cumulative_ax.legend()
    rate_ax.set_title("drainage rate")
    cumulative_ax.set_title("cumulative drained volume")
    return figure


def multiplier_map(multiplier: np.ndarray, name: str, index: int) -> Figure:
    """Map of log10 transmissibility multipliers on one layer of faces."""
    figure = Figure(figsize=(6.5, 5), layout="constrained")
    ax = figure.subplots()
    data = np.log10(np.clip(multiplier, 1e-6, None))
    image = ax.imshow(data.T, origin="lower", cmap="magma", vmin=-3, vmax=max(0.5, float(data.max())),
                      interpolation="nearest", aspect="auto")
    ax.set_xlabel("coarse x index")
    ax.set_ylabel("coarse y index")
    ax.set_title(f"t{name} multipliers, face layer {index} (values < 1e-6 shown at 1e-6)")
    figure.colorbar(image, ax=ax, label="log10 multiplier")
    return figure


LINE_STYLES = ("--", ":", "-.", (0, (5, 1, 1, 1, 1, 1)), (0, (8, 3)), (0, (1, 3)))


def plot_layer_profile(stats: dict, groupings: dict, path: str | os.PathLike) -> Path:
    """Write :func:`layer_profile_figure` as PNG, atomically. Returns the path."""
    figure = layer_profile_figure(stats, groupings)
    return save(figure, check_output_path(path))


def layer_profile_figure(stats: dict, groupings: dict):
    """A depth profile of the layering with the group boundaries of each grouping.

    Left panel: the fine-layer bulk-weighted mean of ln kh as a step curve against depth
    (cumulative layer thickness from the top, m, increasing downward); right panel: the
    standard deviation of ln kh inside each fine layer. Each grouping in ``groupings`` (name ->
    edges) draws its inner boundaries as horizontal lines in its own line style. Layers without
    ln kh leave a gap. Returns a matplotlib Figure (no global backend is touched).
    """

    missing = [k for k in ("thickness", "lnk_mean", "lnk_var", "weight") if k not in stats]
    if missing:
        raise InputError(f"layer statistics lack {', '.join(missing)}; build them with layer_statistics()")
    thickness = np.asarray(stats["thickness"], dtype=float)
    nz = thickness.size
    checked = {str(name): check_edges(e, nz) for name, e in groupings.items()}
    has_log = np.asarray(stats["weight"], dtype=float) > 0
    mean = np.where(has_log, np.asarray(stats["lnk_mean"], dtype=float), np.nan)
    std = np.where(has_log, np.sqrt(np.maximum(np.asarray(stats["lnk_var"], dtype=float), 0)), np.nan)
    depth = np.concatenate([[0.0], np.cumsum(thickness)])

    def steps(values):  # vertical step curve: each layer a vertical segment, joined at its edges
        return np.repeat(values, 2), np.column_stack([depth[:-1], depth[1:]]).ravel()

    figure = Figure(figsize=(9, 7), layout="constrained")
    left, right = figure.subplots(1, 2, sharey=True, width_ratios=(3, 2))
    left.plot(*steps(mean), color="tab:blue", linewidth=1.5, label="fine layers")
    right.plot(*steps(std), color="tab:gray", linewidth=1.5, label="fine layers")
    colours = ("tab:red", "tab:green", "tab:purple", "tab:orange", "tab:brown", "tab:olive")
    for n, (name, edges) in enumerate(checked.items()):
        style = dict(color=colours[n % len(colours)], linestyle=LINE_STYLES[n % len(LINE_STYLES)],
                     linewidth=max(2.6 - 0.5 * n, 0.9))  # wider first: identical groupings stay visible
        for k, edge in enumerate(edges[1:-1]):
            label = f"{name} ({edges.size - 1} groups)" if k == 0 else None
            left.axhline(depth[edge], label=label, **style)
            right.axhline(depth[edge], **style)
        if edges.size == 2:  # a single group has no inner boundary: still name it
            left.plot([], [], label=f"{name} (1 group)", **style)
    if depth[-1] > 0:
        left.set_ylim(depth[-1], 0.0)  # depth increases downward
    else:
        left.invert_yaxis()
    left.set_xlabel("mean ln(kh / 1 mD) in the layer, kh = kx * ntg")
    left.set_ylabel("depth below the top of the model, m (sum of mean layer thicknesses)")
    right.set_xlabel("std of ln(kh / 1 mD) within the layer")
    left.set_title("fine-layer permeability and coarse-layer boundaries")
    right.set_title("spread inside each fine layer")
    left.grid(True, alpha=0.3)
    right.grid(True, alpha=0.3)
    right.set_xlim(left=0.0)
    left.legend(loc="best", fontsize="small")
    return figure


def two_phase_curves(panels: list[dict]) -> Figure:
    """Upscaled curves of a few coarse blocks against the fine rock curves.

    Parameters
    ----------
    panels : list of dict
        One per block: ``title``; ``sw`` (P,); ``kr``, a dict of label -> (P,) values (e.g.
        "krw x"); ``pc`` (P,) in bar (NaN where unbounded); ``rocks``, a list of dicts with
        ``name``, ``sw``, ``krw``, ``kro`` and ``pc`` (bar) of each rock type in the block.

    Returns
    -------
    Figure
        Top row relative permeability against Sw, bottom row capillary pressure (log scale);
        the block's curves thick with markers, the rock curves thin and grey.
    """
    figure = Figure(figsize=(4.2 * max(len(panels), 1), 7.5), layout="constrained")
    axes = np.asarray(figure.subplots(2, max(len(panels), 1), squeeze=False))
    styles = ("-", "--", ":")
    for column, panel in enumerate(panels):
        top, bottom = axes[0, column], axes[1, column]
        for n, rock in enumerate(panel["rocks"]):
            shade = str(0.35 + 0.4 * n / max(len(panel["rocks"]), 1))
            top.plot(rock["sw"], rock["krw"], color=shade, linewidth=1, label=f"{rock['name']} (fine)")
            top.plot(rock["sw"], rock["kro"], color=shade, linewidth=1)
            bottom.semilogy(rock["sw"], rock["pc"], color=shade, linewidth=1, label=f"{rock['name']} (fine)")
        for n, (label, values) in enumerate(panel["kr"].items()):
            colour = "tab:blue" if label.startswith("krw") else "tab:red"
            top.plot(panel["sw"], values, color=colour, linestyle=styles[(n // 2) % 3], marker="o", markersize=3,
                     linewidth=1.8, label=label)
        bottom.semilogy(panel["sw"], panel["pc"], color="black", marker="o", markersize=3, linewidth=1.8,
                        label="block")
        top.set_title(panel["title"], fontsize="medium")
        top.set_ylabel("relative permeability")
        bottom.set_ylabel("capillary pressure (bar)")
        for ax in (top, bottom):
            ax.set_xlabel("water saturation Sw")
            ax.set_xlim(0.0, 1.0)
            ax.grid(True, alpha=0.3)
            ax.legend(fontsize="x-small")
        top.set_ylim(0.0, 1.0)
    return figure
