"""Batched direct solves of many small symmetric positive-definite banded systems.

Every system of a batch has the same sparsity: ``n`` unknowns (each given its position
in a banded order), off-diagonal couplings ``-values[b, e]`` between unknowns ``first[e]`` and
``second[e]``, and a given diagonal. One compiled kernel, parallel over the batch
(numba ``prange``), assembles systems into lower bands of half width ``w`` held in
thread-local memory, factors them (Cholesky, A = L L^T), solves all right-hand sides,
and refines the solutions until the relative residual ||b - A x|| / ||b|| is at most the
tolerance. Cost per system ~ n w^2 / 2, memory ~ n (w + 1) LANES per thread; residuals
are computed from the coupling list (~6 n per system rather than 2 n w from a band copy).

Band layout: ``band[j, d, l] = A_l[j + d, j]`` for d = 0..w, with LANES systems side by
side in the last axis so that every inner loop runs over lanes (SIMD). Measured on
125-cell blocks: the right-looking factorisation about 4x faster than the dot-product
form; fusing assembly, factorisation and solve per block about 3x faster than a numpy
assembly of the whole batch; 8 lanes about 1.4x faster than one system at a time.
"""

from __future__ import annotations

from contextlib import nullcontext

import numpy as np
from numba import njit, prange

from .field import interrupt_after


LANES = 8  # systems factored side by side in SIMD lanes


def first_call(kernel):
    """Context for a call of a numba ``kernel``: on its first call in this process (when it
    compiles, or loads from the cache) Ctrl-C is held until the call returns. Measured:
    an interrupt landing in numba's compiler was lost (the run went on) or ended in a
    traceback."""
    return nullcontext() if kernel.signatures else interrupt_after("the compiled kernels are ready")


@njit(cache=True, fastmath=True)
def _factor(c, ok):  # pragma: no cover - compiled
    """Cholesky of LANES banded systems at once; c (n, w + 1, LANES); ok (LANES,) cleared
    where a pivot is not positive (that lane's pivot is then set to 1 to go on)."""
    n, w1, lanes = c.shape
    w = w1 - 1
    inverse = np.empty(lanes)
    for j in range(n):
        for l in range(lanes):
            pivot = c[j, 0, l]
            if not pivot > 0.0:
                ok[l] = False
                pivot = 1.0
            root = np.sqrt(pivot)
            c[j, 0, l] = root
            inverse[l] = 1.0 / root
        m = min(w, n - 1 - j)
        for t in range(1, m + 1):
            for l in range(lanes):
                c[j, t, l] *= inverse[l]
        for d1 in range(1, m + 1):
            for d2 in range(d1, m + 1):
                for l in range(lanes):
                    c[j + d1, d2 - d1, l] -= c[j, d2, l] * c[j, d1, l]


@njit(cache=True, fastmath=True)
def _substitute(c, x):  # pragma: no cover - compiled
    """Overwrite x (n, LANES) with the solutions of L L^T y = x, lane by lane."""
    n, w1, lanes = c.shape
    w = w1 - 1
    for j in range(n):
        for l in range(lanes):
            x[j, l] /= c[j, 0, l]
        for t in range(1, min(w, n - 1 - j) + 1):
            for l in range(lanes):
                x[j + t, l] -= c[j, t, l] * x[j, l]
    s = np.empty(lanes)
    for j in range(n - 1, -1, -1):
        for l in range(lanes):
            s[l] = x[j, l]
        for t in range(1, min(w, n - 1 - j) + 1):
            for l in range(lanes):
                s[l] -= c[j, t, l] * x[j + t, l]
        for l in range(lanes):
            x[j, l] = s[l] / c[j, 0, l]


@njit(cache=True, fastmath=True)
def _residual(diagonal, first, second, values, x, b, r):  # pragma: no cover - compiled
    """r = b - A x for LANES systems given by their coupling list: diagonal (n, LANES),
    couplings ``-values`` (E, LANES) between unknowns first[e] and second[e]; x, b, r (n, LANES)."""
    n, lanes = x.shape
    for j in range(n):
        for l in range(lanes):
            r[j, l] = b[j, l] - diagonal[j, l] * x[j, l]
    for e in range(first.shape[0]):
        p = first[e]
        q = second[e]
        if p == q:
            continue
        for l in range(lanes):
            r[p, l] += values[e, l] * x[q, l]
            r[q, l] += values[e, l] * x[p, l]


