"""Preconditioned conjugate gradients for symmetric positive definite systems.

The textbook recurrence (Hestenes & Stiefel 1952, Methods of conjugate gradients for solving
linear systems, J. Res. NBS 49; preconditioned form as in Saad 2003, Iterative Methods for
Sparse Linear Systems, algorithm 9.1, from memory), on buffers made once per solve: every
product and update of an iteration writes in place (see :mod:`upscale.core.sparse_products`).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from numba import njit

from .._runtime import first_call
from .sparse_products import product_into, residual_into


def conjugate_gradients(A: sp.csr_matrix, b: np.ndarray, x0: np.ndarray, preconditioner, rtol: float,
                        maxiter: int) -> tuple[np.ndarray, int]:
    """Solve ``A x = b`` until the recursive residual is at most ``rtol`` ||b||.

    Parameters
    ----------
    A : scipy.sparse.csr_matrix, (n, n)
        Symmetric positive definite.
    b, x0 : ndarray, (n,)
        Right-hand side and start.
    preconditioner
        Has ``apply(r, out)``, writing an approximation of A^-1 r into ``out``; symmetric
        positive definite (:class:`upscale.core.multigrid.MultigridCycle`).
    rtol : float
    maxiter : int
        Iterations at most.

    Returns
    -------
    x : ndarray, (n,)
    iterations : int
        Stops early, with the last iterate, if the recurrence breaks down (p^T A p <= 0).
    """
    x = np.array(x0, dtype=np.float64)
    r, z, q = np.empty_like(x), np.empty_like(x), np.empty_like(x)
    residual_into(A, x, b, r)
    limit = rtol * np.linalg.norm(b)
    if np.linalg.norm(r) <= limit:
        return x, 0
    preconditioner.apply(r, z)
    p = z.copy()
    rz = float(r @ z)
    for iteration in range(1, maxiter + 1):
        product_into(A, p, q)
        curvature = float(p @ q)
        if not curvature > 0:
            return x, iteration - 1
        with first_call(_step):
            _step(x, r, p, q, rz / curvature)
        if np.linalg.norm(r) <= limit:
            return x, iteration
        preconditioner.apply(r, z)
        rz, previous = float(r @ z), rz
        with first_call(_direction):
            _direction(p, z, rz / previous)
    return x, maxiter


@njit(cache=True)
def _step(x, r, p, q, alpha):
    """x += alpha p and r -= alpha q, in place."""
    for i in range(x.size):
        x[i] += alpha * p[i]
        r[i] -= alpha * q[i]


@njit(cache=True)
def _direction(p, z, beta):
    """p = z + beta p, in place."""
    for i in range(p.size):
        p[i] = z[i] + beta * p[i]
