"""Algebraic multigrid preconditioning for the whole-model pressure systems.

pyamg builds the smoothed-aggregation hierarchy (levels of Galerkin operators
A_{l+1} = R_l A_l P_l, R_l = P_l^T); :class:`VCycle` applies it as one symmetric V-cycle:
a forward sweep on the way down, the exact (pseudo-)inverse on the coarsest level and the
reverse sweep on the way up, so the preconditioner is symmetric positive definite as
conjugate gradients needs. The cycle is our own rather than pyamg's ``aspreconditioner``
because that one computes two extra residual norms per application and keeps the coarse
operators in block-sparse form.

On the finest level the sweep is line Gauss-Seidel: the unknowns are cut into lines, maximal
runs of consecutive rows coupled to the next row (with cells in C order, z fastest, these are
the grid's vertical columns, broken where a face is closed), and each line is solved exactly
(tridiagonal, Thomas algorithm) with the rest of the row moved to the right-hand side. Thin
layers couple far more strongly vertically than laterally, and cemented streaks cut that
coupling; point smoothing handles neither well. Coarser levels use point Gauss-Seidel.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from numba import njit

from .._runtime import first_call

SETUP_SEED = 20261202


class VCycle(spla.LinearOperator):
    """One V-cycle of a smoothed-aggregation hierarchy, as a preconditioner (``M @ b``).

    Parameters
    ----------
    matrix : sparse matrix, (n, n)
        Symmetric positive definite (CSR).
    near_null : ndarray, (n,), optional
        The smooth vector the matrix nearly annihilates, from which the aggregates'
        prolongation is built: ones (None) for a pressure matrix as assembled, whose rows
        sum to nearly zero; for its scaled form D^-1/2 A D^-1/2 the same vector scaled,
        D^1/2 1 (:func:`scaled_near_null`). With ones there the scaled system needs about
        twice the iterations.
    """

    def __init__(self, matrix, near_null: np.ndarray | None = None):
        import pyamg  # imported here: only the large models need it

        # pyamg estimates spectral radii from random start vectors drawn from numpy's global
        # generator: seed it for the set-up (and restore it) so that results repeat exactly.
        state = np.random.get_state()
        np.random.seed(SETUP_SEED)
        try:
            candidates = None if near_null is None else np.asarray(near_null, dtype=np.float64).reshape(-1, 1)
            hierarchy = pyamg.smoothed_aggregation_solver(sp.csr_matrix(matrix), B=candidates, symmetry="symmetric")
        finally:
            np.random.set_state(state)
        levels = hierarchy.levels
        self._set_levels([level.A for level in levels], [level.P for level in levels[:-1]],
                         [level.R for level in levels[:-1]])

    @classmethod
    def from_levels(cls, operators, prolongators, restrictors) -> "VCycle":
        """The V-cycle of a hierarchy given level by level, without a set-up.

        Parameters
        ----------
        operators : list of sparse matrix
            The operator of each level, finest first.
        prolongators, restrictors : list of sparse matrix
            Between each level and the next: P_l, (n_l, n_{l+1}), and R_l = P_l^T.

        Returns
        -------
        VCycle
        """
        cycle = cls.__new__(cls)
        cycle._set_levels(operators, prolongators, restrictors)
        return cycle

    def _set_levels(self, operators, prolongators, restrictors) -> None:
        """Keep the levels in CSR, invert the coarsest and set up the line smoother."""
        self.operators = [sp.csr_matrix(A).sorted_indices() for A in operators]
        self.prolongators = [sp.csr_matrix(P) for P in prolongators]
        self.restrictors = [sp.csr_matrix(R) for R in restrictors]
        self.coarsest = np.linalg.pinv(self.operators[-1].toarray())
        self.line_smoother = LineSmoother(self.operators[0])
        spla.LinearOperator.__init__(self, dtype=np.float64, shape=self.operators[0].shape)

    def _matvec(self, b):
        """One V-cycle from x = 0 for ``b``."""
        return self._cycle(0, np.asarray(b, dtype=np.float64).ravel())

    def _rmatvec(self, b):
        """The same: the cycle is symmetric."""
        return self._matvec(b)  # symmetric

    def _cycle(self, level: int, b: np.ndarray) -> np.ndarray:
        """The V-cycle's approximate solution on ``level`` (exact on the coarsest)."""
        if level == len(self.operators) - 1:
            return self.coarsest @ b
        A = self.operators[level]
        x = np.zeros_like(b)
        self._smooth(level, x, b, forward=True)
        x += self.prolongators[level] @ self._cycle(level + 1, self.restrictors[level] @ (b - A @ x))
        self._smooth(level, x, b, forward=False)
        return x

    def _smooth(self, level: int, x: np.ndarray, b: np.ndarray, forward: bool) -> None:
        """One sweep in place on ``level``: line Gauss-Seidel on the finest, point Gauss-Seidel below."""
        A = self.operators[level]
        if level == 0:
            self.line_smoother.sweep(x, b, forward)
        else:
            _gauss_seidel(A, x, b, forward)


