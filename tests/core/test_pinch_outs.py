"""Pinch-out connections: vertical flow across pinched cells (dz = 0) between the real
cells of a column, as if those two were neighbours (the series pair of their half
transmissibilities; common practice for pinch-out connections, no source).

Outside checks: the two real cells stacked directly (the same model without the pinched
cells, which have no volume), the series law of layers (Bear 1972, Dynamics of Fluids in
Porous Media, from memory: k = L / sum(l_i / k_i) across layers), and the independent
two-point reference of tests/flow_reference.py, which takes the pinched cells out and
joins the cells above and below them directly.
"""

import numpy as np
import pytest
from flow_reference import sealed_problem
from helpers import lognormal, make_cells
from hypothesis import given, settings
from hypothesis import strategies as st

from upscale.checks.run import check
from upscale.core.block_problems import flow_tensors
from upscale.core.partition import make_partition
from upscale.core.pressure import fine_model_check
from upscale.core.static import cardwell_parsons
from upscale.core.transient import TransientSystem, simulate
from upscale.io.schema import arrays, fine_dataset
from upscale.io.validation import validate
from upscale.scale.coarsen import coarsen

AREA = 3.0 * 2.0  # dx * dy of the columns below, m2


def _column(k, dz, kz=None):
    """A field of one column (3 m x 2 m), porosity 0.2, the given k (mD) and dz (m) per layer."""
    k = np.asarray(k, dtype=float).reshape(1, 1, -1)
    kz = k if kz is None else np.asarray(kz, dtype=float).reshape(1, 1, -1)
    return fine_dataset(k, k, kz, np.full(k.shape, 0.2), np.array([3.0]), np.array([2.0]), np.asarray(dz, float))


def _series(k, dz):
    """Bear (1972), layers in series: L / sum(l / k) over the real layers."""
    k, dz = np.asarray(k, float), np.asarray(dz, float)
    real = dz > 0
    return dz[real].sum() / np.sum(dz[real] / k[real])


columns = st.tuples(st.integers(0, 3), st.integers(1, 4), st.integers(0, 3),
                    st.floats(0.1, 1e3), st.floats(0.1, 1e3), st.floats(0.1, 5.0), st.floats(0.1, 5.0))


@settings(max_examples=25, deadline=None)
@given(columns)
def test_two_real_cells_across_pinched_cells_flow_as_if_stacked(column):
    # Real cells a and b with r pinched cells between them, and runs of pinched cells at
    # the top and bottom (a held pressure reaches the first real cell through its half):
    # the whole-model and every local condition give the series law of the two cells,
    # which is also the stacked column's (the linear condition, whose side faces feed the
    # column, against the stacked column's own value). Tolerance: refined direct solves of
    # a few cells, whose rate errs by about the unit round-off times the condition number
    # (the halves differ by up to 1e5 here): 1e-9 relative.
    top, between, bottom, k_a, k_b, dz_a, dz_b = column
    k = [0.0] * top + [k_a] + [0.0] * between + [k_b] + [0.0] * bottom
    dz = [0.0] * top + [dz_a] + [0.0] * between + [dz_b] + [0.0] * bottom
    fine, stacked = _column(k, dz), _column([k_a, k_b], [dz_a, dz_b])
    expected = _series([k_a, k_b], [dz_a, dz_b])
    assert fine_model_check(arrays(validate(fine)), "z")["k"] == pytest.approx(expected, rel=1e-9)
    for bc in ("sealed", "periodic", "linear"):
        pinched = float(coarsen(fine, ratio=(1, 1, len(k)), bc=bc)["kz"][0, 0, 0])
        if bc == "linear":
            expected = float(coarsen(stacked, ratio=(1, 1, 2), bc=bc)["kz"][0, 0, 0])
        assert pinched == pytest.approx(expected, rel=1e-9), bc
    # without the connections the pinched cells seal the column (the series of a and b
    # is far from 0: at least 1e-2 mD over at most 10 m)
    sealed = coarsen(fine, ratio=(1, 1, len(k)), pinch_connections=False)
    assert float(sealed["kz"][0, 0, 0]) == 0.0


