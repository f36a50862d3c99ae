"""Algebraic multigrid preconditioning for the whole-model pressure systems.

Smoothed aggregation (Vaněk, Mandel & Brezina 1996, Algebraic multigrid by smoothed
aggregation for second and fourth order elliptic problems, Computing 56) builds the levels
(:func:`aggregation_hierarchy`): pyamg's standard aggregation groups each unknown with its
neighbours, the tentative prolongator injects the near-null vector aggregate by aggregate,
one damped-Jacobi step smooths it, P = (I - omega / rho D^-1 A) T with omega = 4/3 and rho a
Lanczos estimate of the largest eigenvalue of D^-1 A, and the coarse operator is the
Galerkin product A_{l+1} = R_l A_l P_l, R_l = P_l^T. The set-up is ours rather than pyamg's
``smoothed_aggregation_solver`` because that one spent most of its time on a far tighter
spectral estimate and on products in block-sparse form, for the same iterations.

:class:`MultigridCycle` applies the hierarchy as one symmetric cycle: on each level forward
sweeps, the coarse-grid correction and as many reverse sweeps, with the exact
(pseudo-)inverse on the coarsest level, so the preconditioner is symmetric positive definite
as conjugate gradients needs. The finest level, where a cycle spends most of its time, is
visited once with one sweep each way; the second level takes two corrections per visit (a
W-cycle there) and every level below the finest two sweeps each way (Trottenberg, Oosterlee &
Schueller 2001, Multigrid, section 2.4, from memory). The cycle runs in single precision by
default: a preconditioner need only approximate the inverse, the conjugate gradients around
it stay in double precision and stop on the true residual, and the cycle moves half the bytes.

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
from .sparse_products import add_product_into, product_into, residual_into, unsigned

SETUP_SEED = 20261202
#: Jacobi weight of the prolongator smoothing, over the spectral radius (Vaněk et al. 1996)
PROLONGATION_WEIGHT = 4.0 / 3.0
#: Lanczos steps of the spectral estimate: a lower bound within a few per cent, which is all
#: the smoothing weight needs
LANCZOS_STEPS = 10
#: levels are coarsened until at most this many unknowns are left (solved densely)
MAX_COARSE = 500
MAX_LEVELS = 10
#: coarse-grid corrections per visit of the second level (2: a W-cycle there; once below),
#: and sweeps before and after them on every level below the finest; on the benchmark field
#: these cut the steady solves' iterations by about a third for about the same time per cycle
SECOND_LEVEL_VISITS = 2
COARSE_SWEEPS = 2
#: the cycles' precision unless told
CYCLE_PRECISION = np.float32
#: the same for the time steps' systems (storage on the diagonal, better conditioned): one
#: correction, where the second one cost more than the iterations it saved
STEP_SECOND_LEVEL_VISITS = 1


def aggregation_hierarchy(matrix, near_null: np.ndarray | None = None, max_coarse: int = MAX_COARSE,
                          max_levels: int = MAX_LEVELS):
    """The levels of a smoothed-aggregation hierarchy (see the module notes).

    Parameters
    ----------
    matrix : sparse matrix, (n, n)
        Symmetric positive definite.
    near_null : ndarray, (n,), optional
        The smooth vector the matrix nearly annihilates (ones if None).
    max_coarse, max_levels : int
        Coarsening stops at or below ``max_coarse`` unknowns, after ``max_levels`` levels, or
        at a level none of whose unknowns has a neighbour (nothing to aggregate).

    Returns
    -------
    operators : list of scipy.sparse.csr_matrix
        A_l, finest (the matrix) first.
    prolongators, restrictors : list of scipy.sparse.csr_matrix
        P_l, (n_l, n_{l+1}), and R_l = P_l^T, one fewer.
    """
    operators = [sp.csr_matrix(matrix, dtype=np.float64)]
    candidate = np.ones(operators[0].shape[0]) if near_null is None else np.asarray(near_null, dtype=np.float64)
    prolongators, restrictors = [], []
    while operators[-1].shape[0] > max_coarse and len(operators) < max_levels:
        A = operators[-1]
        T, coarse_candidate = tentative_prolongator(A, candidate)
        # no unknown has a neighbour: nothing to coarsen (an aggregate has two unknowns or
        # more, so any other level shrinks, and max_levels caps the count)
        if T.nnz == 0:
            break
        AT = (A @ T).tocsr()
        AT.data *= np.repeat(PROLONGATION_WEIGHT / (largest_eigenvalue(A) * A.diagonal()), np.diff(AT.indptr))
        P = (T - AT).tocsr()
        R = P.T.tocsr()
        operators.append((R @ (A @ P)).tocsr())
        prolongators.append(P)
        restrictors.append(R)
        candidate = coarse_candidate
    return operators, prolongators, restrictors


def tentative_prolongator(A: sp.csr_matrix, candidate: np.ndarray):
    """The aggregates' injection of ``candidate``, columns of unit norm.

    Parameters
    ----------
    A : scipy.sparse.csr_matrix, (n, n)
        Its pattern groups the unknowns (pyamg's ``standard_aggregation``).
    candidate : ndarray, (n,)

    Returns
    -------
    T : scipy.sparse.csr_matrix, (n, m)
        T[i, a] = candidate[i] / ||candidate on aggregate a|| for the aggregate a of i; rows
        of unknowns left out of every aggregate (no neighbours) are empty.
    coarse_candidate : ndarray, (m,)
        The aggregates' norms, so that T @ coarse_candidate = candidate where aggregated.
    """
    from pyamg.aggregation import standard_aggregation  # imported here: only the large models need it

    aggregates = sp.csr_matrix(standard_aggregation(A)[0])
    rows = np.flatnonzero(np.diff(aggregates.indptr))
    columns = aggregates.indices
    norms = np.sqrt(np.bincount(columns, weights=candidate[rows] ** 2, minlength=aggregates.shape[1]))
    T = sp.csr_matrix((candidate[rows] / norms[columns], (rows, columns)), shape=aggregates.shape)
    return T, norms


def largest_eigenvalue(A: sp.spmatrix, steps: int = LANCZOS_STEPS) -> float:
    """A Lanczos estimate (from below) of the largest eigenvalue of D^-1 A.

    D^-1 A has the eigenvalues of the symmetric D^-1/2 A D^-1/2, on which the Lanczos
    recurrence runs from a seeded random start (Saad 2003, Iterative Methods for Sparse
    Linear Systems, section 6.6, from memory).

    Parameters
    ----------
    A : sparse matrix, (n, n)
        Symmetric with a positive diagonal.
    steps : int

    Returns
    -------
    float
    """
    scale = 1.0 / np.sqrt(A.diagonal())
    v = np.random.default_rng(SETUP_SEED).random(A.shape[0])
    v /= np.linalg.norm(v)
    previous, beta = np.zeros_like(v), 0.0
    alphas, betas = [], []
    for _ in range(min(steps, A.shape[0])):
        w = scale * (A @ (scale * v)) - beta * previous
        alphas.append(w @ v)
        w -= alphas[-1] * v
        beta = float(np.linalg.norm(w))
        if beta <= 1e-12 * abs(alphas[-1]):
            break
        betas.append(beta)
        previous, v = v, w / beta
    k = len(alphas)
    tridiagonal = np.diag(alphas) + np.diag(betas[:k - 1], 1) + np.diag(betas[:k - 1], -1)
    return float(np.linalg.eigvalsh(tridiagonal).max())


class MultigridCycle(spla.LinearOperator):
    """One multigrid cycle of a smoothed-aggregation hierarchy, as a preconditioner (``M @ b``).

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
    precision : numpy dtype
        Of the cycle's arithmetic and of the levels it keeps.
    visits : int
        Coarse-grid corrections per visit of the second level.

    Attributes
    ----------
    operators, prolongators, restrictors : list of scipy.sparse.csr_matrix
        The hierarchy in the cycle's precision: A_l, P_l and R_l = P_l^T.
    """

    def __init__(self, matrix, near_null: np.ndarray | None = None, precision=CYCLE_PRECISION,
                 visits: int = SECOND_LEVEL_VISITS):
        self._set_levels(*aggregation_hierarchy(matrix, near_null), precision, visits)

    @classmethod
    def from_levels(cls, operators, prolongators, restrictors, precision=CYCLE_PRECISION,
                    visits: int = SECOND_LEVEL_VISITS) -> "MultigridCycle":
        """The cycle of a hierarchy given level by level, without a set-up.

        Parameters
        ----------
        operators : list of sparse matrix
            The operator of each level, finest first.
        prolongators, restrictors : list of sparse matrix
            Between each level and the next: P_l, (n_l, n_{l+1}), and R_l = P_l^T.
        precision : numpy dtype
        visits : int

        Returns
        -------
        MultigridCycle
        """
        cycle = cls.__new__(cls)
        cycle._set_levels(operators, prolongators, restrictors, precision, visits)
        return cycle

    def _set_levels(self, operators, prolongators, restrictors, precision, visits: int) -> None:
        """Keep the levels in CSR in the cycle's precision (no copy of those already in it)
        and a buffer set per level; invert the coarsest and set up the line smoother."""
        self.precision = np.dtype(precision)
        self.visits = visits
        coarsest = sp.csr_matrix(operators[-1]).toarray().astype(np.float64)  # inverted in double precision
        self._coarsest = np.linalg.pinv(coarsest).astype(self.precision)
        self.operators = [_sorted(_in_precision(A, self.precision)) for A in operators]
        self.prolongators = [_in_precision(P, self.precision) for P in prolongators]
        self.restrictors = [_in_precision(R, self.precision) for R in restrictors]
        self.line_smoother = LineSmoother(self.operators[0])
        # Per level: the iterate, the right-hand side and the residual. One set serves every
        # visit (a level's visits follow each other), so a cycle object serves one solve at a time.
        sizes = [A.shape[0] for A in self.operators]
        self._x, self._b, self._r = ([np.zeros(n, dtype=self.precision) for n in sizes] for _ in range(3))
        spla.LinearOperator.__init__(self, dtype=np.float64, shape=self.operators[0].shape)

    def apply(self, b: np.ndarray, out: np.ndarray) -> None:
        """One cycle from x = 0 for ``b``, written into ``out``.

        Parameters
        ----------
        b : ndarray, (n,)
        out : ndarray, (n,)
            Overwritten.
        """
        np.copyto(self._b[0], b, casting="same_kind")
        self._cycle(0)
        np.copyto(out, self._x[0])

    def _matvec(self, b):
        """One cycle from x = 0 for ``b``."""
        out = np.empty(self.shape[0])
        self.apply(np.asarray(b).ravel(), out)
        return out

    def _rmatvec(self, b):
        """The same: the cycle is symmetric."""
        return self._matvec(b)  # symmetric

    def _cycle(self, level: int) -> None:
        """The cycle's approximate solution of level ``level``'s system for its right-hand
        side buffer, into its iterate buffer (exact on the coarsest level)."""
        x, b = self._x[level], self._b[level]
        if level == len(self.operators) - 1:
            np.dot(self._coarsest, b, out=x)
            return
        x[:] = 0
        sweeps = 1 if level == 0 else COARSE_SWEEPS
        visits = self.visits if level == 1 else 1
        for _ in range(sweeps):
            self._smooth(level, forward=True)
        for _ in range(visits):
            residual_into(self.operators[level], x, b, self._r[level])
            product_into(self.restrictors[level], self._r[level], self._b[level + 1])
            self._cycle(level + 1)
            add_product_into(self.prolongators[level], self._x[level + 1], x)
        for _ in range(sweeps):
            self._smooth(level, forward=False)

    def _smooth(self, level: int, forward: bool) -> None:
        """One sweep in place on ``level``: line Gauss-Seidel on the finest, point Gauss-Seidel below."""
        if level == 0:
            self.line_smoother.sweep(self._x[0], self._b[0], forward)
        else:
            _gauss_seidel(self.operators[level], self._x[level], self._b[level], forward)


class ShiftedCycles:
    """Multigrid cycles for every matrix of the family K + diag(storage) / dt, one set-up for all.

    The aggregates and prolongators come from one smoothed-aggregation set-up
    (:func:`aggregation_hierarchy`) of the first member, K + diag(storage) / dt; each level
    keeps its Galerkin stiffness K_l = R_l K_{l-1} P_l and storage S_l = R_l S_{l-1} P_l, so
    a member's levels are exactly K_l + S_l / dt for any step dt. Both are held on one
    sorted pattern per level, so a member costs a sum of value arrays per level instead of
    a new set-up.

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
        _, prolongators, restrictors = aggregation_hierarchy(stiffness + sp.diags(storage / dt))
        stiffnesses, storages = [stiffness], [sp.diags(storage).tocsr()]
        # K_l is made on its own, not as the set-up's level minus S_l / dt: at the first (the
        # smallest) step the storage term dominates, and the difference would cancel
        for P, R in zip(prolongators, restrictors):
            stiffnesses.append((R @ stiffnesses[-1] @ P).tocsr())
            storages.append((R @ storages[-1] @ P).tocsr())
        # each level's K_l and S_l on one sorted pattern, so that a member's level is a sum
        # of two value arrays (no sparse sum, no sort per step)
        self._patterns = [_common_pattern(K, S) for K, S in zip(stiffnesses, storages)]
        # only the transfers in the cycles' precision are kept, made once for every member
        self._transfers = ([_in_precision(P, CYCLE_PRECISION) for P in prolongators],
                           [_in_precision(R, CYCLE_PRECISION) for R in restrictors])

    def levels(self, dt: float, precision=np.float64) -> list:
        """The member's level operators K_l + S_l / dt, finest first.

        Parameters
        ----------
        dt : float
            > 0, in the unit of the storage's time.
        precision : numpy dtype
            The operators' value type.

        Returns
        -------
        list of scipy.sparse.csr_matrix
        """
        operators = []
        for indptr, indices, k, s in self._patterns:
            level = sp.csr_matrix(((k + s / dt).astype(precision), indices, indptr), shape=(indptr.size - 1,) * 2)
            level.has_sorted_indices = True
            operators.append(level)
        return operators

    def cycle(self, dt: float) -> MultigridCycle:
        """The cycle of K + diag(storage) / dt.

        Parameters
        ----------
        dt : float
            > 0, in the unit of the storage's time.

        Returns
        -------
        MultigridCycle
        """
        # each level made in the cycles' precision at once, so that no second full set is held
        return MultigridCycle.from_levels(self.levels(dt, CYCLE_PRECISION), *self._transfers,
                                          visits=STEP_SECOND_LEVEL_VISITS)


def _common_pattern(A: sp.spmatrix, B: sp.spmatrix):
    """Two matrices of one shape on the union of their patterns, sorted: (indptr, indices,
    A's values, B's values), with A + B = csr((A's + B's values, indices, indptr)).

    Where B's pattern lies within A's (a stiffness and its diagonal or Galerkin storage),
    B's values are placed on A's pattern by a search of sorted entry keys; else both are
    summed onto the union."""
    A, B = _canonical(A), sp.csr_matrix(B)
    keys_a, keys_b = _entry_keys(A), _entry_keys(B)
    at = np.minimum(np.searchsorted(keys_a, keys_b), max(keys_a.size - 1, 0))
    if keys_a.size and np.array_equal(keys_a[at], keys_b):  # B's entries need no order
        return A.indptr, A.indices, A.data.astype(float), np.bincount(at, weights=B.data, minlength=A.nnz)
    A, B = A.tocoo(), B.tocoo()
    rows, columns = np.concatenate([A.row, B.row]), np.concatenate([A.col, B.col])
    zeros_a, zeros_b = np.zeros(A.nnz), np.zeros(B.nnz)
    on_pattern = [sp.csr_matrix((np.concatenate(values), (rows, columns)), shape=A.shape)
                  for values in ((A.data, zeros_b), (zeros_a, B.data))]
    for M in on_pattern:  # the same coordinates summed and sorted alike: one pattern
        M.sum_duplicates()
    return on_pattern[0].indptr, on_pattern[0].indices, on_pattern[0].data, on_pattern[1].data


def _canonical(M: sp.spmatrix) -> sp.csr_matrix:
    """M in CSR with sorted indices and no duplicates (a copy only where needed)."""
    M = sp.csr_matrix(M)
    if not M.has_canonical_format:
        M = M.copy()
        M.sum_duplicates()
    return M


def _entry_keys(M: sp.csr_matrix) -> np.ndarray:
    """row * n + column of every stored entry of a CSR matrix (increasing if it is canonical)."""
    rows = np.repeat(np.arange(M.shape[0], dtype=np.int64), np.diff(M.indptr))
    return rows * M.shape[1] + M.indices


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
        Its precision is the sweep's.

    Attributes
    ----------
    starts : ndarray of int64
        First row of each line, and n.
    rest : scipy.sparse.csr_matrix
        The matrix without the couplings inside each line (nor the diagonal).
    lower, upper : ndarray, (n,)
        Each line's bands: row i's coupling to row i - 1 and to row i + 1 (0 across lines).
    factors : dict
        For each direction (``forward`` True or False), the elimination factors and inverse
        pivots of each line's tridiagonal system (Thomas algorithm) eliminated in that
        direction: top-down for the forward sweep, bottom-up for the reverse one, so that
        each sweep reads the rows in its own order.
    """

    def __init__(self, A: sp.csr_matrix):
        A = sp.csr_matrix(A)
        A.sort_indices()
        n = A.shape[0]
        with first_call(_line_starts):
            self.starts = _line_starts(A.indptr, A.indices, A.data, n)
        with first_call(_split_rows):
            self.lower, self.upper, indptr, indices, data = _split_rows(A.indptr, A.indices, A.data, self.starts)
        with first_call(_thomas_factors):
            self.factors = {forward: _thomas_factors(self.lower, A.diagonal(), self.upper, self.starts, forward)
                            for forward in (True, False)}
        self.rest = sp.csr_matrix((data, indices, indptr), shape=A.shape)

    def sweep(self, x: np.ndarray, b: np.ndarray, forward: bool) -> None:
        """One sweep in place, lines in order (``forward``) or in reverse.

        The two are each other's adjoint, which keeps the cycle symmetric.

        Parameters
        ----------
        x : ndarray, (n,)
            The iterate, updated in place.
        b : ndarray, (n,)
        forward : bool
        """
        R = self.rest
        factor, inverse_pivot = self.factors[forward]
        band = self.upper if forward else self.lower  # the coupling to the row substituted before
        with first_call(_line_sweep):
            _line_sweep(unsigned(R.indptr), unsigned(R.indices), R.data, factor, band, inverse_pivot,
                        self.starts, x, b, forward)


@njit(cache=True)
def _line_starts(indptr, indices, data, n):
    """First row of each line, and n: row i + 1 continues row i's line if the two are coupled,
    and a line is split again at the later row of any pair inside it coupled further apart
    (splitting only refines, so one pass separates every pair)."""
    new_line = np.ones(n, dtype=np.bool_)
    for i in range(n):
        for p in range(indptr[i], indptr[i + 1]):
            if indices[p] == i + 1 and data[p] != 0:
                new_line[i + 1] = False
    line = np.cumsum(new_line) - 1
    split = new_line.copy()
    for i in range(n):
        for p in range(indptr[i], indptr[i + 1]):
            j = indices[p]
            if data[p] != 0 and abs(j - i) > 1 and line[j] == line[i]:
                split[max(i, j)] = True
    return np.append(np.flatnonzero(split), n).astype(np.int64)


@njit(cache=True)
def _split_rows(indptr, indices, data, starts):
    """Each line's lower and upper band, and the rest of the matrix (CSR, without them, the
    diagonal or zeros)."""
    n = indptr.size - 1
    lower = np.zeros(n, dtype=data.dtype)
    upper = np.zeros(n, dtype=data.dtype)
    first = np.empty(n, dtype=np.int64)  # first row of each row's line
    for line in range(starts.size - 1):
        first[starts[line]:starts[line + 1]] = starts[line]
    rest_indptr = np.zeros(n + 1, dtype=indptr.dtype)
    rest_indices = np.empty(indices.size, dtype=indices.dtype)
    rest_data = np.empty(data.size, dtype=data.dtype)
    count = 0
    for i in range(n):
        for p in range(indptr[i], indptr[i + 1]):
            j, value = indices[p], data[p]
            if j == i or value == 0:
                continue
            if j == i + 1 and first[j] == first[i]:
                upper[i] = value
            elif j == i - 1 and first[j] == first[i]:
                lower[i] = value
            else:
                rest_indices[count] = j
                rest_data[count] = value
                count += 1
        rest_indptr[i + 1] = count
    return lower, upper, rest_indptr, rest_indices[:count].copy(), rest_data[:count].copy()


@njit(cache=True)
def _thomas_factors(lower, diagonal, upper, starts, forward):
    """Per line [s, e), eliminated top-down (``forward``) or bottom-up: each row's
    elimination factor (its coupling to the row eliminated before it over that row's pivot)
    and inverse pivot."""
    factor = np.zeros_like(diagonal)
    inverse_pivot = np.empty_like(diagonal)
    for line in range(starts.size - 1):
        s, e = starts[line], starts[line + 1]
        first = s if forward else e - 1
        pivot = diagonal[first]
        inverse_pivot[first] = 1.0 / pivot
        for k in range(1, e - s):
            i = s + k if forward else e - 1 - k
            before = i - 1 if forward else i + 1
            factor[i] = (lower[i] if forward else upper[i]) / pivot
            pivot = diagonal[i] - factor[i] * (upper[before] if forward else lower[before])
            inverse_pivot[i] = 1.0 / pivot
    return factor, inverse_pivot


@njit(cache=True)
def _line_sweep(indptr, indices, data, factor, band, inverse_pivot, starts, x, b, forward):
    """One line Gauss-Seidel sweep in place: each line solved exactly with the rest of its rows
    (the CSR matrix indptr, indices, data) on the right-hand side. Forward: lines in order,
    each eliminated top-down and substituted bottom-up (``band`` the upper one); reverse:
    everything the other way (``band`` the lower one)."""
    lines = starts.size - 1
    zero = np.zeros(1, dtype=x.dtype)[0]  # 0 in the sweep's precision, so that it stays in it
    for step in range(lines):
        line = step if forward else lines - 1 - step
        s, e = starts[line], starts[line + 1]
        previous = zero
        for k in range(e - s):  # right-hand side and elimination, kept in x
            i = s + k if forward else e - 1 - k
            r = b[i]
            for p in range(indptr[i], indptr[i + 1]):
                r -= data[p] * x[indices[p]]
            previous = r - factor[i] * previous
            x[i] = previous
        following = zero
        for k in range(e - s):  # substitution
            i = e - 1 - k if forward else s + k
            following = (x[i] - band[i] * following) * inverse_pivot[i]
            x[i] = following


def _in_precision(A, precision) -> sp.csr_matrix:
    """A in CSR with values of ``precision``: A itself if it already is."""
    A = sp.csr_matrix(A)
    return A if A.dtype == precision else A.astype(precision)


def _sorted(A: sp.csr_matrix) -> sp.csr_matrix:
    """A with its column indices sorted within each row, in place."""
    A.sort_indices()
    return A


def _gauss_seidel(A: sp.csr_matrix, x: np.ndarray, b: np.ndarray, forward: bool) -> None:
    """One Gauss-Seidel sweep on ``A x = b`` in place, rows in order or in reverse."""
    from pyamg import amg_core

    n = A.shape[0]
    start, stop, step = (0, n, 1) if forward else (n - 1, -1, -1)
    amg_core.gauss_seidel(A.indptr, A.indices, A.data, x, b, start, stop, step)