class ShiftedCycles:
    """V-cycles for every matrix of the family K + diag(storage) / dt, one set-up for all.

    The aggregates and prolongators come from one smoothed-aggregation set-up on the first
    member; each level keeps its Galerkin stiffness K_l = R_l K_{l-1} P_l and storage
    S_l = R_l S_{l-1} P_l, so a member's levels are exactly K_l + S_l / dt for any step
    dt, at the cost of a sparse sum per level instead of a new set-up.

    Parameters
    ----------
    stiffness : sparse matrix, (n, n)
        K: symmetric positive semi-definite.
    storage : ndarray, (n,)
        The diagonal storage, >= 0, with K + diag(storage) / dt positive definite.
    dt : float
        The step of the member the set-up is made on.
    """

    def __init__(self, stiffness, storage: np.ndarray, dt: float):
        stiffness = sp.csr_matrix(stiffness)
        first = VCycle(stiffness + sp.diags(storage / dt))
        self.prolongators, self.restrictors = first.prolongators, first.restrictors
        self.stiffness, self.storage = [stiffness], [sp.diags(storage).tocsr()]
        for P, R in zip(self.prolongators, self.restrictors):
            self.stiffness.append((R @ self.stiffness[-1] @ P).tocsr())
            self.storage.append((R @ self.storage[-1] @ P).tocsr())

    def cycle(self, dt: float) -> VCycle:
        """The V-cycle of K + diag(storage) / dt.

        Parameters
        ----------
        dt : float
            > 0, in the unit of the storage's time.

        Returns
        -------
        VCycle
        """
        operators = [K + S / dt for K, S in zip(self.stiffness, self.storage)]
        return VCycle.from_levels(operators, self.prolongators, self.restrictors)


def scaled_near_null(scale: np.ndarray) -> np.ndarray:
    """The near-null vector of a scaled pressure matrix D^-1/2 A D^-1/2: D^1/2 1 = 1 / scale.

    Parameters
    ----------
    scale : ndarray, (n,)
        The scaling factors D^-1/2.

    Returns
    -------
    ndarray, (n,)
    """
    return 1.0 / np.asarray(scale, dtype=np.float64)


