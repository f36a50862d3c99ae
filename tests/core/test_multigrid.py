"""Tests of upscale.multigrid: the multigrid cycle must be a symmetric positive definite operator
(conjugate gradients needs both; Saad 2003, Iterative Methods for Sparse Linear Systems,
section 9.2, from memory) and a useful approximate inverse."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from upscale.core.multigrid import (MAX_COARSE, LineSmoother, MultigridCycle, ShiftedCycles, _common_pattern,
                                    _gauss_seidel,
                                    aggregation_hierarchy, largest_eigenvalue, scaled_near_null, tentative_prolongator)


def heterogeneous_laplacian(shape=(14, 12, 9), seed=3, with_scale=False):
    """Two-point flux matrix of a 3D grid with lognormal face transmissibilities, one
    constant-pressure face (so it is non-singular), scaled to unit diagonal (and, with
    ``with_scale``, the factors D^-1/2)."""
    rng = np.random.default_rng(seed)
    n = int(np.prod(shape))
    index = np.arange(n).reshape(shape)
    rows, cols, vals = [], [], []
    for axis in range(3):
        lo = np.take(index, np.arange(shape[axis] - 1), axis=axis).ravel()
        hi = np.take(index, np.arange(1, shape[axis]), axis=axis).ravel()
        t = np.exp(rng.normal(0.0, 2.0, lo.size))
        rows += [lo, hi, lo, hi]
        cols += [lo, hi, hi, lo]
        vals += [t, t, -t, -t]
    A = sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n, n))
    A = A + sp.diags(np.isin(np.arange(n), index[0].ravel()).astype(float))
    s = 1.0 / np.sqrt(A.diagonal())
    scaled = (sp.diags(s) @ A @ sp.diags(s)).tocsr()
    return (scaled, s) if with_scale else scaled


def test_cycle_is_symmetric_and_positive_definite():
    # In double precision symmetric to round-off; in single precision (the default) to a few
    # units of float32's epsilon (1.2e-7) relative, which the double-precision CG around it
    # tolerates (the CG tests below reach 1e-10 with it). With a small coarsest level the
    # hierarchy has intermediate levels, where the cycle is a W-cycle.
    A = heterogeneous_laplacian(shape=(10, 9, 7))
    for precision, tolerance in ((np.float64, 1e-12), (np.float32, 1e-6)):
        for max_coarse, levels, visits in ((MAX_COARSE, 2, 2), (8, 3, 2), (8, 3, 1)):
            M = MultigridCycle.from_levels(*aggregation_hierarchy(A, max_coarse=max_coarse), precision=precision,
                                           visits=visits)
            assert len(M.operators) >= levels  # a real hierarchy, not just the coarsest solve
            dense = np.column_stack([M @ e for e in np.eye(A.shape[0])])
            assert np.abs(dense - dense.T).max() <= tolerance * np.abs(dense).max(), (precision, max_coarse, visits)
            assert np.linalg.eigvalsh((dense + dense.T) / 2).min() > 0


def test_the_cycle_runs_in_single_precision_unless_told_and_is_its_own_adjoint():
    # Single precision by default (half the bytes per sweep; module notes), double when
    # asked; as a SciPy LinearOperator its adjoint product is its product (symmetric).
    A = heterogeneous_laplacian(shape=(8, 7, 6))
    b = np.random.default_rng(9).normal(size=A.shape[0])
    levels = aggregation_hierarchy(A, max_coarse=8)
    assert len(levels[1]) >= 2  # the cycles made from these levels have transfers to check
    for M, precision in ((MultigridCycle(A), np.float32), (MultigridCycle(A, precision=np.float64), np.float64),
                         (MultigridCycle.from_levels(*levels), np.float32),
                         (MultigridCycle.from_levels(*levels, precision=np.float64), np.float64)):
        assert M.precision == precision
        assert all(level.dtype == precision for level in M.operators + M.prolongators + M.restrictors)
        np.testing.assert_array_equal(M.rmatvec(b), M.matvec(b))
        assert np.linalg.norm(M.matvec(b)) > 0


def test_cycle_preconditioned_cg_matches_a_direct_solve():
    A = heterogeneous_laplacian()
    b = np.random.default_rng(1).normal(size=A.shape[0])
    count = []
    x, info = spla.cg(A, b, rtol=1e-10, atol=0.0, M=MultigridCycle(A), maxiter=500, callback=count.append)
    plain = []
    spla.cg(A, b, rtol=1e-10, atol=0.0, maxiter=5000, callback=plain.append)
    assert info == 0
    np.testing.assert_allclose(x, spla.spsolve(A.tocsc(), b), rtol=1e-7, atol=1e-9 * np.abs(x).max())
    assert len(count) < len(plain) / 3  # the preconditioner earns its keep


def test_lines_hold_only_their_tridiagonal_couplings_after_rows_are_removed():
    # Removing rows (pinned or unsolved cells) makes grid neighbours consecutive rows that
    # are not vertical neighbours; every line must still be solvable as a tridiagonal system.
    A = heterogeneous_laplacian(shape=(6, 5, 4))
    kept = np.random.default_rng(0).random(A.shape[0]) > 0.3
    kept[-4:] = True  # the last column whole: a last line of 4 rows for the reverse sweep below
    keep = np.flatnonzero(kept)
    A = A[keep][:, keep].tocsr()
    smoother = LineSmoother(A)
    line = np.repeat(np.arange(smoother.starts.size - 1), np.diff(smoother.starts))
    C = A.tocoo()
    assert not np.any((line[C.row] == line[C.col]) & (np.abs(C.row - C.col) > 1))
    # One sweep from zero solves its first line exactly: the first line of the forward sweep
    # (eliminated top-down), the last line of the reverse one (eliminated bottom-up).
    b = np.random.default_rng(1).normal(size=A.shape[0])
    for forward, (s, e) in ((True, smoother.starts[:2]), (False, smoother.starts[-2:])):
        assert e - s > 1
        x = np.zeros(A.shape[0])
        smoother.sweep(x, b, forward=forward)
        np.testing.assert_allclose(A[s:e, s:e] @ x[s:e], b[s:e], rtol=1e-12)


def test_the_scaled_near_null_vector_is_what_the_scaled_matrix_nearly_annihilates():
    # Away from the constant-pressure face the rows of a two-point flux matrix sum to zero
    # (Aziz & Settari 1979, Petroleum Reservoir Simulation, ch. 5, from memory: the flux of a
    # uniform pressure vanishes), so A 1 = 0 there and the scaled matrix annihilates D^1/2 1,
    # not 1. Built on that vector, the smoothed aggregates (Vanek, Mandel & Brezina 1996,
    # Computing 56, 179-196, from memory: the tentative prolongator must reproduce the
    # near-null vector) carry the smooth error, and CG needs fewer iterations than with
    # ones: side by side on the same system, at least a third fewer.
    S, scale = heterogeneous_laplacian(shape=(24, 20, 10), with_scale=True)
    v = scaled_near_null(scale)
    interior = np.abs(S @ v) > 1e-9 * np.abs(v).max()
    assert interior.sum() <= 24 * 20 * 10 / 24 + 1  # only the face cells (one x-layer of 24) do not
    b = np.random.default_rng(2).normal(size=S.shape[0])
    counts = {}
    for name, near_null in (("ones", None), ("scaled", v)):
        steps = []
        x, info = spla.cg(S, b, rtol=1e-10, atol=0.0, maxiter=500, M=MultigridCycle(S, near_null), callback=steps.append)
        assert info == 0 and np.linalg.norm(b - S @ x) <= 1e-10 * np.linalg.norm(b)
        counts[name] = len(steps)
    assert counts["scaled"] <= 2 * counts["ones"] / 3, counts


def test_one_set_up_serves_every_step_of_a_storage_shifted_family():
    # K + diag(s) / dt for steps three decades apart: the shared aggregates' levels must be
    # the Galerkin operators R (K + S / dt) P of each member (Trottenberg, Oosterlee &
    # Schueller 2001, Multigrid, section A.2.3, from memory), and CG with the cycle must
    # reach the direct solution (SciPy SuperLU) for each step; round-off only, 1e-9.
    K = heterogeneous_laplacian(shape=(16, 12, 8))
    storage = np.random.default_rng(5).uniform(0.5, 2.0, K.shape[0])
    family = ShiftedCycles(K, storage, dt=0.1)
    b = np.random.default_rng(6).normal(size=K.shape[0])
    for dt in (1e-2, 1.0, 10.0):
        A = (K + sp.diags(storage / dt)).tocsr()
        cycle = family.cycle(dt)
        assert cycle.precision == np.float32  # the steps' cycles run in single precision
        galerkin = A
        # the family's transfers: those of the set-up of its first member (dt = 0.1)
        _, prolongators, restrictors = aggregation_hierarchy((K + sp.diags(storage / 0.1)).tocsr())
        members = family.levels(dt)
        singles = family.levels(dt, np.float32)
        assert all(level.dtype == np.float32 for level in singles)
        for level, (P, R) in enumerate(zip(prolongators, restrictors)):
            galerkin = R @ galerkin @ P
            member = members[level + 1]
            assert abs(member - galerkin).max() <= 1e-12 * abs(galerkin).max(), (dt, level)
            # the cycle's copy and the single-precision levels: to float32's rounding (its
            # epsilon 1.2e-7 relative, the sum of the two terms rounded once)
            for single in (cycle.operators[level + 1], singles[level + 1]):
                assert abs(single - galerkin).max() <= 1e-6 * abs(galerkin).max(), (dt, level)
        x, info = spla.cg(A, b, rtol=1e-11, atol=0.0, maxiter=300, M=cycle)
        assert info == 0
        np.testing.assert_allclose(x, spla.spsolve(A.tocsc(), b), rtol=1e-9, atol=1e-9 * np.abs(x).max())


def test_set_up_matches_pyamg_levels_and_scipy_spectrum():
    # Outside references for our set-up. pyamg's own smoothed-aggregation set-up with the
    # same strength (all couplings, theta 0, its default) aggregates the same patterns, so
    # the level sizes must agree; the smoothing weight's spectral estimate is a Lanczos lower
    # bound of the largest eigenvalue of D^-1 A, checked against SciPy's eigsh (ARPACK):
    # from below and within 5 % (10 steps resolve the extreme eigenvalue of a 3D grid
    # operator to about 1-2 %, measured; the weight needs no more).
    import pyamg

    for shape in ((14, 12, 9), (20, 16, 14)):
        A, scale = heterogeneous_laplacian(shape=shape, with_scale=True)
        operators, prolongators, restrictors = aggregation_hierarchy(A, scaled_near_null(scale), max_coarse=50)
        theirs = pyamg.smoothed_aggregation_solver(A, B=scaled_near_null(scale)[:, None], symmetry="symmetric",
                                                   max_coarse=50)
        assert [op.shape[0] for op in operators] == [level.A.shape[0] for level in theirs.levels]
        for level, A_l in enumerate(operators[:-1]):
            exact = spla.eigsh(sp.diags(1 / np.sqrt(A_l.diagonal())) @ A_l @ sp.diags(1 / np.sqrt(A_l.diagonal())),
                               k=1, which="LA")[0][0]
            assert 0.95 * exact <= largest_eigenvalue(A_l) <= exact * (1 + 1e-12), (shape, level)


def test_tentative_prolongator_is_orthonormal_and_reproduces_the_candidate():
    # Vanek, Mandel & Brezina (1996): the tentative prolongator's columns are the candidate
    # restricted to each aggregate and normalised, so T^T T = I and T c = candidate with the
    # coarse candidate c; every unknown with a neighbour is in exactly one aggregate.
    A, scale = heterogeneous_laplacian(shape=(9, 8, 6), with_scale=True)
    candidate = scaled_near_null(scale)
    T, coarse = tentative_prolongator(A, candidate)
    np.testing.assert_allclose((T.T @ T).toarray(), np.eye(T.shape[1]), atol=1e-13)
    np.testing.assert_allclose(T @ coarse, candidate, rtol=1e-13)
    assert np.all(np.diff(T.indptr) == 1)


def test_lanczos_estimate_is_exact_when_the_space_is_exhausted():
    # The 1D Laplacian of four cells, tridiag(-1, 2, -1): D^-1 A = I - T / 2 with the path's
    # adjacency T, whose eigenvalues are 2 cos(k pi / 5), k = 1..4 (Strang 2007,
    # Computational Science and Engineering, section 1.5, from memory). Ten steps on four
    # unknowns exhaust the space (the recurrence breaks down at the fourth), so the
    # estimate is the exact largest eigenvalue 1 + cos(pi / 5), to round-off.
    A = sp.diags([-np.ones(3), 2 * np.ones(4), -np.ones(3)], [-1, 0, 1]).tocsr()
    assert abs(largest_eigenvalue(A, steps=10) - (1 + np.cos(np.pi / 5))) <= 1e-12


def test_coarsening_stops_where_the_options_and_the_aggregates_say():
    # max_levels caps the hierarchy; a matrix without couplings has nothing to aggregate
    # (pyamg's standard aggregation leaves unknowns without neighbours out), so it stays one
    # level, not one over an empty aggregate with a zero operator; a complete graph is one aggregate,
    # a single coarse unknown whose operator is P^T A P. A single-precision input is set up
    # in double precision (the levels and transfers returned are float64).
    A = heterogeneous_laplacian(shape=(12, 10, 8))
    operators, prolongators, _ = aggregation_hierarchy(A.astype(np.float32), np.ones(A.shape[0], np.float32),
                                                       max_coarse=1, max_levels=2)
    assert len(operators) == 2 and len(prolongators) == 1
    assert all(M.dtype == np.float64 for M in operators + prolongators)
    assert len(aggregation_hierarchy(A, max_coarse=1, max_levels=3)[0]) == 3
    diagonal = sp.diags(np.linspace(1.0, 2.0, 40)).tocsr()
    operators, prolongators, _ = aggregation_hierarchy(diagonal, max_coarse=1)
    assert len(operators) == 1 and prolongators == []
    dense = sp.csr_matrix(np.full((6, 6), -1.0) + 7.0 * np.eye(6))  # diagonally dominant: SPD
    operators, prolongators, _ = aggregation_hierarchy(dense, max_coarse=1)
    assert [M.shape for M in operators] == [(6, 6), (1, 1)]
    P = prolongators[0].toarray()
    np.testing.assert_allclose(operators[1].toarray(), P.T @ dense.toarray() @ P, rtol=1e-13)


def test_gauss_seidel_sweeps_match_the_textbook_recurrence():
    # x_i <- (b_i - sum_{j != i} a_ij x_j) / a_ii, rows taken in order or in reverse (Saad
    # 2003, section 4.1, from memory), against a plain loop over a dense copy.
    A = heterogeneous_laplacian(shape=(5, 4, 3))
    rng = np.random.default_rng(11)
    b, start = rng.normal(size=A.shape[0]), rng.normal(size=A.shape[0])
    dense = A.toarray()
    for forward in (True, False):
        expected = start.copy()
        for i in (range(A.shape[0]) if forward else reversed(range(A.shape[0]))):
            expected[i] = (b[i] - dense[i] @ expected + dense[i, i] * expected[i]) / dense[i, i]
        x = start.copy()
        _gauss_seidel(A, x, b, forward)
        np.testing.assert_allclose(x, expected, rtol=1e-12, atol=1e-12)


def _shuffled_rows(M):
    """M in CSR with every row's entries in reverse order and its first entry split in two
    (unsorted indices and duplicates: not canonical, the same matrix)."""
    M = sp.csr_matrix(M)
    rows, data, indices, indptr = [], [], [], [0]
    for i in range(M.shape[0]):
        cols, vals = M.indices[M.indptr[i]:M.indptr[i + 1]][::-1], M.data[M.indptr[i]:M.indptr[i + 1]][::-1]
        if cols.size:
            cols, vals = np.r_[cols[:1], cols], np.r_[0.5 * vals[:1], 0.5 * vals[:1], vals[1:]]
        indices.append(cols), data.append(vals), indptr.append(indptr[-1] + cols.size)
    shuffled = sp.csr_matrix((np.concatenate(data), np.concatenate(indices), indptr), shape=M.shape)
    assert not shuffled.has_canonical_format
    return shuffled


@pytest.mark.parametrize("case", ["diagonal within", "galerkin within", "patterns apart", "not canonical"])
def test_two_matrices_on_one_pattern_sum_as_scipy_sums_them(case):
    # The shared pattern of a level's stiffness and storage against SciPy's own sparse sum
    # (scipy.sparse, A + B): the sum of the two value arrays on the returned pattern must
    # be A + B exactly (each value is one of A's or B's, or both added once, as SciPy adds
    # them), with sorted indices; and each array alone must be its matrix.
    rng = np.random.default_rng(3)
    K = heterogeneous_laplacian(shape=(6, 5, 4))
    n = K.shape[0]
    if case == "diagonal within":
        A, B = K, sp.diags(rng.uniform(1.0, 2.0, n))
    elif case == "galerkin within":
        _, (P, *_), (R, *_) = aggregation_hierarchy(K, max_coarse=8)
        A, B = R @ K @ P, R @ sp.diags(rng.uniform(1.0, 2.0, n)) @ P
    else:
        A, B = K, sp.random(n, n, density=0.02, random_state=4, format="csr")
        if case == "not canonical":
            A, B = _shuffled_rows(A), _shuffled_rows(B)
    indptr, indices, a, b = _common_pattern(A, B)
    shape = A.shape

    def on_pattern(values):
        return sp.csr_matrix((values, indices, indptr), shape=shape)

    assert on_pattern(a).has_canonical_format  # sorted, no duplicates (SciPy's own check)
    assert abs(on_pattern(a + b) - (A + B)).max() == 0.0
    assert abs(on_pattern(a) - A).max() == 0.0 and abs(on_pattern(b) - B).max() == 0.0
