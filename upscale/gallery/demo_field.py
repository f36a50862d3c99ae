"""The demo scenario: an invented sector of an imaginary tide-dominated sandstone."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..io.schema import fine_dataset
from .synthetic import channel_mask, gaussian_field

FACIES = {"tidal_flat_heterolithic": 0, "channel_sand": 1, "shale_drape": 2, "cemented_streak": 3}


DEMO_TITLE = "Saltmarrow Bank sector, synthetic"


DEMO_SCENARIO = (
    "Synthetic and invented: a 2.5 km x 2.5 km x ~60 m sector of an imaginary tide-dominated "
    "sandstone, with stacked sinuous channel sands in tidal-flat heterolithics, shale-draped "
    "layers, patchy cemented streaks and an onlap wedge of pinched-out layers in the x=0, y=0 "
    "corner; it describes no real field."
)


def _band(values: np.ndarray, centre: float, spread: float, low: float, high: float) -> np.ndarray:
    """centre + spread * values, clipped to [low, high]."""
    return np.clip(centre + spread * values, low, high)


def demo_field(seed=7) -> xr.Dataset:
    """The invented "Saltmarrow Bank" demo sector: 100 x 100 x 50 cells of 25 m x 25 m.

    Layer thickness dz (m, 3-D) varies by layer and laterally within 0.3..3 m, about 60 m in
    total; dz = 0 in an onlap wedge of pinched-out bottom layers near the x=0, y=0 corner
    (about 2.5 % of cells). Facies (variable ``facies``; codes in ``flag_meanings``):

    * tidal-flat heterolithics: lognormal k 20..100 mD, kv/kh 0.05..0.1, ntg 0.55..0.85, porosity 0.11..0.21;
    * channel sand (stacked sinuous channels): k 300..3000 mD, kv/kh 0.3, ntg 0.9..1, porosity 0.2..0.3;
    * shale drapes (whole layers of heterolithics): ntg 0.1..0.3, kv/kh 0.01, porosity 0.07..0.15;
    * cemented streaks (single thin layers, about two thirds of each layer, in patches):
      k 0.01..0.1 mD, kv/kh 0.1, porosity 0.05..0.08 - partial vertical barriers.

    Channels cut drapes; cement overprints everything. k in mD, kx = ky; pinched cells hold 0.

    Parameters
    ----------
    seed : int, SeedSequence or Generator
        Determines the field (``np.random.default_rng(seed)``).

    Returns
    -------
    xarray.Dataset
        A field in the fine-field schema (dx, dy (100,), dz, kx, ky, kz, porosity, ntg
        (100, 100, 50)) with the int8 variable ``facies`` and the scenario attributes.
    """
    shape = (100, 100, 50)
    layers, channels, perm, thick, patches, drapes, noise = np.random.default_rng(seed).spawn(7)
    streak_layers, drape_layers = _special_layers(layers, shape[2])
    dz = _layer_thickness(shape, layers, thick, streak_layers, drape_layers)
    pinched = _onlap_wedge(shape)
    dz[pinched] = 0.0
    facies = np.zeros(shape, np.int8)
    facies[:, :, drape_layers] = FACIES["shale_drape"]
    facies[_channel_sands(shape, channels)] = FACIES["channel_sand"]
    facies[_cemented_streaks(shape, streak_layers, patches)] = FACIES["cemented_streak"]

    # properties, correlated with one lognormal score g within each facies
    g = gaussian_field(shape, (12, 12, 2), perm)
    kinds = tuple(facies == FACIES[n] for n in ("channel_sand", "shale_drape", "cemented_streak"))
    kh, kv_kh = _permeability(g, *kinds)
    porosity = _porosity(g, noise, *kinds)
    ntg = _net_to_gross(g, drapes, drape_layers, *kinds)
    for values in (kh, kv_kh, porosity, ntg):
        values[pinched] = 0.0
    return _dataset(seed, facies, dz, kh, kv_kh, porosity, ntg)


def _special_layers(layers: np.random.Generator, nz: int) -> tuple[np.ndarray, np.ndarray]:
    """Indices of the cemented-streak layers (4, never adjacent, in the upper half) and of
    the shale-drape layers (6 others), both sorted."""
    streak_layers = 2 * np.sort(layers.choice(np.arange(2, nz // 2 - 2), size=4, replace=False))
    others = np.setdiff1d(np.arange(2, nz - 2), streak_layers)
    drape_layers = np.sort(layers.choice(others, size=6, replace=False))
    return streak_layers, drape_layers


def _layer_thickness(shape, layers: np.random.Generator, thick: np.random.Generator,
                     streak_layers: np.ndarray, drape_layers: np.ndarray) -> np.ndarray:
    """Layering: dz (m, 3-D), a thickness per layer (thin streaks and drapes, the plain
    layers scaled to a 60 m total) varied laterally, clipped to 0.3..3 m."""
    nz = shape[2]
    base = layers.uniform(0.7, 2.0, nz)
    base[streak_layers] = layers.uniform(0.3, 0.5, streak_layers.size)
    base[drape_layers] = layers.uniform(0.4, 0.9, drape_layers.size)
    plain = np.ones(nz, bool)
    plain[streak_layers] = plain[drape_layers] = False
    base[plain] *= (60.0 - base[~plain].sum()) / base[plain].sum()
    dz = base * np.exp(0.2 * gaussian_field(shape, (25, 25, 0), thick))
    np.clip(dz, 0.3, 3.0, out=dz)
    return dz


def _onlap_wedge(shape) -> np.ndarray:
    """The pinched-out cells: up to 24 bottom layers missing near the x=0, y=0 corner,
    none from 45 cells away."""
    nx, ny, nz = shape
    i, j, k = np.ogrid[:nx, :ny, :nz]
    distance = np.hypot(i + 0.5, j + 0.5) / 45.0                       # 1 at 45 cells from the corner
    pinched_layers = np.floor(24.0 * np.clip(1.0 - distance, 0.0, None))
    return k >= nz - pinched_layers


def _channel_sands(shape, channels: np.random.Generator) -> np.ndarray:
    """Cells of 14 sinuous channels in three stacked stories."""
    count = 14
    story_top = channels.choice(np.array([6, 18, 30]), size=count)
    return channel_mask(shape,
                        y_centre=channels.uniform(0.0, shape[1], count),
                        amplitude=channels.uniform(4.0, 12.0, count),
                        wavelength=channels.uniform(35.0, 70.0, count),
                        phase=channels.uniform(0.0, 2.0 * np.pi, count),
                        width=channels.uniform(5.0, 12.0, count),
                        z_top=story_top + channels.integers(-3, 4, count),
                        thickness=channels.integers(4, 8, count))


def _cemented_streaks(shape, streak_layers: np.ndarray, patches: np.random.Generator) -> np.ndarray:
    """Cells of the cemented patches (about two thirds of each streak layer)."""
    nx, ny, _ = shape
    cement = np.zeros(shape, bool)
    cement[:, :, streak_layers] = gaussian_field((nx, ny, streak_layers.size), (15, 15, 0), patches) > -0.4
    return cement


def _permeability(g: np.ndarray, is_channel, is_drape, is_cement) -> tuple[np.ndarray, np.ndarray]:
    """Horizontal permeability kh (mD) and kv/kh of every cell, by facies."""
    kh = np.clip(45.0 * np.exp(0.4 * g), 20.0, 100.0)
    kh[is_channel] = np.clip(1000.0 * np.exp(0.5 * g[is_channel]), 300.0, 3000.0)
    kh[is_cement] = 10.0 ** (-1.5 + 0.5 * np.clip(g[is_cement] / 2.0, -1.0, 1.0))
    kv_kh = _band(g, 0.075, 0.0125, 0.05, 0.1)
    kv_kh[is_channel] = 0.3
    kv_kh[is_drape] = 0.01
    kv_kh[is_cement] = 0.1
    return kh, kv_kh


def _porosity(g: np.ndarray, noise: np.random.Generator, is_channel, is_drape, is_cement) -> np.ndarray:
    """Porosity by facies, plus a little white noise, within 0.05..0.30."""
    wiggle = 0.005 * noise.standard_normal(g.shape)
    porosity = _band(g, 0.16, 0.025, 0.11, 0.21)
    porosity[is_channel] = _band(g[is_channel], 0.25, 0.03, 0.20, 0.30)
    porosity[is_drape] = _band(g[is_drape], 0.11, 0.02, 0.07, 0.15)
    porosity[is_cement] = _band(g[is_cement], 0.065, 0.01, 0.05, 0.08)
    return np.clip(porosity + wiggle, 0.05, 0.30)


def _net_to_gross(g: np.ndarray, drapes: np.random.Generator, drape_layers: np.ndarray,
                  is_channel, is_drape, is_cement) -> np.ndarray:
    """Net-to-gross by facies; the drapes' own correlated score in the drape layers."""
    nx, ny, _ = g.shape
    ntg = _band(g, 0.7, 0.1, 0.55, 0.85)
    ntg[is_channel] = _band(g[is_channel], 0.95, 0.03, 0.9, 1.0)
    drape_score = gaussian_field((nx, ny, drape_layers.size), (20, 20, 0), drapes)
    drape_ntg = np.zeros(g.shape)
    drape_ntg[:, :, drape_layers] = _band(drape_score, 0.2, 0.07, 0.1, 0.3)
    ntg[is_drape] = drape_ntg[is_drape]
    ntg[is_cement] = 1.0
    return ntg


def _dataset(seed, facies, dz, kh, kv_kh, porosity, ntg) -> xr.Dataset:
    """The demo field as a dataset: 25 m cells, kx = ky = kh, the facies codes."""
    nx, ny, _ = facies.shape
    attrs = {"title": DEMO_TITLE, "scenario": DEMO_SCENARIO, "Conventions": "CF-1.10",
             "source": f"upscale.gallery.synthetic.demo_field(seed={seed!r})"}
    ds = fine_dataset(kx=kh, ky=kh.copy(), kz=kv_kh * kh, porosity=porosity, dx=np.full(nx, 25.0),
                      dy=np.full(ny, 25.0), dz=dz, ntg=ntg, attrs=attrs)
    ds["facies"] = xr.Variable(AXES, facies, {"long_name": "facies code",
                                              "flag_values": np.array(list(FACIES.values()), np.int8),
                                              "flag_meanings": " ".join(FACIES)})
    return ds
