"""Static averages and Cardwell-Parsons bounds against published analytic results."""

import numpy as np
import pytest
from helpers import lognormal, make_cells
from hypothesis import given, settings
from hypothesis import strategies as st

from upscale import coarsen
from upscale.core.partition import make_partition
from upscale.core.static import cardwell_parsons, power_average, static_average
from upscale.io.schema import fine_dataset


def _weights(cells):
    return cells.bulk_volume * cells.active


def test_layered_medium_exact():
    # Bear (1972), Dynamics of Fluids in Porous Media, ch. 5: along layers the effective
    # permeability is the thickness-weighted arithmetic mean, across them the harmonic.
    dz = np.array([0.5, 2.0, 1.0, 3.5])
    k_layer = np.array([300.0, 2.0, 50.0, 900.0])
    k = np.broadcast_to(k_layer, (3, 2, 4)).copy()
    cells = make_cells(k, dz=dz)
    part = make_partition(k.shape, ratio=(3, 2, 4))
    along = (dz * k_layer).sum() / dz.sum()
    across = dz.sum() / (dz / k_layer).sum()
    assert static_average(k, _weights(cells), part, "arithmetic")[0, 0, 0] == pytest.approx(along, rel=1e-12)
    assert static_average(k, _weights(cells), part, "harmonic")[0, 0, 0] == pytest.approx(across, rel=1e-12)
    for axis, expected in ((0, along), (1, along), (2, across)):
        lower, upper = cardwell_parsons(k, cells.dx, cells.dy, cells.dz, part, axis)
        # For a perfectly layered block both Cardwell-Parsons bounds collapse onto the exact value.
        assert lower[0, 0, 0] == pytest.approx(expected, rel=1e-12)
        assert upper[0, 0, 0] == pytest.approx(expected, rel=1e-12)


fields = st.tuples(st.integers(1, 6), st.integers(1, 6), st.integers(1, 6), st.integers(0, 2**31 - 1),
                   st.floats(0.1, 3.0))


@settings(max_examples=60, deadline=None)
@given(fields)
def test_wiener_bounds_random_fields(spec):
    # Wiener (1912): harmonic <= any effective value <= arithmetic; the geometric and the
    # power averages, and both Cardwell-Parsons bounds, lie in between.
    nx, ny, nz, seed, sigma = spec
    k = lognormal((nx, ny, nz), sigma, seed)
    dz = np.random.default_rng(seed + 1).uniform(0.2, 3.0, (nx, ny, nz))
    cells = make_cells(k, dz=dz)
    part = make_partition(k.shape, ratio=(nx, ny, nz))
    w = _weights(cells)
    arith = static_average(k, w, part, "arithmetic")
    harm = static_average(k, w, part, "harmonic")
    tol = 1 + 1e-12
    for value in (static_average(k, w, part, "geometric"), power_average(k, w, part, 0.37)):
        assert np.all(harm <= value * tol) and np.all(value <= arith * tol)
    for axis in range(3):
        lower, upper = cardwell_parsons(k, cells.dx, cells.dy, cells.dz, part, axis)
        assert np.all(lower <= upper * tol)


def test_cardwell_parsons_regular_grid_is_classical_definition():
    # Cardwell & Parsons (1945): on a regular grid, lower = arithmetic over the cross-section
    # of the harmonic means along x of each column; upper = harmonic along x of the
    # arithmetic means of each cross-sectional slice. Computed here directly.
    k = lognormal((4, 3, 5), 1.5, 3)
    cells = make_cells(k)
    part = make_partition(k.shape, ratio=(4, 3, 5))
    lower, upper = cardwell_parsons(k, cells.dx, cells.dy, cells.dz, part, 0)
    expected_lower = np.mean(k.shape[0] / np.sum(1.0 / k, axis=0))
    expected_upper = k.shape[0] / np.sum(1.0 / np.mean(k, axis=(1, 2)))
    assert lower[0, 0, 0] == pytest.approx(expected_lower, rel=1e-12)
    assert upper[0, 0, 0] == pytest.approx(expected_upper, rel=1e-12)


