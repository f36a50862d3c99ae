"""Small builders shared by the tests (not fixtures: plain functions)."""

import numpy as np

from upscale.io.schema import arrays, fine_dataset
from upscale.io.validation import validate


def make_cells(kx, ky=None, kz=None, dx=None, dy=None, dz=None, porosity=0.2, ntg=None, active=None):
    """A validated GridArrays from permeability arrays (mD) and optional sizes (m)."""
    kx = np.asarray(kx, dtype=float)
    shape = kx.shape
    ky = kx if ky is None else ky
    kz = kx if kz is None else kz
    dx = np.ones(shape[0]) if dx is None else dx
    dy = np.ones(shape[1]) if dy is None else dy
    dz = np.ones(shape[2]) if dz is None else dz
    ds = fine_dataset(kx, ky, kz, np.broadcast_to(porosity, shape), dx, dy, dz, ntg=ntg, active=active)
    return arrays(validate(ds))


def lognormal(shape, sigma, seed):
    """Uncorrelated lognormal permeability (geometric mean 1 mD)."""
    return np.exp(sigma * np.random.default_rng(seed).standard_normal(shape))