def test_the_transient_drainage_of_a_pinched_column_is_that_of_the_stacked_one():
    # A pinched cell has no pore volume: eliminating it from the implicit system joins its
    # two neighbours by exactly the series pair (a Schur complement), so the drainage
    # through the top face, where two pinched cells lie, is that of the column without
    # them. Tolerance: the direct solves here are refined to about 1e-12 (simulate's
    # default tolerance, 1e-10); rates agree to 1e-9 relative.
    k, dz = [0.0, 0.0, 50.0, 0.0, 5.0, 400.0], [0.0, 0.0, 2.0, 0.0, 1.0, 3.0]
    pinched = TransientSystem.from_fine(arrays(validate(_column(k, dz))), face="z-")
    stacked = TransientSystem.from_fine(arrays(validate(_column([50.0, 5.0, 400.0], [2.0, 1.0, 3.0]))), face="z-")
    times = np.geomspace(1e-3, 10.0, 12)
    rates = [simulate(system, times)["rate"] for system in (pinched, stacked)]
    assert rates[1][0] > 0
    np.testing.assert_allclose(rates[0], rates[1], rtol=1e-9)


def _layered_with_pinched_patch(seed=5, shape=(6, 5, 7), layer=3):
    """Lognormal layers (k constant in each layer times a mild lateral variation), cell
    sizes varying, and layer ``layer`` pinched out (dz = 0) over the first half of the
    columns along x."""
    rng = np.random.default_rng(seed)
    layers = np.exp(rng.normal(3.0, 1.5, shape[2]))
    k = layers[None, None, :] * lognormal(shape, 0.3, seed)
    kz = 0.2 * k
    dx, dy = rng.uniform(5.0, 15.0, shape[0]), rng.uniform(5.0, 15.0, shape[1])
    dz = rng.uniform(0.5, 2.0, shape)
    dz[: shape[0] // 2, :, layer] = 0.0
    return (k, k.copy(), kz), (dx, dy, dz)


def test_a_layered_field_with_a_partly_pinched_layer_against_the_reference():
    # The fine whole-model flow along x, y and z against the reference that takes the
    # pinched cells out and joins the cells above and below them. The CG of the check is
    # not used (the model is small: a refined direct solve to a relative residual of 1e-10),
    # so 1e-8 on k. The reference without the joins gives a z value 30 % lower or more
    # (computed): the comparison tells the two apart.
    k, sizes = _layered_with_pinched_patch()
    cells = make_cells(*k, dx=sizes[0], dy=sizes[1], dz=sizes[2])
    for axis in range(3):
        expected = sealed_problem(k, *sizes, axis, pinch=True).value()
        assert fine_model_check(cells, axis)["k"] == pytest.approx(expected, rel=1e-8), axis
    joined, sealed = sealed_problem(k, *sizes, 2, pinch=True).value(), sealed_problem(k, *sizes, 2).value()
    assert sealed < 0.7 * joined


def _without_layer(ds, layer):
    """The same field with fine layer ``layer`` taken out."""
    return ds.isel(z=[i for i in range(ds.sizes["z"]) if i != layer])


CASES = [(dict(bc="sealed", multipliers=True), layer) for layer in (1, 2, 3)] + [
    (dict(bc="periodic"), layer) for layer in (1, 2, 3)] + [
    (dict(bc="sealed", border=1), 1), (dict(bc="linear", border=1), 1), (dict(bc="global"), 1)]


@pytest.mark.parametrize("options, layer", CASES, ids=lambda o: "-".join(f"{k}={v}" for k, v in o.items())
                         if isinstance(o, dict) else f"layer{o}")
def test_a_block_with_a_pinched_layer_equals_the_block_without_it(options, layer):
    # A heterogeneous field with one fine layer pinched out everywhere: every coarse value
    # (k of each condition, the Cardwell-Parsons bounds, face transmissibilities and
    # multipliers, volumes) equals that of the field without the layer, its blocks the
    # same. Layer 1 lies inside the first block, layer 2 at its bottom (the sealed block
    # is then not the leading part of its face problem), layer 3 at the top of the second
    # block. A border ring, and the nodes between which local-global interpolates its
    # boundary pressures, count fine cells (pinched ones too): with those the equality
    # holds for a layer inside the block and away from its border. Tolerance: refined
    # direct solves of blocks of up to 108 cells, 1e-10.
    rng = np.random.default_rng(8)
    shape = (4, 6, 6)
    k = lognormal(shape, 1.5, 8) * 50.0
    dz = rng.uniform(0.5, 2.0, shape)
    dz[:, :, layer] = 0.0
    ds = fine_dataset(k, 0.7 * k, 0.2 * k, rng.uniform(0.1, 0.3, shape), rng.uniform(5, 15, 4), rng.uniform(5, 15, 6),
                      dz, ntg=rng.uniform(0.5, 1.0, shape))
    edges = [0, 3, 6]
    coarse = coarsen(ds, ratio=(2, 3, 1), edges={"z": edges}, **options)
    stacked = coarsen(_without_layer(ds, layer), ratio=(2, 3, 1), edges={"z": [e - (e > layer) for e in edges]},
                      **options)
    assert float(coarse["solve_residual"].max()) < 1e-10   # round-off, of another size than the stacked one's
    tensor = max(float(np.abs(stacked[f"k{a}"]).max()) for a in "xyz")  # off-diagonal terms: round-off of it
    for name in coarse.data_vars:
        if name.endswith(("_start", "_stop")) or name == "solve_residual":
            continue
        scale = tensor if name in ("kxy", "kxz", "kyz") else float(np.abs(stacked[name].values).max())
        np.testing.assert_allclose(coarse[name].values, stacked[name].values, rtol=1e-10, atol=1e-10 * scale,
                                   err_msg=name)


@settings(max_examples=40, deadline=None)
@given(st.tuples(st.integers(1, 5), st.integers(1, 5), st.integers(2, 7), st.integers(0, 2 ** 31 - 1)))
def test_sealed_kz_with_pinch_outs_lies_within_the_cardwell_parsons_bounds(spec):
    # Cardwell & Parsons (1945): the sealed result lies between the bounds, for the
    # two-point network by Rayleigh monotonicity; with pinch-out connections the network
    # has links across the pinched cells, which the bounds take as cells without
    # resistance. Random fields with a third of the cells pinched and some zero kz.
    nx, ny, nz, seed = spec
    rng = np.random.default_rng(seed)
    k = lognormal((nx, ny, nz), 1.5, seed)
    kz = np.where(rng.random(k.shape) < 0.1, 0.0, k * rng.uniform(0.05, 1.0, k.shape))
    dz = rng.uniform(0.3, 2.0, k.shape) * (rng.random(k.shape) > 0.35)
    dz.flat[0] = 1.0
    cells = make_cells(k, kz=kz, dz=dz)
    part = make_partition(k.shape, ratio=tuple(int(rng.integers(1, n + 1)) for n in k.shape))
    value = flow_tensors(cells, part, "sealed").tensor[..., 2, 2]
    lower, upper = cardwell_parsons(cells.flow_permeability()[2], cells.dx, cells.dy, cells.dz, part, 2)
    assert np.all(value >= lower * (1 - 1e-9) - 1e-12)
    assert np.all(value <= upper * (1 + 1e-9) + 1e-12)


@pytest.mark.parametrize("options", [dict(), dict(multipliers=True), dict(bc="global")],
                         ids=["sealed", "multipliers", "local-global"])
def test_a_coarse_cell_pinched_out_entirely_passes_vertical_flow(options):
    # A column whose layers 2-3 and 6 pinch out, coarse layers [0, 2), [2, 4), [4, 6),
    # [6, 7): the second and the last coarse cells have dz = 0. For one column the coarse
    # model is exact, fine and coarse both give the series law (Bear 1972): each block's
    # kz is its own series, and the coarse faces, across the pinched coarse cell too, and
    # the held pressure at the bottom, through the pinched last cell, add the blocks'
    # resistances. Local-global keeps that: its face regions are the column's own blocks
    # (no sides inside the model), and their held pressures inside a pinched coarse cell
    # are the pressure on the face that cell stands for (not the chain node's own, which
    # gave +12 %). Without connections both seal. Tolerance: refined direct solves of a
    # few cells, 1e-9 (as above).
    k, dz = [20.0, 300.0, 0.0, 0.0, 5.0, 80.0, 0.0], [1.0, 2.0, 0.0, 0.0, 0.5, 1.5, 0.0]
    fine = _column(k, dz)
    coarse = coarsen(fine, ratio=(1, 1, 1), edges={"z": [0, 2, 4, 6, 7]}, **options)
    assert coarse["dz"].values[0, 0, 1] == 0.0 and coarse["dz"].values[0, 0, 3] == 0.0
    if options.get("multipliers"):
        assert np.all(coarse["tz_multiplier"].values[0, 0, :] == 1.0)  # beside pinched cells
    metrics = check(fine, coarse, checks="steady")["global"]["z"]
    assert metrics["fine_k"] == pytest.approx(_series(k, dz), rel=1e-9)
    assert metrics["coarse_k"] == pytest.approx(_series(k, dz), rel=1e-9)
    sealed = coarsen(fine, ratio=(1, 1, 1), edges={"z": [0, 2, 4, 6, 7]}, pinch_connections=False, **options)
    assert float(sealed["tz"].values[0, 0, 0]) == 0.0
    metrics = check(fine, sealed, checks="steady")["global"]["z"]
    assert metrics["fine_k"] == 0.0 and metrics["coarse_k"] == 0.0


def test_cells_thinner_than_the_pinch_thickness_count_as_pinched_out():
    # A threshold of 0.3 ft on a field in ft: the cells of 0.1 and 0.2 ft are treated as if
    # their dz were 0 (volume left out, no flow of their own, connections across), the
    # 0.3 ft ones are not; the coarse grid equals that of the field with those cells at
    # dz = 0, exactly (the same numbers go through the same code), and records the setting.
    rng = np.random.default_rng(3)
    shape = (4, 3, 6)
    k = lognormal(shape, 1.0, 3) * 100.0
    dz = rng.uniform(1.0, 3.0, shape)
    dz[:2, :, 2], dz[1:, :, 4], dz[0, 0, 1] = 0.1, 0.2, 0.3
    fine = fine_dataset(k, k, 0.1 * k, np.full(shape, 0.2), np.full(4, 30.0), np.full(3, 20.0), dz, length_units="ft")
    coarse = coarsen(fine, ratio=(2, 3, 3), multipliers=True, pinch_thickness=0.3)
    pinched = fine_dataset(k, k, 0.1 * k, np.full(shape, 0.2), np.full(4, 30.0), np.full(3, 20.0),
                           np.where(dz < 0.3, 0.0, dz), length_units="ft")
    expected = coarsen(pinched, ratio=(2, 3, 3), multipliers=True)
    for name in expected.data_vars:
        np.testing.assert_array_equal(coarse[name].values, expected[name].values, err_msg=name)
    assert (coarse.attrs["pinch_connections"], coarse.attrs["pinch_thickness"],
            coarse.attrs["pinch_thickness_units"]) == ("yes", 0.3, "ft")
    assert float(coarse["pore_volume"].sum()) < float(coarsen(fine, ratio=(2, 3, 3))["pore_volume"].sum())


def test_a_check_with_other_pinch_out_settings_than_the_coarse_grid_is_warned_about(caplog):
    fine = _column([20.0, 0.0, 300.0], [1.0, 0.0, 2.0])
    coarse = coarsen(fine, ratio=(1, 1, 3))
    with caplog.at_level("WARNING"):
        metrics = check(fine, coarse, checks="steady")
    assert "pinch-out" not in caplog.text                                   # as made: no warning
    assert metrics["pinch_outs"]["fine"] == metrics["pinch_outs"]["coarse"]
    with caplog.at_level("WARNING"):
        metrics = check(fine, coarse, checks="steady", pinch_connections=False)
    assert "checked with pinch-out connections off" in caplog.text          # the positive control
    assert metrics["global"]["z"]["fine_k"] == 0.0 and metrics["global"]["z"]["coarse_k"] > 0.0