def test_power_average_limits():
    # Journel, Deutsch & Desbarats (1986), SPE 15128: omega = 1 arithmetic, -1 harmonic,
    # omega -> 0 geometric.
    k = lognormal((4, 4, 4), 1.0, 5)
    cells = make_cells(k)
    part = make_partition(k.shape, ratio=(2, 2, 4))
    w = _weights(cells)
    vol = cells.bulk_volume
    block = k[:2, :2, :]
    assert power_average(k, w, part, 1.0)[0, 0, 0] == pytest.approx(block.mean(), rel=1e-12)
    assert power_average(k, w, part, -1.0)[0, 0, 0] == pytest.approx(1 / np.mean(1 / block), rel=1e-12)
    geometric = np.exp(np.mean(np.log(block)))
    assert power_average(k, w, part, 1e-7)[0, 0, 0] == pytest.approx(geometric, rel=1e-5)
    assert power_average(k, w, part, -1e-7)[0, 0, 0] == pytest.approx(geometric, rel=1e-5)
    assert power_average(k, w, part, 0.0)[0, 0, 0] == pytest.approx(geometric, rel=1e-12)
    assert vol.sum() > 0


def test_varying_thickness_weights_and_inactive_cells():
    # Volume weighting: a cell twice as thick counts twice; an inactive cell not at all.
    k = np.array([10.0, 100.0, 1000.0]).reshape(1, 1, 3)
    dz = np.array([1.0, 2.0, 0.0]).reshape(1, 1, 3)  # third cell pinched out
    cells = make_cells(k, dz=dz)
    part = make_partition(k.shape, ratio=(1, 1, 3))
    assert static_average(k, _weights(cells), part, "arithmetic")[0, 0, 0] == pytest.approx((10 + 200) / 3)
    active = np.array([1, 0, 1]).reshape(1, 1, 3)
    cells = make_cells(k, active=active)
    assert static_average(k, _weights(cells), part, "arithmetic")[0, 0, 0] == pytest.approx(505.0)


@settings(max_examples=30, deadline=None)
@given(st.integers(1, 7), st.integers(1, 7), st.integers(1, 7), st.integers(0, 2**31 - 1))
def test_pore_volume_conserved(nx, ny, nz, seed):
    rng = np.random.default_rng(seed)
    shape = (nx, ny, nz)
    k = lognormal(shape, 1.0, seed)
    dz = rng.uniform(0.0, 2.0, shape) * (rng.random(shape) > 0.2)  # some pinched cells
    if not np.any(dz > 0):
        dz[0, 0, 0] = 1.0
    ds = fine_dataset(k, k, k, rng.uniform(0.05, 0.3, shape), rng.uniform(1, 5, nx), rng.uniform(1, 5, ny),
                      dz, ntg=rng.uniform(0, 1, shape))
    ratio = tuple(int(rng.integers(1, n + 1)) for n in shape)
    coarse = coarsen(ds, ratio=ratio, method="arithmetic")
    fine_pv = (ds.porosity * ds.ntg * ds.dx * ds.dy * ds.dz).values.sum()
    assert coarse.pore_volume.values.sum() == pytest.approx(fine_pv, rel=1e-12)
    # each coarse cell: porosity * ntg * bulk volume is its pore volume
    recomputed = coarse.porosity * coarse.ntg * coarse.dx * coarse.dy * coarse.dz
    np.testing.assert_allclose(recomputed.values, coarse.pore_volume.values, rtol=1e-10, atol=1e-12)


def test_per_direction_methods_and_ntg_convention():
    # Common practice (no single source): arithmetic along layers, harmonic across them.
    dz = np.array([1.0, 1.0])
    k = np.broadcast_to(np.array([100.0, 1.0]), (2, 2, 2)).copy()
    ntg = np.full(k.shape, 0.5)
    ds = fine_dataset(k, k, k, np.full(k.shape, 0.2), np.ones(2), np.ones(2), dz, ntg=ntg)
    coarse = coarsen(ds, ratio=(2, 2, 2), method={"x": "arithmetic", "y": "arithmetic", "z": "harmonic"})
    # effective horizontal = arithmetic of k*ntg; written net value = effective / coarse ntg
    assert float(coarse.kx[0, 0, 0] * coarse.ntg[0, 0, 0]) == pytest.approx(0.5 * 50.5)
    assert float(coarse.kx[0, 0, 0]) == pytest.approx(50.5)
    assert float(coarse.kz[0, 0, 0]) == pytest.approx(2 / (1 / 100 + 1))
    assert coarse.attrs["method"] == "x: arithmetic, y: arithmetic, z: harmonic"
