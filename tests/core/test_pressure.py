"""The whole-model solve (core/pressure.py) against outside values: SciPy's sparse direct
solve and its plain CG, the independent two-point assembly of tests/flow_reference.py,
closed forms, and the refusals and warnings the docstrings promise."""

import logging

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from flow_reference import half_transmissibilities, sealed_permeability

from upscale.core import pressure
from upscale.core.multigrid import MAX_COARSE
from upscale.core.pressure import (
    AT_LOW,
    ISOLATED,
    SOLVED,
    _relative_residual,
    assemble_pressure_system,
    cell_status,
    refined_direct,
    solve_pressure,
    symmetric_lu,
    unit_diagonal,
    whole_model_permeability,
)


def _laplacian(n: int) -> sp.csr_matrix:
    """The 7-point Laplacian of an n^3 grid plus 0.01 I: symmetric positive definite."""
    one = sp.diags([-np.ones(n - 1), 2 * np.ones(n), -np.ones(n - 1)], [-1, 0, 1])
    eye = sp.identity(n)
    return (sp.kron(sp.kron(one, eye), eye) + sp.kron(sp.kron(eye, one), eye) + sp.kron(sp.kron(eye, eye), one)
            + 0.01 * sp.identity(n ** 3)).tocsr()


def _relative(A, b, p):
    return np.linalg.norm(b - A @ p) / np.linalg.norm(b)


def _counting_cg(monkeypatch):
    """Wrap the solver's CG as it calls it: every call (its rtol) and the iterations counted."""
    calls, iterations = [], [0]
    original = pressure.conjugate_gradients

    def cg(A, b, x0, preconditioner, rtol, maxiter):
        calls.append(rtol)
        x, steps = original(A, b, x0, preconditioner, rtol, maxiter)
        iterations[0] += steps
        return x, steps

    monkeypatch.setattr(pressure, "conjugate_gradients", cg)
    return calls, iterations


