"""Tests of upscale.globalflow: whole-model steady flow checks on small hand-built fields."""

import json
import math

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from flow_reference import sealed_problem

from upscale.checks.steady import coarse_model_check, fine_model_checks, steady_check
from upscale.core.pressure import (
    AT_HIGH,
    AT_LOW,
    ISOLATED,
    SOLVED,
    assemble_pressure_system,
    cell_status,
    fine_model_check,
    solve_pressure,
    whole_model_permeability,
)
from upscale.core.two_point import transmissibilities
from upscale.io.schema import arrays, fine_dataset
from upscale.io.validation import validate
from upscale.scale.coarsen import coarsen

AXES = ("x", "y", "z")


def make_field(kx, ky=None, kz=None, dx=None, dy=None, dz=None, ntg=None, porosity=0.2):
    kx = np.asarray(kx, dtype=float)
    shape = kx.shape
    ky = kx.copy() if ky is None else ky
    kz = kx.copy() if kz is None else kz
    dx = np.ones(shape[0]) if dx is None else dx
    dy = np.ones(shape[1]) if dy is None else dy
    dz = np.ones(shape[2]) if dz is None else dz
    return validate(fine_dataset(kx, ky, kz, np.full(shape, porosity), dx, dy, dz, ntg=ntg))


# Layered medium: thickness h_i and permeability k_i per layer, varying cell sizes.
NX, NY = 5, 4
DX = np.array([3.0, 7.0, 1.5, 4.0, 2.5])
DY = np.array([2.0, 5.0, 1.0, 3.5])
H = np.array([0.5, 2.0, 1.2, 3.0, 0.8])
K = np.array([10.0, 500.0, 0.3, 80.0, 2000.0])
NTG = np.array([1.0, 0.6, 0.9, 0.75, 0.5])


def layered(k=K, ntg=None, kz=None):
    shape = (NX, NY, H.size)
    k3 = np.broadcast_to(np.asarray(k, dtype=float), shape).copy()
    kz3 = k3.copy() if kz is None else np.broadcast_to(np.asarray(kz, dtype=float), shape).copy()
    ntg3 = None if ntg is None else np.broadcast_to(ntg, shape).copy()
    return make_field(k3, k3.copy(), kz3, DX, DY, H, ntg=ntg3)


def arithmetic(k, h):
    return float(np.sum(k * h) / np.sum(h))


def harmonic(k, h):
    return float(np.sum(h) / np.sum(h / k))


def test_layered_medium_along_and_across_layers():
    cells = arrays(layered(ntg=NTG))
    # Bear (1972), Dynamics of Fluids in Porous Media, ch. 5: flow parallel to the layers,
    # k = thickness-weighted arithmetic mean (of the net, flowing, permeability k * ntg).
    along = arithmetic(K * NTG, H)
    for axis in ("x", "y"):
        result = fine_model_check(cells, axis)
        assert result["k"] == pytest.approx(along, rel=1e-10)
        assert result["solver"]["relative_residual"] <= 1e-10
        assert result["rate_out"] == pytest.approx(result["rate"], rel=1e-10)
    # Bear (1972), Dynamics of Fluids in Porous Media, ch. 5: flow normal to the layers,
    # k = thickness-weighted harmonic mean (kz is not multiplied by ntg).
    result = fine_model_check(cells, "z")
    assert result["k"] == pytest.approx(harmonic(K, H), rel=1e-10)
    # Across layers the pressure is uniform in each layer and drops in proportion to h / k.
    drop = (H / K) / np.sum(H / K)
    top = 1.0 - np.cumsum(np.concatenate([[0.0], drop[:-1]]))
    expected = top - drop / 2.0
    assert np.allclose(result["pressure"], expected[None, None, :], rtol=0, atol=1e-12)


def test_assembled_matrix_is_symmetric_with_boundary_terms():
    cells = arrays(layered())
    half, faces = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz)
    low, high = half[0][:1], half[0][-1:]
    A, b = assemble_pressure_system(faces, (low, high), "x", p_low=2.0, p_high=0.5)
    assert abs(A - A.T).max() == 0.0
    # Row sums: interior couplings cancel, leaving the boundary half transmissibilities.
    row_sum = np.asarray(A.sum(axis=1)).ravel().reshape(cells.shape)
    expected = np.zeros(cells.shape)
    expected[0] += low[0]
    expected[-1] += high[0]
    assert np.allclose(row_sum, expected, rtol=1e-12, atol=1e-9)
    rhs = np.zeros(cells.shape)
    rhs[0] += 2.0 * low[0]
    rhs[-1] += 0.5 * high[0]
    assert np.allclose(b.reshape(cells.shape), rhs, rtol=1e-14)


