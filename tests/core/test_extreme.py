"""Extreme but valid fields: results stay finite and within bounds, with warnings where
a block is flagged (no source: physical invariants of the discrete problem)."""

import logging

import numpy as np
import pytest
from helpers import lognormal

from upscale import coarsen
from upscale.io.schema import fine_dataset


def _fine(k, dz=None, active=None, kz=None):
    shape = k.shape
    dz = np.ones(shape[2]) if dz is None else dz
    return fine_dataset(k, k, k if kz is None else kz, np.full(shape, 0.2), np.ones(shape[0]),
                        np.ones(shape[1]), dz, active=active)


def _check_finite_within_bounds(coarse, sealed=True):
    active = coarse.active.values.astype(bool)
    for name in "xyz":
        k = (coarse[f"k{name}"] * (coarse.ntg if name != "z" else 1)).values
        assert np.all(np.isfinite(k)) and np.all(k >= 0)
        if sealed:
            lower = coarse[f"k{name}_lower_bound"].values
            upper = coarse[f"k{name}_upper_bound"].values
            assert np.all(k[active] >= lower[active] * (1 - 1e-8) - 1e-300)
            assert np.all(k[active] <= upper[active] * (1 + 1e-8))
        for face in ("t", ):
            t = coarse[f"{face}{name}"].values
            assert np.all(np.isfinite(t)) and np.all(t >= 0)


def test_contrast_of_1e12_between_cells():
    rng = np.random.default_rng(1)
    k = np.where(rng.random((8, 8, 8)) < 0.5, 1e-6, 1e6)
    coarse = coarsen(_fine(k), ratio=(4, 4, 4), method="flow", multipliers=True)
    _check_finite_within_bounds(coarse)
    assert float(coarse.solve_residual.max()) <= 1e-10


def test_all_zero_block_is_closed_with_a_warning(caplog):
    k = lognormal((8, 4, 4), 1.0, 2)
    k[:4] = 0.0  # the first coarse block has no permeability at all
    with caplog.at_level(logging.WARNING, logger="upscale"):
        coarse = coarsen(_fine(k), ratio=(4, 4, 4), method="flow", multipliers=True)
    _check_finite_within_bounds(coarse)
    assert float(coarse.kx[0, 0, 0]) == 0.0
    assert float(coarse.tx[0, 0, 0]) == 0.0
    assert any("zero kx" in record.message for record in caplog.records)


def test_single_active_cell():
    k = lognormal((4, 4, 4), 1.0, 3)
    active = np.zeros(k.shape, dtype=np.int8)
    active[1, 2, 3] = 1
    for method in ("flow", "arithmetic", "harmonic"):
        coarse = coarsen(_fine(k, active=active), ratio=(2, 2, 2), method=method)
        assert int(coarse.active.sum()) == 1
        assert np.all(np.isfinite(coarse.kx.values)) and not np.any(np.isnan(coarse.porosity.values))


@pytest.mark.parametrize("bc", ["sealed", "periodic", "linear"])
def test_one_cell_thick_layers_and_many_pinched_cells(bc):
    rng = np.random.default_rng(7)
    k = lognormal((6, 6, 9), 1.5, 7)
    dz = rng.uniform(0.1, 2.0, k.shape) * (rng.random(k.shape) > 0.6)  # 60 % pinched
    dz[0, 0, 0] = 1.0
    coarse = coarsen(_fine(k, dz=dz), ratio=(3, 3, 1), method="flow", bc=bc, multipliers=True)
    _check_finite_within_bounds(coarse, sealed=bc == "sealed")
    fine_pv = float((0.2 * dz).sum())
    assert float(coarse.pore_volume.sum()) == pytest.approx(fine_pv, rel=1e-12)
