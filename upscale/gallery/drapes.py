"""Discontinuous shale drapes: a field where vertical flow must find the holes.

Invented test data: lognormal sand with thin near-sealing shale layers that each cover a
random share of the area, their holes where a smooth random field is highest. Vertical
flow between two drapes goes round through the holes, so a coarse block's vertical
permeability depends on where the holes of its neighbours are: the case where purely
local upscaling is known to fail.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..io.schema import fine_dataset
from .synthetic import gaussian_field


def drape_field(shape=(80, 80, 20), seed=5, k_sand: float = 200.0, sigma_ln: float = 1.0,
                k_shale: float = 1e-3, cover=(0.6, 0.9), spacing=(3, 7), cell_size=(20.0, 20.0, 1.0),
                kv_kh_sand: float = 0.3) -> xr.Dataset:
    """Lognormal sand with one-cell shale drapes.

    Parameters
    ----------
    shape : tuple of int
        (nx, ny, nz) cells.
    seed : int or numpy.random.SeedSequence
        Determines the field.
    k_sand : float
        Geometric-mean horizontal sand permeability, mD (correlation 12 : 12 : 3 cells).
    sigma_ln : float
        Standard deviation of ln k in the sand.
    k_shale : float
        Permeability of the drapes, mD, in every direction.
    cover : (float, float)
        Range of the share of the area each drape covers (uniform draw per drape).
    spacing : (int, int)
        Range of the layers from one drape to the next (uniform draw, upper bound excluded).
    cell_size : (float, float, float)
        dx, dy, dz in m.
    kv_kh_sand : float
        Vertical to horizontal permeability in the sand.

    Returns
    -------
    xarray.Dataset
        A field in the schema, with ``facies`` 0 (sand) and 1 (shale drape).
    """
    rng = np.random.default_rng(seed)
    sand_seed, hole_seed, layer_seed = rng.spawn(3)
    nx, ny, nz = shape
    k = k_sand * np.exp(sigma_ln * gaussian_field(shape, (12, 12, 3), sand_seed))
    kz = kv_kh_sand * k
    picker = np.random.default_rng(layer_seed)
    layers, z = [], int(picker.integers(2, 4))
    while z < nz - 1:
        layers.append(z)
        z += int(picker.integers(*spacing))
    shares = picker.uniform(*cover, len(layers))
    holes = gaussian_field((nx, ny, max(len(layers), 1)), (8, 8, 0), hole_seed)
    shale = np.zeros(shape, dtype=bool)
    for i, (layer, share) in enumerate(zip(layers, shares)):
        shale[:, :, layer] = holes[:, :, i] < np.quantile(holes[:, :, i], share)
    k[shale], kz[shale] = k_shale, k_shale
    attrs = {"title": "Shale drape field, synthetic", "source": "upscale.gallery.drapes.drape_field",
             "comment": f"invented test data: drapes in layers {layers}, covering {np.round(shares, 2).tolist()} "
                        f"of the area, seed {seed!r}"}
    ds = fine_dataset(k, k.copy(), kz, np.where(shale, 0.05, 0.22), np.full(nx, cell_size[0]),
                      np.full(ny, cell_size[1]), np.full(nz, cell_size[2]), ntg=np.ones(shape), attrs=attrs)
    ds["facies"] = xr.Variable(("x", "y", "z"), shale.astype(np.int8),
                               {"long_name": "facies code", "flag_values": np.array([0, 1], np.int8),
                                "flag_meanings": "sand shale_drape"})
    return ds