def lognormal(seed=11, shape=(12, 10, 8), sigma=2.5):
    rng = np.random.default_rng(seed)
    kx = np.exp(rng.normal(3.0, sigma, shape))
    ky = kx * np.exp(rng.normal(0.0, 0.3, shape))
    kz = 0.1 * kx * np.exp(rng.normal(0.0, 1.0, shape))
    dx = rng.uniform(5.0, 20.0, shape[0])
    dy = rng.uniform(5.0, 20.0, shape[1])
    dz = rng.uniform(0.5, 3.0, shape[2])
    return make_field(kx, ky, kz, dx, dy, dz)


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_amg_cg_agrees_with_sparse_direct_on_lognormal_field(axis):
    # 4480 cells: a hierarchy of three levels (the multigrid coarsens down to MAX_COARSE),
    # so the W-cycle of the middle level is in the solve
    cells = arrays(lognormal(shape=(20, 16, 14)))
    k = cells.flow_permeability()
    contrast = max(kk.max() / kk.min() for kk in k)
    assert contrast > 1e6  # the scaling has to cope with this
    half, faces = transmissibilities(k, cells.dx, cells.dy, cells.dz)
    n = cells.shape[axis]
    low = np.take(half[axis], [0], axis=axis)
    high = np.take(half[axis], [n - 1], axis=axis)
    A, b = assemble_pressure_system(faces, (low, high), axis)
    p_amg, info = solve_pressure(A, b, direct_limit=0)
    assert info["method"] == "amg-cg"
    assert info["iterations"] > 0
    assert info["relative_residual"] <= 1e-10
    assert np.linalg.norm(b - A @ p_amg) / np.linalg.norm(b) == pytest.approx(info["relative_residual"], rel=1e-6)
    p_ref = spla.spsolve(A.tocsc(), b)

    def rate(p):
        return float(np.sum(low * (1.0 - np.take(p.reshape(cells.shape), [0], axis=axis))))

    assert rate(p_amg) == pytest.approx(rate(p_ref), rel=1e-8)
    forced = fine_model_check(cells, axis, direct_limit=0)
    direct = fine_model_check(cells, axis)
    assert forced["solver"]["method"] == "amg-cg" and direct["solver"]["method"] == "direct"
    assert forced["solver"]["relative_residual"] <= 1e-10
    assert direct["solver"]["relative_residual"] <= 1e-10
    assert forced["rate"] == pytest.approx(rate(p_ref), rel=1e-8)
    assert direct["rate"] == pytest.approx(rate(p_ref), rel=1e-8)
    assert direct["rate_out"] == pytest.approx(direct["rate"], rel=1e-9)


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_whole_model_check_against_an_independent_assembly(axis):
    # The whole model of a heterogeneous field (lognormal, contrast above 1e6, varying
    # cell sizes, net-to-gross, a few inactive cells) against the independent two-point
    # assembly of tests/flow_reference.py (its own half transmissibilities and series
    # pairs, SciPy's SuperLU): rate, k = Q L^2 / V and the pressure of every solved cell.
    # Both solves are good to about the condition number of the rate as a functional of
    # the pressure (Skeel 1979, computed: below 1e5 here) times the unit round-off; the
    # check's CG stops at a relative residual of 1e-10, so we allow 1e-8 on the rate and
    # 1e-8 of the unit drop on the pressures.
    rng = np.random.default_rng(21)
    shape = (12, 10, 8)
    kx = np.exp(rng.normal(3.0, 2.5, shape))
    ky = kx * np.exp(rng.normal(0.0, 0.3, shape))
    kz = 0.1 * kx * np.exp(rng.normal(0.0, 1.0, shape))
    ntg = rng.uniform(0.3, 1.0, shape)
    active = (rng.random(shape) > 0.05).astype(np.int8)
    dx, dy, dz = rng.uniform(5.0, 20.0, shape[0]), rng.uniform(5.0, 20.0, shape[1]), rng.uniform(0.5, 3.0, shape)
    fine = validate(fine_dataset(kx, ky, kz, np.full(shape, 0.2), dx, dy, dz, ntg=ntg, active=active))
    cells = arrays(fine)
    on = active.astype(bool)
    flowing = (kx * ntg * on, ky * ntg * on, kz * on)   # net horizontal k; inactive cells carry none
    problem = sealed_problem(flowing, dx, dy, dz, axis)
    expected_pressure = problem.pressure()
    expected_k = problem.value()
    assert problem.condition() < 1e5
    for direct_limit in (0, 200_000):   # AMG-CG and the direct solve of the check
        result = fine_model_check(cells, axis, direct_limit=direct_limit)
        assert result["k"] == pytest.approx(expected_k, rel=1e-8)
        assert result["rate"] == pytest.approx(expected_k / problem.scale, rel=1e-8)
        solved = ~np.isnan(expected_pressure)
        np.testing.assert_allclose(result["pressure"][solved], expected_pressure[solved], rtol=0, atol=1e-8)
        assert np.all(np.isnan(result["pressure"][~solved]))


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_lognormal_field_lies_within_wiener_bounds(axis):
    cells = arrays(lognormal(seed=5))
    k = cells.flow_permeability()[axis]
    v = cells.bulk_volume
    # Wiener (1912): the effective permeability lies between the volume-weighted harmonic
    # and arithmetic means (series and parallel arrangements of the same cells).
    lower = v.sum() / np.sum(v / k)
    upper = np.sum(v * k) / v.sum()
    result = fine_model_check(cells, axis)
    assert lower < result["k"] < upper
    # and, being a strongly heterogeneous field, strictly inside both
    assert result["k"] > 1.01 * lower and result["k"] < 0.99 * upper


