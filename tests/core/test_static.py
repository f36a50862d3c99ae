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
    # Wiener (1912): harmonic <= any effective value <= arithmetic (series and parallel
    # arrangements of the same cells). The geometric and the power averages, and both
    # Cardwell-Parsons bounds, lie in between. The two means are computed here with numpy
    # (bulk-volume weights). The grid is rectilinear (dx per column, dy per row, dz per
    # layer, all varying): on it a homogeneous field gives back its own k under the block
    # definition k = G L^2 / V; with a thickness varying inside a layer it need not, and
    # the bounds then measure the geometry too (Cauchy-Schwarz: sum(A/H) sum(A H) >= A^2).
    nx, ny, nz, seed, sigma = spec
    rng = np.random.default_rng(seed + 1)
    k = lognormal((nx, ny, nz), sigma, seed)
    dx, dy, dz = rng.uniform(0.5, 4.0, nx), rng.uniform(0.5, 4.0, ny), rng.uniform(0.2, 3.0, nz)
    cells = make_cells(k, dx=dx, dy=dy, dz=dz)
    part = make_partition(k.shape, ratio=(nx, ny, nz))
    volume = dx[:, None, None] * dy[None, :, None] * dz[None, None, :]
    arith = np.sum(volume * k) / volume.sum()
    harm = volume.sum() / np.sum(volume / k)
    # rounding: sums of at most 216 terms, each value good to a few ulp
    tol = 1e-12
    w = _weights(cells)
    assert static_average(k, w, part, "arithmetic")[0, 0, 0] == pytest.approx(arith, rel=tol)
    assert static_average(k, w, part, "harmonic")[0, 0, 0] == pytest.approx(harm, rel=tol)
    for value in (static_average(k, w, part, "geometric"), power_average(k, w, part, 0.37)):
        assert harm * (1 - tol) <= value[0, 0, 0] <= arith * (1 + tol)
    for axis in range(3):
        lower, upper = cardwell_parsons(k, cells.dx, cells.dy, cells.dz, part, axis)
        assert harm * (1 - tol) <= lower[0, 0, 0] <= upper[0, 0, 0] * (1 + tol)
        assert upper[0, 0, 0] <= arith * (1 + tol)


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
    # omega -> 0 geometric; each against numpy's weighted means, with bulk-volume weights
    # that vary (dx, dy, dz all differ), in two blocks of a 4 x 4 x 4 grid.
    rng = np.random.default_rng(5)
    k = lognormal((4, 4, 4), 1.0, 5)
    dx, dy, dz = rng.uniform(0.5, 3.0, 4), rng.uniform(0.5, 3.0, 4), rng.uniform(0.2, 2.0, (4, 4, 4))
    cells = make_cells(k, dx=dx, dy=dy, dz=dz)
    part = make_partition(k.shape, ratio=(2, 2, 4))
    w = _weights(cells)
    volume = dx[:, None, None] * dy[None, :, None] * dz
    for block, cut in (((0, 0, 0), np.s_[:2, :2, :]), ((1, 0, 0), np.s_[2:, :2, :])):
        kb, vb = k[cut].ravel(), volume[cut].ravel()
        arithmetic = np.average(kb, weights=vb)
        harmonic = 1.0 / np.average(1.0 / kb, weights=vb)
        geometric = np.exp(np.average(np.log(kb), weights=vb))
        centred = np.log(kb) - np.log(geometric)
        cumulant2 = np.average(centred ** 2, weights=vb)
        cumulant3 = np.average(centred ** 3, weights=vb)
        assert power_average(k, w, part, 1.0)[block] == pytest.approx(arithmetic, rel=1e-12)
        assert power_average(k, w, part, -1.0)[block] == pytest.approx(harmonic, rel=1e-12)
        assert power_average(k, w, part, 0.0)[block] == pytest.approx(geometric, rel=1e-12)
        # Near 0, from the cumulant expansion of ln E[k^omega]:
        # ln M_omega = ln k_G + omega k2 / 2 + omega^2 k3 / 6 + omega^3 k4 / 24 + ...
        # At omega = +-1e-7 the bias omega k2 / 2 is 3e-8 at most here, the rounding of
        # (mean of k^omega)^(1/omega) about eps / omega = 2e-9: we allow 1e-7.
        for omega in (1e-7, -1e-7):
            assert power_average(k, w, part, omega)[block] == pytest.approx(geometric, rel=1e-7)
        # The approach itself at omega = +-1e-3: the slope ln(M / k_G) / omega is
        # k2 / 2 + omega k3 / 6 to within omega^2 k4 / 24 (a relative 1e-6 here; the rounding
        # of ln(M / k_G) ~ 2e-4 costs 1e-12); we allow 1e-5, against a linear term of 1.5e-4.
        for omega in (1e-3, -1e-3):
            slope = np.log(power_average(k, w, part, omega)[block] / geometric) / omega
            assert slope == pytest.approx(cumulant2 / 2 + omega * cumulant3 / 6, rel=1e-5)
        # Power-mean inequality (Hardy, Littlewood & Polya 1934): nondecreasing in omega.
        omegas = np.linspace(-2.0, 2.0, 41)
        means = [power_average(k, w, part, float(o))[block] for o in omegas]
        assert np.all(np.diff(means) >= -1e-12 * max(means))
        assert harmonic < geometric < arithmetic


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


