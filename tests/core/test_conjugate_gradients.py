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