def test_amg_cg_restarts_until_the_unscaled_residual_meets_the_tolerance(monkeypatch):
    # A = D^1/2 L D^1/2 with half the rows 1e4 times stiffer and b only on the soft rows:
    # the unit-diagonal system CG sees reaches rtol while the unscaled residual is still
    # above it, so the solve must restart (positive control: more than one CG call) and
    # end with ||b - A p|| / ||b|| <= 1e-10, computed here. The answer against SciPy's
    # SuperLU: the condition number of A is about 1e4 * 1e3 (Laplacian of 12^3 cells), so
    # a residual of 1e-10 allows a relative error of 1e-3 at worst; we ask 1e-6, since the
    # error of CG on this well-scaled problem stays near the residual (measured 2e-14).
    n = 12
    d = np.ones(n ** 3)
    d[n ** 3 // 2:] = 1e4
    root = sp.diags(np.sqrt(d))
    A = (root @ _laplacian(n) @ root).tocsr()
    b = np.zeros(n ** 3)
    b[: n ** 3 // 2] = np.random.default_rng(0).uniform(0, 1, n ** 3 // 2)
    original_cg = spla.cg
    calls, iterations = _counting_cg(monkeypatch)
    p, info = solve_pressure(A, b, tolerance=1e-10, direct_limit=0)
    assert len(calls) >= 2
    assert info["method"] == "amg-cg" and info["converged"]
    assert _relative(A, b, p) <= 1e-10
    assert info["relative_residual"] == pytest.approx(_relative(A, b, p), rel=1e-6)
    reference = spla.spsolve(A.tocsc(), b)
    np.testing.assert_allclose(p, reference, rtol=0, atol=1e-6 * np.abs(reference).max())
    # the reported iterations are the CG calls' own count, far fewer than CG on the same
    # unit-diagonal system without the multigrid cycle needs (its purpose: Saad 2003, Iterative
    # Methods for Sparse Linear Systems, ch. 13, from memory; measured 12 against 55)
    assert info["iterations"] == iterations[0]
    jacobi = sp.diags(1.0 / np.sqrt(A.diagonal()))
    plain = [0]
    original_cg(jacobi @ A @ jacobi, jacobi @ b, rtol=1e-10, atol=0.0, maxiter=5000,
                callback=lambda x: plain.__setitem__(0, plain[0] + 1))
    assert info["iterations"] < plain[0] / 2


def test_refined_direct_recovers_from_an_approximate_factorisation():
    # Iterative refinement (Wilkinson 1963; Moler 1967, from memory): with a factorisation
    # of M = A + E, each step multiplies the error by about ||M^-1 E||, here at most
    # 1e-6 * 6 / 0.01 = 6e-4 (E = 1e-6 diag A, diag A = 6.01, smallest eigenvalue of A above
    # 0.01), so a first residual of about 1e-6 is below 1e-10 within three steps; with the exact LU one
    # solve already meets 1e-10 and no step is taken; an unreachable tolerance takes
    # exactly the given number of steps (3 unless told).
    A = _laplacian(6)
    b = np.random.default_rng(1).uniform(0, 1, A.shape[0])
    scaled, scale = unit_diagonal(A)
    perturbed, _ = unit_diagonal(A + 1e-6 * sp.diags(A.diagonal()))
    p, steps = refined_direct(A, symmetric_lu(perturbed), scale, b, 1e-10)
    assert 1 <= steps <= 3 and _relative(A, b, p) <= 1e-10
    p, steps = refined_direct(A, symmetric_lu(scaled), scale, b, 1e-10)
    assert steps == 0 and _relative(A, b, p) <= 1e-12
    assert refined_direct(A, symmetric_lu(perturbed), scale, b, 1e-300)[1] == 3
    assert refined_direct(A, symmetric_lu(perturbed), scale, b, 1e-300, refinements=1)[1] == 1
    # the scaling itself: D^-1/2 A D^-1/2 has a unit diagonal
    np.testing.assert_allclose(scaled.diagonal(), 1.0, rtol=1e-15)
    np.testing.assert_allclose(scale, 1.0 / np.sqrt(A.diagonal()), rtol=1e-15)


def test_trivial_rows_methods_and_what_the_solve_reports():
    # Rows with only a diagonal are solved as b / d; the rest by the method the size calls
    # for (direct up to direct_limit unknowns, inclusive). Checked against SciPy.
    A = sp.lil_matrix((5, 5))
    A[0, 0], A[1, 1], A[2, 2] = 4.0, 2.0, 3.0
    A[1, 2] = A[2, 1] = -1.0
    A[3, 3], A[4, 4] = 8.0, 0.5
    A = A.tocsr()
    b = np.array([2.0, 1.0, 2.0, 4.0, 3.0])
    reference = spla.spsolve(A.tocsc(), b)
    for limit, method in ((3, "direct"), (2, "direct"), (1, "amg-cg")):
        p, info = solve_pressure(A, b, direct_limit=limit)
        np.testing.assert_allclose(p, reference, rtol=1e-10)
        assert info["method"] == method and info["unknowns"] == 2 and info["converged"]
    diagonal = sp.diags([4.0, 2.0, 0.5]).tocsr()
    p, info = solve_pressure(diagonal, [2.0, 1.0, 3.0])
    np.testing.assert_array_equal(p, [0.5, 0.5, 6.0])
    assert info == {"method": "trivial", "iterations": 0, "unknowns": 0, "relative_residual": 0.0,
                    "converged": True}
    p, info = solve_pressure(A, np.zeros(5))   # no drive: p = 0 exactly, residual 0 (not 0/0)
    assert np.all(p == 0) and info["relative_residual"] == 0.0 and info["converged"]
    assert _relative_residual(A, np.zeros(5), np.ones(5)) == np.inf


def test_the_solve_warns_exactly_when_it_misses_the_tolerance(caplog):
    A = _laplacian(4)
    b = np.ones(A.shape[0])
    with caplog.at_level(logging.WARNING, logger="upscale.core.pressure"):
        _, info = solve_pressure(A, b, tolerance=1e-10)
        assert info["converged"] and not caplog.records
        _, info = solve_pressure(A, b, tolerance=1e-300)   # below round-off: cannot be met
    assert not info["converged"] and info["relative_residual"] > 1e-300
    assert [r.getMessage() for r in caplog.records] == [
        f"pressure solve (direct) reached a relative residual of {info['relative_residual']:.2e}, above 1e-300"]


def test_solve_refusals_and_the_callers_matrix_left_alone():
    A = sp.csr_matrix((np.array([2.0, 0.0, -1.0, -1.0, 2.0, 1.0]), np.array([0, 1, 1, 0, 1, 1]),
                       np.array([0, 3, 6])), shape=(2, 2))     # an explicit zero and duplicates
    before = (A.data.copy(), A.indices.copy(), A.indptr.copy())
    p, _ = solve_pressure(A, [1, 0])
    np.testing.assert_allclose(p, np.linalg.solve([[2.0, -1.0], [-1.0, 3.0]], [1.0, 0.0]), rtol=1e-14)
    for got, kept in zip((A.data, A.indices, A.indptr), before):
        np.testing.assert_array_equal(got, kept)
    with pytest.raises(ValueError, match=r"^matrix shape \(2, 2\) does not match right-hand side length 3$"):
        solve_pressure(A, np.ones(3))
    for entry in (0.0, -1.0):
        with pytest.raises(ValueError, match="^matrix has a zero or negative diagonal entry: not positive definite$"):
            solve_pressure(sp.diags([1.0, entry]).tocsr(), np.ones(2))


def _bar(shape=(3, 4, 2), seed=6):
    rng = np.random.default_rng(seed)
    k = [np.exp(rng.normal(2.0, 1.0, shape)) for _ in range(3)]
    dx, dy, dz = rng.uniform(0.2, 0.5, shape[0]), rng.uniform(0.2, 0.5, shape[1]), rng.uniform(0.1, 0.4, shape)
    half = half_transmissibilities(k, dx, dy, dz)
    faces = []
    for a in range(3):
        first = np.take(half[a], np.arange(shape[a] - 1), axis=a)
        second = np.take(half[a], np.arange(1, shape[a]), axis=a)
        faces.append(first * second / (first + second))
    return k, dx, dy, dz, half, faces


def test_whole_model_against_the_reference_whatever_the_solver_and_boundary_shape():
    # A model of 0.04 m3 (below 1 m3) along y: k = Q L^2 / V against the independent
    # assembly of tests/flow_reference.py (both good to about 1e-13 here, a few hundred
    # cells of contrast e^4); the boundary values given without their length-1 axis.
    k, dx, dy, dz, half, faces = _bar()
    expected = sealed_permeability(k, dx, dy, dz, 1)
    low, high = half[1][:, 0, :], half[1][:, -1, :]
    for direct_limit in (0, 10 ** 6):   # AMG-CG with the default tolerance, and the direct solve
        result = whole_model_permeability(faces, (low, high), dx, dy, dz, "y", direct_limit=direct_limit)
        assert result["k"] == pytest.approx(expected, rel=1e-8)    # CG's residual 1e-10 times a small condition
        assert result["bulk_volume"] == pytest.approx(float(np.sum(dx[:, None, None] * dy[None, :, None] * dz)))
        assert result["length"] == pytest.approx(dy.sum()) and result["solver"]["converged"]
    # a tolerance passed on reaches the solve (1e-300 cannot be met)
    result = whole_model_permeability(faces, (low, high), dx, dy, dz, "y", tolerance=1e-300)
    assert not result["solver"]["converged"]
    from helpers import make_cells

    cells = make_cells(k[0], k[1], k[2], dx=dx, dy=dy, dz=dz)
    assert not pressure.fine_model_check(cells, "y", tolerance=1e-300)["solver"]["converged"]
    assert pressure.fine_model_check(cells, "y")["k"] == pytest.approx(expected, rel=1e-12)
    # the transmissibility constant divides k out; an integer grid gives the same numbers
    scaled = whole_model_permeability([2.5 * f for f in faces], (2.5 * low, 2.5 * high), dx, dy, dz, 1, constant=2.5)
    assert scaled["k"] == pytest.approx(expected, rel=1e-10)


def test_whole_model_refusals():
    _, dx, dy, dz, half, faces = _bar()
    boundary = (half[0][:1], half[0][-1:])
    cases = [
        ((faces[:2], boundary, {}), r"^face_t needs three arrays \(x, y, z faces\), got 2$"),
        (([f[..., 0] for f in faces], boundary, {}), r"^face transmissibilities must be three-dimensional, got shape "
                                                     r"\(2, 4\)$"),
        ((faces, (half[0][:1, :3], half[0][-1:]), {}), r"^low boundary transmissibilities have 6 values, expected 8 "
                                                       r"\(one per cell of the face normal to x\)$"),
        ((faces, (half[0][:1], -half[0][-1:]), {}), "^high boundary transmissibilities must be finite and >= 0$"),
        ((faces, (np.full((1, 4, 2), np.nan), half[0][-1:]), {}),
         "^low boundary transmissibilities must be finite and >= 0$"),
        ((faces, boundary, {"constant": 0.0}), r"^transmissibility constant must be > 0, got 0.0$"),
    ]
    for (face_t, boundary_t, extra), message in cases:
        with pytest.raises(ValueError, match=message):
            whole_model_permeability(face_t, boundary_t, dx, dy, dz, 0, **extra)
    flat = np.zeros(dz.shape)
    with pytest.raises(ValueError, match="^model bulk volume is zero$"):
        whole_model_permeability([0 * f for f in faces], (0 * boundary[0], 0 * boundary[1]), dx, dy, flat, 0)


def test_rates_balance_and_a_loose_solve_is_reported(caplog):
    # Steady flow conserves mass: the outflow equals the inflow to the solve's accuracy.
    # A solve stopped at a residual of 1e-3 leaves an imbalance above 1e-6, which is
    # reported with the rates; at 1e-10 it is not. The model is larger than the multigrid's
    # coarsest level (MAX_COARSE), so the cycle is not an exact inverse.
    k, dx, dy, dz, half, faces = _bar((12, 10, 8), seed=2)
    assert k[0].size > MAX_COARSE
    boundary = (half[2][:, :, :1], half[2][:, :, -1:])
    with caplog.at_level(logging.WARNING, logger="upscale.core.pressure"):
        tight = whole_model_permeability(faces, boundary, dx, dy, dz, "z", direct_limit=0)
        assert not caplog.records
        loose = whole_model_permeability(faces, boundary, dx, dy, dz, "z", tolerance=1e-3, direct_limit=0)
    for result in (tight, loose):
        q_in, q_out = result["rate"], result["rate_out"]
        assert result["imbalance"] == pytest.approx(abs(q_in - q_out) / max(q_in, q_out), rel=1e-12)
        inflow, outflow = result["face_flux"]
        assert q_in == pytest.approx(inflow.sum()) and q_out == pytest.approx(outflow.sum())
    assert tight["imbalance"] < 1e-6 < loose["imbalance"]
    # the same model a million times less conductive (rates below 1): the same imbalance
    # rule; a closed model has no flow and no imbalance
    small = whole_model_permeability([1e-6 * f for f in faces], tuple(1e-6 * t for t in boundary), dx, dy, dz, "z",
                                     tolerance=1e-3, direct_limit=0)
    assert small["rate"] < 1e-3
    largest = max(small["rate"], small["rate_out"])
    assert small["imbalance"] == pytest.approx(abs(small["rate"] - small["rate_out"]) / largest, rel=1e-12)
    closed = whole_model_permeability([0 * f for f in faces], boundary, dx, dy, dz, "z")
    assert closed["rate"] == closed["rate_out"] == closed["imbalance"] == closed["k"] == 0.0
    records = [r for r in caplog.records if r.getMessage().startswith("flow along")]
    assert [r.getMessage() for r in records][:1] == [
        f"flow along z: inflow {loose['rate']:.6g} and outflow {loose['rate_out']:.6g} differ by "
        f"{loose['imbalance']:.2e} (relative)"]


def test_status_of_cells_joined_to_one_face_only_and_of_isolated_ones():
    # Three cells along x, one row: 0 - 1 joined, 1 - 2 closed; only the low face held.
    # Cells 0 and 1 reach only the low face: their exact steady pressure is p_low (AT_LOW);
    # with both faces held, cell 2 reaches only the high one. An unconnected cell between
    # closed faces is ISOLATED and pinned to 0.
    faces = [np.array([2.0, 0.0]).reshape(2, 1, 1), np.zeros((3, 0, 1)), np.zeros((3, 1, 0))]
    status = cell_status(faces, (np.ones(1), np.zeros(1)), 0)
    assert status.dtype == np.int8
    assert status.ravel().tolist() == [AT_LOW, AT_LOW, ISOLATED]
    A, b, status = assemble_pressure_system(faces, (np.ones(1), np.ones(1)), 0, p_low=1.0, p_high=0.5,
                                            return_status=True)
    assert status.ravel().tolist() == [AT_LOW, AT_LOW, pressure.AT_HIGH]
    np.testing.assert_array_equal(spla.spsolve(A.tocsc(), b), [1.0, 1.0, 0.5])
    faces = [np.array([1.0, 0.0, 0.0, 3.0]).reshape(4, 1, 1), np.zeros((5, 0, 1)), np.zeros((5, 1, 0))]
    A, b, status = assemble_pressure_system(faces, (np.ones(1), np.ones(1)), 0, return_status=True)
    assert status.ravel().tolist() == [AT_LOW, AT_LOW, ISOLATED, pressure.AT_HIGH, pressure.AT_HIGH]
    assert b[2] == 0.0 and A[2, 2] == 1.0
    assert SOLVED not in status