class LineSmoother:
    """Line Gauss-Seidel for a CSR matrix (see the module notes), set up once.

    Parameters
    ----------
    A : sparse matrix, (n, n)

    Attributes
    ----------
    starts : ndarray of int64
        First row of each line, and n.
    rest : scipy.sparse.csr_matrix
        The matrix without the couplings inside each line (nor the diagonal).
    factor, upper, inverse_pivot : ndarray, (n,)
        Each line's tridiagonal factorisation (Thomas algorithm: elimination factors,
        upper band, inverse pivots).
    """

    def __init__(self, A: sp.csr_matrix):
        A = sp.csr_matrix(A)
        n = A.shape[0]
        rows = np.repeat(np.arange(n), np.diff(A.indptr))
        cols = A.indices
        coupled = (A.data != 0) & (cols != rows)
        new_line = np.ones(n, dtype=bool)
        new_line[cols[coupled & (cols == rows + 1)]] = False  # row i + 1 continues row i's line
        # A line holds no coupling but its tridiagonal one: split at the later row of any pair
        # coupled further apart (splitting only refines, so one pass separates every pair).
        line = np.cumsum(new_line) - 1
        far = coupled & (np.abs(cols - rows) > 1) & (line[cols] == line[rows])
        new_line[np.maximum(rows[far], cols[far])] = True
        line = np.cumsum(new_line) - 1
        self.starts = np.append(np.flatnonzero(new_line), n).astype(np.int64)
        inside = (line[cols] == line[rows]) & coupled
        upper = np.zeros(n)
        lower = np.zeros(n)
        upper[rows[inside & (cols == rows + 1)]] = A.data[inside & (cols == rows + 1)]
        lower[rows[inside & (cols == rows - 1)]] = A.data[inside & (cols == rows - 1)]
        self.upper = upper
        with first_call(_thomas_factors):
            self.factor, self.inverse_pivot = _thomas_factors(lower, A.diagonal(), upper, self.starts)
        # Copies of the index arrays: eliminate_zeros works in place.
        self.rest = sp.csr_matrix((np.where(inside | (cols == rows), 0.0, A.data), cols.copy(), A.indptr.copy()),
                                  shape=A.shape)
        self.rest.eliminate_zeros()

    def sweep(self, x: np.ndarray, b: np.ndarray, forward: bool) -> None:
        """One sweep in place, lines in order (``forward``) or in reverse.

        The two are each other's adjoint, which keeps the V-cycle symmetric.

        Parameters
        ----------
        x : ndarray, (n,)
            The iterate, updated in place.
        b : ndarray, (n,)
        forward : bool
        """
        R = self.rest
        with first_call(_line_sweep):
            _line_sweep(R.indptr, R.indices, R.data, self.factor, self.upper, self.inverse_pivot,
                        self.starts, x, b, forward)


@njit(cache=True)
def _thomas_factors(lower, diagonal, upper, starts):
    """Per line [s, e): elimination factors l_i / d_{i-1} and inverse pivots 1 / d_i."""
    factor = np.zeros(diagonal.size)
    inverse_pivot = np.empty(diagonal.size)
    for line in range(starts.size - 1):
        s, e = starts[line], starts[line + 1]
        pivot = diagonal[s]
        inverse_pivot[s] = 1.0 / pivot
        for i in range(s + 1, e):
            factor[i] = lower[i] / pivot
            pivot = diagonal[i] - factor[i] * upper[i - 1]
            inverse_pivot[i] = 1.0 / pivot
    return factor, inverse_pivot


@njit(cache=True)
def _line_sweep(indptr, indices, data, factor, upper, inverse_pivot, starts, x, b, forward):
    """One line Gauss-Seidel sweep in place: each line solved exactly with the rest of its rows
    (the CSR matrix indptr, indices, data) on the right-hand side."""
    lines = starts.size - 1
    for step in range(lines):
        line = step if forward else lines - 1 - step
        s, e = starts[line], starts[line + 1]
        previous = 0.0
        for i in range(s, e):  # right-hand side and forward elimination, kept in x
            r = b[i]
            for p in range(indptr[i], indptr[i + 1]):
                r -= data[p] * x[indices[p]]
            previous = r - factor[i] * previous
            x[i] = previous
        following = 0.0
        for i in range(e - 1, s - 1, -1):  # back substitution
            following = (x[i] - upper[i] * following) * inverse_pivot[i]
            x[i] = following


def _gauss_seidel(A: sp.csr_matrix, x: np.ndarray, b: np.ndarray, forward: bool) -> None:
    """One Gauss-Seidel sweep on ``A x = b`` in place, rows in order or in reverse."""
    from pyamg import amg_core

    n = A.shape[0]
    start, stop, step = (0, n, 1) if forward else (n - 1, -1, -1)
    amg_core.gauss_seidel(A.indptr, A.indices, A.data, x, b, start, stop, step)
