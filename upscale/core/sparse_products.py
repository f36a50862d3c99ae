"""Sparse matrix-vector products written into buffers the caller keeps, compiled.

scipy's ``A @ x`` returns a new array. In the solvers' inner loops (a multigrid cycle, a
conjugate-gradient step) that is an array of the model's size several times per iteration,
and large arrays are memory-mapped afresh each time (``upscale._runtime.keep_heap_small``),
each paying page faults and zero-filling. These products write into given arrays instead.

The kernels read the index arrays as unsigned (:func:`unsigned`): numba checks every signed
index for a negative value to wrap around, which made a product twice as slow as SciPy's.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from numba import njit

from .._runtime import first_call


def unsigned(index: np.ndarray) -> np.ndarray:
    """The same non-negative integers viewed as unsigned ones of the same width (no copy).

    Parameters
    ----------
    index : ndarray of int32 or int64

    Returns
    -------
    ndarray of uint32 or uint64
    """
    return index.view(np.uint32 if index.dtype == np.int32 else np.uint64)


def product_into(A: sp.csr_matrix, v: np.ndarray, out: np.ndarray) -> None:
    """out = A v.

    Parameters
    ----------
    A : scipy.sparse.csr_matrix, (m, n)
    v : ndarray, (n,)
    out : ndarray, (m,)
        Overwritten; not ``v``.
    """
    with first_call(_product):
        _product(unsigned(A.indptr), unsigned(A.indices), A.data, v, out, False)


def add_product_into(A: sp.csr_matrix, v: np.ndarray, out: np.ndarray) -> None:
    """out += A v (arguments as for :func:`product_into`)."""
    with first_call(_product):
        _product(unsigned(A.indptr), unsigned(A.indices), A.data, v, out, True)


def residual_into(A: sp.csr_matrix, x: np.ndarray, b: np.ndarray, out: np.ndarray) -> None:
    """out = b - A x.

    Parameters
    ----------
    A : scipy.sparse.csr_matrix, (n, n)
    x, b : ndarray, (n,)
    out : ndarray, (n,)
        Overwritten; neither ``x`` nor ``b``.
    """
    with first_call(_residual):
        _residual(unsigned(A.indptr), unsigned(A.indices), A.data, x, b, out)


@njit(cache=True)
def _product(indptr, indices, data, v, out, accumulate):
    """out (+)= A v for the CSR matrix (indptr, indices, data), summed in out's precision."""
    zero = np.zeros(1, dtype=out.dtype)[0]  # not out[i] * 0: out may hold NaN before it is written
    for i in range(out.size):
        total = out[i] if accumulate else zero
        for p in range(indptr[i], indptr[i + 1]):
            total += data[p] * v[indices[p]]
        out[i] = total


@njit(cache=True)
def _residual(indptr, indices, data, x, b, out):
    """out = b - A x for the CSR matrix (indptr, indices, data)."""
    for i in range(out.size):
        total = b[i]
        for p in range(indptr[i], indptr[i + 1]):
            total -= data[p] * x[indices[p]]
        out[i] = total
