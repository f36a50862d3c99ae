"""Our conjugate gradients and in-place sparse products against SciPy's.

SciPy's ``scipy.sparse.linalg.cg`` runs the same preconditioned recurrence (Saad 2003,
Iterative Methods for Sparse Linear Systems, algorithm 9.1, from memory) and stops on the
same rule, ||r|| <= rtol ||b||; the two differ only in the order of floating-point
operations, so from the same start they reach the same iterate and need the same number
of iterations, give or take one where the residual crosses the limit within round-off.
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from hypothesis import given, settings
from hypothesis import strategies as st
from test_multigrid import heterogeneous_laplacian

from upscale.core.conjugate_gradients import conjugate_gradients
from upscale.core.multigrid import MultigridCycle
from upscale.core.sparse_products import add_product_into, product_into, residual_into


@pytest.mark.parametrize("precision", [np.float64, np.float32])
def test_cg_matches_scipy_with_the_same_preconditioner(precision):
    A = heterogeneous_laplacian(shape=(14, 12, 9))
    b = np.random.default_rng(2).normal(size=A.shape[0])
    x0 = np.random.default_rng(3).normal(size=A.shape[0])
    M = MultigridCycle(A, precision=precision)
    theirs = []
    reference, info = spla.cg(A, b, x0=x0, rtol=1e-9, atol=0.0, maxiter=500, M=M, callback=theirs.append)
    assert info == 0
    x, steps = conjugate_gradients(A, b, x0, M, rtol=1e-9, maxiter=500)
    assert abs(steps - len(theirs)) <= 1
    assert np.linalg.norm(b - A @ x) <= 1e-9 * np.linalg.norm(b)
    # both within rtol of the solution: the iterates differ by about the error left, a
    # condition number (about 1e4 here) times the residual at most
    np.testing.assert_allclose(x, reference, rtol=0, atol=1e-4 * np.abs(reference).max())


def test_cg_stops_at_once_on_a_solution_and_at_maxiter_otherwise():
    A = heterogeneous_laplacian(shape=(10, 9, 7))
    x_true = np.random.default_rng(4).normal(size=A.shape[0])
    b = A @ x_true
    M = MultigridCycle(A)
    x, steps = conjugate_gradients(A, b, x_true, M, rtol=1e-8, maxiter=50)
    assert steps == 0 and np.array_equal(x, x_true)
    x, steps = conjugate_gradients(A, b, np.zeros_like(b), M, rtol=1e-30, maxiter=3)
    assert steps == 3


@settings(max_examples=25, deadline=None)
@given(rows=st.integers(1, 30), columns=st.integers(1, 30), density=st.floats(0.0, 1.0),
       seed=st.integers(0, 2 ** 16), single=st.booleans())
def test_products_into_buffers_match_scipy(rows, columns, density, seed, single):
    # Against SciPy's own products, to round-off of the precision used (float32: 1e-5 relative
    # to the sum of |terms|, a few units of its epsilon 1.2e-7 times up to 30 terms).
    dtype = np.float32 if single else np.float64
    tolerance = 1e-5 if single else 1e-13
    rng = np.random.default_rng(seed)
    A = sp.random(rows, columns, density=density, format="csr", dtype=dtype, random_state=rng)
    v = rng.normal(size=columns).astype(dtype)
    scale = abs(A) @ np.abs(v) + 1e-30
    out = np.full(rows, np.nan, dtype=dtype)  # whatever the buffer held is overwritten
    product_into(A, v, out)
    assert np.all(np.abs(out - A @ v) <= tolerance * scale)
    before = rng.normal(size=rows).astype(dtype)
    out = before.copy()
    add_product_into(A, v, out)
    assert np.all(np.abs(out - (before + A @ v)) <= tolerance * (scale + np.abs(before)))
    if rows == columns:
        b = rng.normal(size=rows).astype(dtype)
        out = np.full(rows, np.nan, dtype=dtype)
        residual_into(A, v, b, out)
        assert np.all(np.abs(out - (b - A @ v)) <= tolerance * (scale + np.abs(b)))


def test_cg_after_a_set_number_of_steps_is_scipys_iterate_of_that_step():
    # Stopped by maxiter before converging, our x is SciPy's k-th iterate (its callback
    # receives x_k after each step k), to round-off (1e-8 of its size; the iterates of
    # steps k - 1 and k + 1 differ from it by far more, which the last line shows).
    A = heterogeneous_laplacian(shape=(12, 10, 8))
    b = np.random.default_rng(7).normal(size=A.shape[0])
    M = MultigridCycle(A)
    iterates = []
    spla.cg(A, b, x0=np.zeros_like(b), rtol=1e-30, atol=0.0, maxiter=6, M=M,
            callback=lambda xk: iterates.append(xk.copy()))
    assert len(iterates) == 6
    for steps in (1, 4):
        x, taken = conjugate_gradients(A, b, np.zeros_like(b), M, rtol=1e-30, maxiter=steps)
        assert taken == steps
        size = np.abs(iterates[steps - 1]).max()
        np.testing.assert_allclose(x, iterates[steps - 1], rtol=0, atol=1e-8 * size)
        assert np.abs(iterates[steps] - iterates[steps - 1]).max() > 1e-4 * size


def test_a_single_precision_start_still_gives_a_double_precision_solution():
    # The start only seeds the iterate: a float32 x0 must not make the recurrence run in
    # float32, whose residual cannot fall much below its epsilon (1.2e-7) times ||b||.
    A = heterogeneous_laplacian(shape=(10, 9, 7))
    b = np.random.default_rng(8).normal(size=A.shape[0])
    x, _ = conjugate_gradients(A, b, np.zeros(b.size, dtype=np.float32), MultigridCycle(A), rtol=1e-11, maxiter=200)
    assert x.dtype == np.float64
    assert np.linalg.norm(b - A @ x) <= 1e-11 * np.linalg.norm(b)


class _Identity:
    def apply(self, r, out):
        out[:] = r


@pytest.mark.parametrize("diagonal, expected, steps", [
    ([1.0, -1.0], [0.0, 0.0], 0),
    ([1.0, 1.0, -1.0], [3.0, 3.0, 3.0], 1),
])
def test_cg_stops_with_its_last_iterate_where_the_curvature_is_not_positive(diagonal, expected, steps):
    # Worked by hand from the recurrence (Hestenes & Stiefel 1952), no preconditioner,
    # A = diag(diagonal), b = ones, x0 = 0, so r0 = p0 = b.
    # diag(1, -1): p0^T A p0 = 1 - 1 = 0: stop at once with x0.
    # diag(1, 1, -1): p0^T A p0 = 1 > 0, alpha = r0^T r0 / 1 = 3, x1 = 3 b, r1 = b - 3 A b =
    #   (-2, -2, 4), beta = 24 / 3 = 8, p1 = r1 + 8 b = (6, 6, 12), p1^T A p1 = 36 + 36 - 144
    #   < 0: stop after one step with x1.
    A, b = sp.diags(diagonal).tocsr(), np.ones(len(diagonal))
    x, taken = conjugate_gradients(A, b, np.zeros_like(b), _Identity(), rtol=1e-12, maxiter=10)
    assert taken == steps
    np.testing.assert_array_equal(x, expected)