def test_zero_permeability_layer_across_flow_gives_zero():
    kz = K.copy()
    kz[2] = 0.0  # a vertical seal; horizontal flow in that layer is still possible
    cells = arrays(layered(kz=kz))
    result = fine_model_check(cells, "z")
    assert result["k"] == 0.0 and result["rate"] == 0.0 and result["rate_out"] == 0.0
    # Above the seal the whole column sits at the inflow pressure, below at the outflow one.
    assert np.all(result["pressure"][:, :, :2] == 1.0)
    assert np.all(result["pressure"][:, :, 3:] == 0.0)
    assert np.all(result["status"][:, :, :2] == AT_LOW)
    assert np.all(result["status"][:, :, 3:] == AT_HIGH)
    # The seal layer itself is connected only sideways, to sealed sides: its pressure is
    # undefined (NaN), it is not part of the solve.
    assert np.all(result["status"][:, :, 2] == ISOLATED)
    assert np.all(np.isnan(result["pressure"][:, :, 2]))
    # Along the layers nothing changes: Bear (1972) ch. 5, arithmetic mean.
    along = fine_model_check(cells, "x")
    assert along["k"] == pytest.approx(arithmetic(K, H), rel=1e-10)
    assert np.all(np.isfinite(along["pressure"]))


def test_steady_check_of_sealed_model_is_json_without_nan():
    kz = K.copy()
    kz[2] = 0.0
    fine = layered(kz=kz)
    coarse = coarsen(fine, ratio=(5, 2, 1), method="arithmetic")
    result = steady_check(fine, coarse)
    json.dumps(result, allow_nan=False)  # JSON-ready: a NaN anywhere would raise
    z = result["global"]["z"]
    assert z["fine_k"] == 0.0 and z["coarse_k"] == 0.0 and z["relative_error"] is None
    assert result["pressure_rms"]["z"] == pytest.approx(0.0, abs=1e-12)
    # Bear (1972) ch. 5: along the layers the coarse grid (one cell per layer in z) is exact,
    # and each layer carries its share k_i h_i / sum(k h) of the flow (parallel layers).
    for axis in ("x", "y"):
        assert result["global"][axis]["fine_k"] == pytest.approx(arithmetic(K, H), rel=1e-10)
        assert abs(result["global"][axis]["relative_error"]) < 1e-10
        for model in ("fine", "coarse"):
            assert result["layer_flow_share"][axis][model] == pytest.approx(list(K * H / np.sum(K * H)), rel=1e-10)


def test_fully_sealed_layer_is_isolated_not_nan_in_k():
    k = K.copy()
    k[1] = 0.0  # no flow in any direction: the layer's cells have no connection at all
    cells = arrays(layered(k=k))
    across = fine_model_check(cells, "z")
    assert across["k"] == 0.0
    along = fine_model_check(cells, "x")
    # Bear (1972) ch. 5: arithmetic mean, the sealed layer contributing nothing.
    assert along["k"] == pytest.approx(arithmetic(k, H), rel=1e-10)
    assert np.all(np.isnan(along["pressure"][:, :, 1]))
    assert np.all(along["status"][:, :, 1] == ISOLATED)
    assert np.all(np.isfinite(np.delete(along["pressure"], 1, axis=2)))