def test_static_average_power_and_its_refusals():
    # The power method through static_average: (sum w k^omega / sum w)^(1/omega) computed
    # here with numpy (Journel, Deutsch & Desbarats 1986); rounding only (1e-12). A missing
    # or non-finite exponent and an unknown method are refused naming what to give.
    from upscale.core.static import STATIC_METHODS
    from upscale.errors import InputError

    rng = np.random.default_rng(8)
    k = lognormal((4, 2, 2), 1.0, 8)
    w = rng.uniform(0.5, 2.0, k.shape)
    part = make_partition(k.shape, ratio=(2, 2, 2))
    got = static_average(k, w, part, "power", omega=0.5)
    for block, cut in ((0, np.s_[:2]), (1, np.s_[2:])):
        expected = (np.sum(w[cut] * k[cut] ** 0.5) / np.sum(w[cut])) ** 2
        assert got[block, 0, 0] == pytest.approx(expected, rel=1e-12)
    for omega in (None, float("nan"), float("inf")):
        with pytest.raises(InputError, match=r"^method 'power' needs a finite exponent omega \(e.g. --omega 0.5\)$"):
            static_average(k, w, part, "power", omega=omega)
    with pytest.raises(InputError, match="^unknown static method 'median'; choose from arithmetic, harmonic, "
                                         "geometric, power$"):
        static_average(k, w, part, "median")
    assert STATIC_METHODS == ("arithmetic", "harmonic", "geometric", "power")


def test_zero_permeability_cells_and_empty_blocks():
    # By hand, on three blocks of two cells along x (weights 0.25 and 0.5 m3, below one so
    # that no rule on a weight of 1 can pass): block 0 holds a cell of k = 0, block 1 none,
    # block 2 no weight at all. Wiener (1912): a zero cell in series closes the block
    # (harmonic, and the geometric and negative powers below it, exactly 0), while in
    # parallel it only dilutes (arithmetic w2 k2 / (w1 + w2), positive powers likewise).
    # A block without weight is 0. No 0/0 or log(0) warnings on the way (inactive regions
    # are common; numpy warnings would reach the terminal).
    k = np.array([0.0, 4.0, 1.0, 9.0, 5.0, 5.0]).reshape(6, 1, 1)
    w = np.array([0.25, 0.5, 0.25, 0.5, 0.0, 0.0]).reshape(6, 1, 1)
    part = make_partition(k.shape, ratio=(2, 1, 1))
    with np.errstate(all="raise"):
        results = {omega: power_average(k, w, part, omega)[:, 0, 0] for omega in (1.0, 0.5, 0.0, -0.5, -1.0)}
        for method in ("arithmetic", "harmonic", "geometric"):
            static_average(k.astype(np.float32), w, part, method)
    mean = {omega: (0.25 * 1.0 ** omega + 0.5 * 9.0 ** omega) / 0.75 for omega in (1.0, 0.5, -0.5, -1.0)}
    exact = {1.0: [0.5 * 4.0 / 0.75, mean[1.0], 0.0], 0.5: [(0.5 * 2.0 / 0.75) ** 2, mean[0.5] ** 2, 0.0],
             0.0: [0.0, np.exp(0.5 * np.log(9.0) / 0.75), 0.0], -0.5: [0.0, mean[-0.5] ** -2, 0.0],
             -1.0: [0.0, 1.0 / mean[-1.0], 0.0]}
    for omega, expected in exact.items():
        np.testing.assert_allclose(results[omega], expected, rtol=1e-14, atol=0)   # a few roundings


