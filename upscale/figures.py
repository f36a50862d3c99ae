"""Figures for summaries and reports (matplotlib, no display needed).

Each function draws onto a new ``matplotlib.figure.Figure`` (no global backend state)
and saves it atomically as PNG.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from .field import atomic_write


def save(figure: Figure, path: str | Path) -> Path:
    """Save a figure as PNG through a temporary file renamed when complete."""
    return atomic_write(path, lambda tmp: figure.savefig(tmp, format="png", dpi=110, bbox_inches="tight"))


def _log_k(k: np.ndarray, active: np.ndarray) -> np.ndarray:
    out = np.full(k.shape, np.nan)
    good = active & (k > 0)
    out[good] = np.log10(k[good])
    return out


def fine_coarse_maps(fine_k: np.ndarray, fine_active: np.ndarray, coarse_k_on_fine: np.ndarray,
                     coarse_active_on_fine: np.ndarray, layer: int, section_y: int, label: str,
                     path: str | Path) -> Path:
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
    return save(figure, path)
