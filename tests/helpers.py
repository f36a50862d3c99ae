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


#: a rock table for two-phase tests (TOML): two rock types, 'sand' by flag meaning and code 7
ROCKS = """\
[fluids]
water_viscosity = 0.6
oil_viscosity = 3.0
interfacial_tension = 0.03

[rock.sand]
swc = 0.1
sor = 0.2
krw_max = 0.3
kro_max = 0.85
nw = 2.0
no = 2.5
j_entry = 0.3
pore_size_index = 2.5

[rock."7"]
swc = 0.28
sor = 0.22
krw_max = 0.12
kro_max = 0.55
nw = 3.5
no = 3.0
j_entry = 0.45
pore_size_index = 1.1
"""