def test_averages_of_single_precision_input_are_computed_in_double():
    # Fields are often stored as float32: the average of the same (exactly representable)
    # values must not carry float32 rounding (1e-7), only double rounding (1e-12 here).
    k = lognormal((2, 2, 2), 1.0, 4).astype(np.float32)
    w = np.ones(k.shape)
    part = make_partition(k.shape, ratio=(2, 2, 2))
    exact = k.astype(float)
    for omega, expected in ((1.0, exact.mean()), (0.3, np.mean(exact ** 0.3) ** (1 / 0.3)),
                            (-1.0, 1.0 / np.mean(1.0 / exact)), (0.0, np.exp(np.mean(np.log(exact))))):
        assert power_average(k, w, part, omega)[0, 0, 0] == pytest.approx(expected, rel=1e-12)


def test_divide_or_zero_broadcasts_the_denominator():
    from upscale.core.static import divide_or_zero

    np.testing.assert_array_equal(divide_or_zero(np.array(6.0), np.array([2.0, 0.0, 3.0])), [3.0, 0.0, 2.0])


def test_cardwell_parsons_with_a_closed_cell_and_pinched_cells():
    # Cardwell & Parsons (1945) by hand on 2 x 2 x 1 unit cells, flow along x, one closed
    # cell (k = 0 at x = 0, y = 1): lower = parallel of the columns along x, each a series:
    # column y = 0 (1 and 3 mD) 1 / (1 + 1/3) = 0.75, column y = 1 closed: 0.75 in all;
    # upper = series of the slices across x, each a parallel: slice x = 0 (1 + 0), slice
    # x = 1 (3 + 2), 1 / (1/1 + 1/5) = 5/6. Block k = G L^2 / V with L = 2, V = 4: G.
    k = np.array([[1.0, 0.0], [3.0, 2.0]]).reshape(2, 2, 1)
    part = make_partition(k.shape, ratio=(2, 2, 1))
    with np.errstate(all="raise"):   # the closed cell's infinite resistance without 1/0
        lower, upper = cardwell_parsons(k, np.ones(2), np.ones(2), np.ones(k.shape), part, 0)
    assert lower[0, 0, 0] == pytest.approx(0.75, rel=1e-14)
    assert upper[0, 0, 0] == pytest.approx(5 / 6, rel=1e-14)
    # Pinched cells (dz = 0) have no length along z: bounds along z stay finite, ordered,
    # and are computed without a 0/0.
    rng = np.random.default_rng(2)
    k = lognormal((3, 3, 4), 1.0, 2)
    dz = rng.uniform(0.5, 2.0, k.shape)
    dz[1, 1, 2] = dz[0, 2, 0] = 0.0
    part = make_partition(k.shape, ratio=(3, 3, 4))
    with np.errstate(all="raise"):
        lower, upper = cardwell_parsons(k, np.ones(3), np.ones(3), dz, part, 2)
    assert np.isfinite(lower).all() and np.isfinite(upper).all()
    assert 0 < lower[0, 0, 0] <= upper[0, 0, 0]