def pocket_field(pocket_k):
    rng = np.random.default_rng(2)
    shape = (9, 8, 7)
    k = np.exp(rng.normal(2.0, 1.0, shape))
    k[2:7, 2:7, 1:6] = 0.0                      # sealing shell ...
    k[3:6, 3:6, 2:5] = pocket_k                 # ... around a permeable pocket
    return make_field(k, dx=rng.uniform(1, 3, shape[0]), dy=rng.uniform(1, 3, shape[1]),
                      dz=rng.uniform(0.2, 1.0, shape[2]))


@pytest.mark.parametrize("direct_limit", [0, 200_000])
@pytest.mark.parametrize("axis", ["x", "z"])
def test_isolated_pocket_does_not_break_the_solve(axis, direct_limit):
    with_pocket = fine_model_check(arrays(pocket_field(50.0)), axis, direct_limit=direct_limit)
    sealed = fine_model_check(arrays(pocket_field(0.0)), axis)
    assert with_pocket["solver"]["relative_residual"] <= 1e-10
    assert with_pocket["k"] > 0 and math.isfinite(with_pocket["k"])
    # The pocket carries no flow: same result as with the pocket filled with seal.
    assert with_pocket["k"] == pytest.approx(sealed["k"], rel=1e-9)
    assert np.all(with_pocket["status"][3:6, 3:6, 2:5] == ISOLATED)
    assert np.all(np.isnan(with_pocket["pressure"][3:6, 3:6, 2:5]))
    assert np.all(with_pocket["status"][0] == SOLVED)


def test_cell_status_of_pocket():
    cells = arrays(pocket_field(50.0))
    half, faces = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz)
    status = cell_status(faces, (half[0][:1], half[0][-1:]), "x")
    shell = np.zeros(cells.shape, dtype=bool)
    shell[2:7, 2:7, 1:6] = True
    shell[3:6, 3:6, 2:5] = False
    assert np.all(status[shell] == ISOLATED)
    assert np.all(status[3:6, 3:6, 2:5] == ISOLATED)
    assert np.all(status[~shell & (status != ISOLATED)] == SOLVED)
    assert np.count_nonzero(status == SOLVED) == cells.kx.size - 5 * 5 * 5


def homogeneous(shape=(6, 4, 7)):
    rng = np.random.default_rng(4)
    full = np.ones(shape)
    return make_field(50.0 * full, 30.0 * full, 5.0 * full, dx=rng.uniform(2, 10, shape[0]),
                      dy=rng.uniform(2, 10, shape[1]), dz=rng.uniform(0.5, 2.0, shape[2]),
                      ntg=0.7 * full)


@pytest.mark.parametrize("units", ["metric", "field"])
def test_homogeneous_field_coarsened_arithmetic_is_exact(units):
    fine = homogeneous()
    coarse = coarsen(fine, ratio=(2, 3, 3), method="arithmetic", units=units)  # remainders on y, z
    result = steady_check(fine, coarse)
    json.dumps(result, allow_nan=False)  # JSON-ready
    for axis, k in zip(AXES, (50.0 * 0.7, 30.0 * 0.7, 5.0)):
        entry = result["global"][axis]
        assert entry["fine_k"] == pytest.approx(k, rel=1e-10)
        assert entry["coarse_k"] == pytest.approx(k, rel=1e-10)
        assert abs(entry["relative_error"]) < 1e-10
        assert entry["fine_residual"] <= 1e-10 and entry["coarse_residual"] <= 1e-10
        assert result["pressure_rms"][axis] < 1e-10
    h = fine["dz"].values[0, 0]
    layers = np.add.reduceat(h, np.asarray(coarse["z_start"].values)) / h.sum()
    for axis in ("x", "y"):
        share = result["layer_flow_share"][axis]
        assert len(share["fine"]) == coarse.sizes["z"] == 3
        assert np.allclose(share["fine"], layers, rtol=1e-10)
        assert np.allclose(share["coarse"], layers, rtol=1e-10)