@njit(parallel=True, cache=True)
def solve_assembled(first, second, position, values, diagonal, rhs, width, refinements, tolerance):  # pragma: no cover
    """Assemble, factor and solve every system of a batch, LANES systems at a time.

    first, second (E,) int: coupled unknowns; position (n,) int: band position of each
    unknown; values (nb, E): coupling strengths (the matrix holds -value off the
    diagonal); diagonal (nb, n); rhs (nb, m, n); unknowns in the callers' numbering. A
    last, incomplete lane group repeats the batch's last system in its spare lanes.
    Returns (x (nb, m, n), relative residual (nb,), positive definite flag (nb,)).
    """
    nb, m, n = rhs.shape
    edges = first.shape[0]
    x = np.zeros_like(rhs)
    relative = np.zeros(nb)
    ok = np.ones(nb, dtype=np.bool_)
    band_first = np.empty(edges, dtype=np.int64)
    band_second = np.empty(edges, dtype=np.int64)
    for e in range(edges):
        band_first[e] = position[first[e]]
        band_second[e] = position[second[e]]
    for g in prange((nb + LANES - 1) // LANES):
        base = g * LANES
        source = np.empty(LANES, dtype=np.int64)
        for l in range(LANES):
            source[l] = min(base + l, nb - 1)
        d = np.empty((n, LANES))
        v = np.empty((edges, LANES))
        c = np.zeros((n, width + 1, LANES))
        for i in range(n):
            j = position[i]
            for l in range(LANES):
                d[j, l] = diagonal[source[l], i]
                c[j, 0, l] = d[j, l]
        for e in range(edges):
            for l in range(LANES):
                v[e, l] = values[source[l], e]
            p = band_first[e]
            q = band_second[e]
            if p == q:
                continue
            lo = min(p, q)
            for l in range(LANES):
                c[lo, max(p, q) - lo, l] -= v[e, l]
        lane_ok = np.ones(LANES, dtype=np.bool_)
        _factor(c, lane_ok)
        b = np.empty((n, LANES))
        y = np.empty((n, LANES))
        r = np.empty((n, LANES))
        for k in range(m):
            for i in range(n):
                j = position[i]
                for l in range(LANES):
                    b[j, l] = rhs[source[l], k, i]
                    y[j, l] = b[j, l]
            _substitute(c, y)
            scale = np.sqrt(np.sum(b * b, axis=0))
            for attempt in range(refinements + 1):
                _residual(d, band_first, band_second, v, y, b, r)
                error = np.sqrt(np.sum(r * r, axis=0)) / np.where(scale > 0.0, scale, 1.0)
                if error.max() <= tolerance or attempt == refinements:
                    break
                _substitute(c, r)
                y += r
            for l in range(min(LANES, nb - base)):
                relative[base + l] = max(relative[base + l], error[l])
                ok[base + l] = lane_ok[l]
                for i in range(n):
                    x[base + l, k, i] = y[position[i], l]
    return x, relative, ok


def solve_batch(first: np.ndarray, second: np.ndarray, position: np.ndarray, values: np.ndarray,
                diagonal: np.ndarray, rhs: np.ndarray, width: int, refinements: int = 2,
                tolerance: float = 1e-12):
    """Checked wrapper of :func:`solve_assembled`; raises ``FloatingPointError`` if a
    system is not positive definite. Returns (x (nb, m, n), relative residual (nb,))."""

    def exact(array, dtype):
        return np.ascontiguousarray(array, dtype=dtype)

    with first_call(solve_assembled):
        x, relative, ok = solve_assembled(exact(first, np.int64), exact(second, np.int64),
                                          exact(position, np.int64), exact(values, float), exact(diagonal, float),
                                          exact(rhs, float), int(width), int(refinements), float(tolerance))
    if not ok.all():
        raise FloatingPointError(f"{int((~ok).sum())} local system(s) not positive definite")
    return x, relative