def test_arithmetic_coarsening_of_layers_overestimates_across_flow():
    fine = layered()
    coarse = coarsen(fine, ratio=(2, 2, H.size), method="arithmetic")
    result = steady_check(fine, coarse)
    # Bear (1972) ch. 5: the fine model gives the harmonic mean across the layers, the
    # single arithmetic-averaged coarse layer the arithmetic one.
    expected = arithmetic(K, H) / harmonic(K, H) - 1.0
    assert result["global"]["z"]["relative_error"] > 0
    assert result["global"]["z"]["relative_error"] == pytest.approx(expected, rel=1e-10)
    # Along the layers arithmetic averaging is right (Bear 1972 ch. 5).
    assert abs(result["global"]["x"]["relative_error"]) < 1e-10
    assert result["layer_flow_share"]["x"]["coarse"] == pytest.approx([1.0], rel=1e-12)
    assert result["pressure_rms"]["z"] > 0.01


def test_layer_shares_show_misplaced_flow_and_pressure_mismatch():
    """Two coarse layers of a layered field: flow per coarse layer as from Bear's parallel sum."""
    fine = layered()
    coarse = coarsen(fine, ratio=(5, 4, 3), method="arithmetic")  # z blocks: layers 0-2, 3-4
    result = steady_check(fine, coarse)
    flow = K * H
    expected = np.array([flow[:3].sum(), flow[3:].sum()]) / flow.sum()
    assert result["layer_flow_share"]["x"]["fine"] == pytest.approx(list(expected), rel=1e-10)
    assert result["layer_flow_share"]["y"]["coarse"] == pytest.approx(list(expected), rel=1e-10)


def test_multipliers_scale_the_coarse_model():
    fine = homogeneous()
    coarse = coarsen(fine, ratio=(2, 2, 7), method="arithmetic")
    base = coarse_model_check(coarse, "x")
    doubled = coarse.copy()
    doubled["tx_multiplier"] = coarse["tx_multiplier"] * 2.0
    changed = coarse_model_check(doubled, "x")
    # Three coarse cells in series along x: boundary halves R0/2 + R2/2 stay, the two
    # interior faces halve their resistance.
    dx = coarse["dx"].values
    resistance = dx / 35.0                           # per unit area
    faces = (resistance[:-1] + resistance[1:]) / 2.0
    ends = resistance[0] / 2.0 + resistance[-1] / 2.0
    ratio = (ends + faces.sum()) / (ends + faces.sum() / 2.0)
    assert changed["k"] / base["k"] == pytest.approx(ratio, rel=1e-10)


def test_whole_model_permeability_divides_out_a_constant():
    cells = arrays(layered())
    half, faces = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz)
    c = 0.0085
    scaled = whole_model_permeability([c * f for f in faces], (c * half[1][:, :1], c * half[1][:, -1:]),
                                      cells.dx, cells.dy, cells.dz, "y", constant=c)
    assert scaled["k"] == pytest.approx(arithmetic(K, H), rel=1e-10)  # Bear (1972) ch. 5


def test_axes_on_worker_processes_match_one_process():
    # The three axes are independent solves; forked workers must give the same answer as
    # one process, and repeated runs the same answer (the multigrid set-up is seeded).
    cells = arrays(lognormal(shape=(14, 12, 10)))
    here = fine_model_checks(cells, direct_limit=0, workers=1)
    again = fine_model_checks(cells, direct_limit=0, workers=1)
    forked = fine_model_checks(cells, direct_limit=0, workers=2)
    for a, b, c in zip(here, again, forked):
        assert a["solver"]["method"] == c["solver"]["method"] == "amg-cg"
        np.testing.assert_array_equal(a["pressure"], b["pressure"])
        assert a["k"] == pytest.approx(c["k"], rel=1e-12)
        np.testing.assert_allclose(a["pressure"], c["pressure"], rtol=0, atol=1e-12)


def test_worker_count_respects_cores_and_memory(monkeypatch):
    import upscale.checks.steady as globalflow

    monkeypatch.setattr(globalflow.os, "sched_getaffinity", lambda pid: {0, 1, 2, 3, 4, 5}, raising=False)
    monkeypatch.setattr(globalflow, "available_memory", lambda: 10 * 2 ** 30)
    assert globalflow.worker_count() == 3                   # three axes at most
    cells = 4 * 2 ** 30 // globalflow.BYTES_PER_CELL        # 4 GiB per axis: two fit in 10 GiB
    assert globalflow.worker_count(cells) == 2
    assert globalflow.worker_count(100 * cells) == 1        # never fewer than one
    monkeypatch.setattr(globalflow, "available_memory", lambda: None)
    assert globalflow.worker_count(100 * cells) == 3        # unknown memory: cores decide
    assert globalflow.axis_processes(cells) == 3
    assert globalflow.axis_processes(cells, workers=2) == 2
    assert globalflow.axis_processes(globalflow.DIRECT_LIMIT) == 1  # the direct solver: in process
