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
side in the last axis so that every inner loop runs over lanes (SIMD).

A second, leading system on the first ``lead`` band positions (a sealed block inside the
face problem after it) can be solved in the same pass (:func:`solve_assembled`): the same
couplings among those unknowns, its own diagonal and right-hand sides. Where both
diagonals agree on the first lead - w positions of every lane of a group, the elimination
of those rows is done once for both systems; otherwise the leading system is factored on
its own. When only its rates sum(outflow * x) are wanted, the outflow weights sit on its
last w band positions only and both right-hand sides agree before them, the leading
system is solved on those positions alone: its elimination shared, the forward solve of
the first rows shared too, and its residual that of the small system left on those
positions. That short cut is kept where the whole system's first solve met the tolerance
and so does the small system's; otherwise (very high contrasts) the leading system is
solved whole and refined.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from .._runtime import first_call

LANES = 8  # systems factored side by side in SIMD lanes


@njit(cache=True, fastmath=True)
def _factor(c, ok, start, stop):  # pragma: no cover - compiled
    """Cholesky steps for rows start..stop-1 of LANES banded systems at once (rows before
    ``start`` already eliminated); c (n, w + 1, LANES); ok (LANES,) cleared where a pivot
    is not positive (that lane's pivot is then set to 1 to go on)."""
    n, w1, lanes = c.shape
    w = w1 - 1
    inverse = np.empty(lanes)
    for j in range(start, stop):
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
def _assemble(c, d, band_first, band_second, v):  # pragma: no cover - compiled
    """Lower band c (n, w + 1, LANES) of the systems with diagonal d (n, LANES) and
    couplings -v (E, LANES) between band positions band_first[e], band_second[e];
    couplings reaching past the band's n rows are left out (a leading system)."""
    n = c.shape[0]
    for j in range(n):
        for l in range(c.shape[2]):
            c[j, 0, l] = d[j, l]
    for e in range(band_first.shape[0]):
        p = band_first[e]
        q = band_second[e]
        if p == q or p >= n or q >= n:
            continue
        lo = min(p, q)
        for l in range(c.shape[2]):
            c[lo, max(p, q) - lo, l] -= v[e, l]


@njit(cache=True, fastmath=True)
def _forward(head, tail, split, x, start, stop):  # pragma: no cover - compiled
    """Rows start..stop-1 of the forward solve L y = x in place, x (n, LANES), rows before
    ``start`` done; right-looking, so the later rows already hold what those rows take
    off them. The factor's rows below ``split`` are those of ``head``, the others those of
    ``tail`` (from its row 0)."""
    n, lanes = x.shape
    w = head.shape[1] - 1
    for j in range(start, stop):
        c = head[j] if j < split else tail[j - split]
        for l in range(lanes):
            x[j, l] /= c[0, l]
        for t in range(1, min(w, n - 1 - j) + 1):
            for l in range(lanes):
                x[j + t, l] -= c[t, l] * x[j, l]


@njit(cache=True, fastmath=True)
def _backward(head, tail, split, x):  # pragma: no cover - compiled
    """The backward solve L^T x = y in place, x (n, LANES) (factor rows as in :func:`_forward`)."""
    n, lanes = x.shape
    w = head.shape[1] - 1
    s = np.empty(lanes)
    for j in range(n - 1, -1, -1):
        c = head[j] if j < split else tail[j - split]
        for l in range(lanes):
            s[l] = x[j, l]
        for t in range(1, min(w, n - 1 - j) + 1):
            for l in range(lanes):
                s[l] -= c[t, l] * x[j + t, l]
        for l in range(lanes):
            x[j, l] = s[l] / c[0, l]


@njit(cache=True, fastmath=True)
def _substitute(head, tail, split, x):  # pragma: no cover - compiled
    """Overwrite x (n, LANES) with the solutions of L L^T y = x, lane by lane (factor rows
    as in :func:`_forward`)."""
    _forward(head, tail, split, x, 0, x.shape[0])
    _backward(head, tail, split, x)


@njit(cache=True, fastmath=True)
def _residual(diagonal, first, second, values, x, b, r):  # pragma: no cover - compiled
    """r = b - A x for LANES systems given by their coupling list: diagonal (n, LANES),
    couplings ``-values`` (E, LANES) between unknowns first[e] and second[e]; x, b, r (n, LANES).
    Couplings reaching unknowns n and beyond are left out (a leading system)."""
    n, lanes = x.shape
    for j in range(n):
        for l in range(lanes):
            r[j, l] = b[j, l] - diagonal[j, l] * x[j, l]
    for e in range(first.shape[0]):
        p = first[e]
        q = second[e]
        if p == q or p >= n or q >= n:
            continue
        for l in range(lanes):
            r[p, l] += values[e, l] * x[q, l]
            r[q, l] += values[e, l] * x[p, l]


@njit(cache=True, fastmath=True)
def _band_residual(m, x, b, r):  # pragma: no cover - compiled
    """r = b - M x for LANES symmetric systems held as lower bands m (n, w + 1, LANES)
    (entries reaching past row n are left out); x, b, r (n, LANES)."""
    n, lanes = x.shape
    w = m.shape[1] - 1
    r[:] = b
    for j in range(n):
        for l in range(lanes):
            r[j, l] -= m[j, 0, l] * x[j, l]
        for t in range(1, min(w, n - 1 - j) + 1):
            for l in range(lanes):
                r[j + t, l] -= m[j, t, l] * x[j, l]
                r[j, l] -= m[j, t, l] * x[j + t, l]


@njit(cache=True, fastmath=True)
def _relative(r, b):  # pragma: no cover - compiled
    """||r|| / ||b|| per lane (||r|| where b is 0)."""
    scale = np.sqrt(np.sum(b * b, axis=0))
    return np.sqrt(np.sum(r * r, axis=0)) / np.where(scale > 0.0, scale, 1.0)


@njit(cache=True, fastmath=True)
def _refine(head, tail, split, d, band_first, band_second, v, b, y, r, refinements,
            tolerance):  # pragma: no cover - compiled
    """Refine a first solution y (n, LANES) of the factored systems (factor rows as in
    :func:`_forward`) for right-hand sides b until the relative residual is at most
    ``tolerance`` (at most ``refinements`` times); returns it (LANES,) and the number of
    refinements made."""
    for attempt in range(refinements + 1):
        _residual(d, band_first, band_second, v, y, b, r)
        error = _relative(r, b)
        if error.max() <= tolerance or attempt == refinements:
            break
        _substitute(head, tail, split, r)
        y += r
    return error, attempt


@njit(cache=True, fastmath=True)
def _solve_refined(head, tail, split, d, band_first, band_second, v, b, y, r, refinements,
                   tolerance):  # pragma: no cover - compiled
    """Overwrite y (n, LANES) with the solution of the factored systems (factor rows as in
    :func:`_forward`) for right-hand sides b, refined until the relative residual is at
    most ``tolerance``; returns it (LANES,)."""
    y[:] = b
    _substitute(head, tail, split, y)
    return _refine(head, tail, split, d, band_first, band_second, v, b, y, r, refinements, tolerance)[0]


@njit(cache=True)
def _rows_agree(a, b, rows):  # pragma: no cover - compiled
    """Whether a (., LANES) and b (., LANES) are equal on their first ``rows`` rows in every lane."""
    agree = True
    for j in range(rows):
        for l in range(LANES):
            if a[j, l] != b[j, l]:
                agree = False
    return agree


@njit(cache=True)
def _rows_zero(a, rows):  # pragma: no cover - compiled
    """Whether a (., LANES) is 0 on its first ``rows`` rows in every lane."""
    zero = True
    for j in range(rows):
        for l in range(LANES):
            if a[j, l] != 0.0:
                zero = False
    return zero


@njit(cache=True)
def _max_ignoring_nan(values):  # pragma: no cover - compiled
    """The largest of ``values``, NaN skipped (-inf if all are NaN), as the parallel
    reduction of ``values.max()`` inside a ``prange`` loop gives it."""
    largest = -np.inf
    for value in values:
        if value > largest:
            largest = value
    return largest


@njit(cache=True)
def _band_pairs(first, second, position):  # pragma: no cover - compiled
    """The band positions of the coupled unknowns first[e], second[e] (E,) each."""
    band_first = np.empty(first.shape[0], dtype=np.int64)
    band_second = np.empty(first.shape[0], dtype=np.int64)
    for e in range(first.shape[0]):
        band_first[e] = position[first[e]]
        band_second[e] = position[second[e]]
    return band_first, band_second


@njit(cache=True)
def _lane_sources(base, nb):  # pragma: no cover - compiled
    """The system of each lane of the group from ``base`` on (LANES,): spare lanes of a last,
    incomplete group repeat the batch's last system."""
    source = np.empty(LANES, dtype=np.int64)
    for l in range(LANES):
        source[l] = min(base + l, nb - 1)
    return source


@njit(cache=True)
def _gather_diagonals(source, position, diagonal, lead_index, lead_diagonal, lead_outflow):  # pragma: no cover
    """The lanes' diagonals in band order, d (n, LANES), the leading system's d_lead
    (lead, LANES) and its outflow weights (lead, LANES), or (0, LANES) without rates."""
    n, lead = position.shape[0], lead_diagonal.shape[1]
    rates = lead_outflow.shape[1] > 0
    d = np.empty((n, LANES))
    d_lead = np.empty((lead, LANES))
    outflow = np.zeros((lead if rates else 0, LANES))
    for i in range(n):
        j = position[i]
        for l in range(LANES):
            d[j, l] = diagonal[source[l], i]
            if j < lead:
                d_lead[j, l] = lead_diagonal[source[l], lead_index[i]]
                if rates:
                    outflow[j, l] = lead_outflow[source[l], lead_index[i]]
    return d, d_lead, outflow


@njit(cache=True)
def _gather_values(source, values, edges):  # pragma: no cover - compiled
    """The lanes' coupling values v (E, LANES)."""
    v = np.empty((edges, LANES))
    for e in range(edges):
        for l in range(LANES):
            v[e, l] = values[source[l], e]
    return v


@njit(cache=True)
def _gather_rhs(source, k, position, rhs, lead_index, lead_rhs, b, b_lead):  # pragma: no cover - compiled
    """Right-hand side k of the lanes in band order into b (n, LANES) and b_lead (lead, LANES)."""
    lead = b_lead.shape[0]
    for i in range(position.shape[0]):
        j = position[i]
        for l in range(LANES):
            b[j, l] = rhs[source[l], k, i]
            if j < lead:
                b_lead[j, l] = lead_rhs[source[l], k, lead_index[i]]


@njit(cache=True)
def _factor_shared(c, d, d_lead, split, keep_tail, lane_ok):  # pragma: no cover - compiled
    """Factor the assembled band c and the leading system, whose diagonal d_lead agrees with
    d below ``split``: those rows are eliminated once. Returns the leading factor (head c,
    split, its own last rows) and its last rows before factoring (a copy with ``keep_tail``,
    for the short cut's residual)."""
    lead = d_lead.shape[0]
    _factor(c, lane_ok, 0, split)
    lead_tail = c[split:lead].copy()
    for j in range(split, lead):
        for l in range(LANES):
            lead_tail[j - split, 0, l] += d_lead[j, l] - d[j, l]
    tail_matrix = lead_tail.copy() if keep_tail else lead_tail
    _factor(lead_tail, lane_ok, 0, lead - split)
    _factor(c, lane_ok, split, c.shape[0])
    return c, split, lead_tail, tail_matrix


@njit(cache=True)
def _factor_apart(c, d_lead, band_first, band_second, v, lane_ok):  # pragma: no cover - compiled
    """Factor the assembled band c, and assemble and factor the leading system on its own;
    returns the leading factor (head, split, tail: the head holds it all) and the tail again."""
    lead = d_lead.shape[0]
    lead_head = np.zeros((lead, c.shape[1], LANES))
    lead_tail = lead_head[lead:]
    if lead > 0:
        _assemble(lead_head, d_lead, band_first, band_second, v)
        _factor(lead_head, lane_ok, 0, lead)
    _factor(c, lane_ok, 0, c.shape[0])
    return lead_head, lead, lead_tail, lead_tail


@njit(cache=True)
def _factor_group(d, d_lead, outflow, v, band_first, band_second, width, rates):  # pragma: no cover - compiled
    """Assemble and factor a group's whole systems and leading ones. Returns the band
    factor c (n, width + 1, LANES), the positive-definite flags (LANES,), whether the short
    cut may be tried and the leading factor (head, split, tail, tail before factoring)."""
    n, lead = d.shape[0], d_lead.shape[0]
    split = max(lead - width, 0)
    c = np.zeros((n, width + 1, LANES))
    _assemble(c, d, band_first, band_second, v)
    lane_ok = np.ones(LANES, dtype=np.bool_)
    shared = lead > 0 and _rows_agree(d_lead, d, split)
    tail_only = shared and rates and _rows_zero(outflow, split)
    if shared:
        factor_lead = _factor_shared(c, d, d_lead, split, tail_only, lane_ok)
    else:
        factor_lead = _factor_apart(c, d_lead, band_first, band_second, v, lane_ok)
    return c, lane_ok, tail_only, factor_lead


@njit(cache=True)
def _short_cut(c, d, band_first, band_second, v, lead_tail, tail_matrix, split, b, y, r, b_lead, y_lead, r_lead,
               refinements, tolerance):  # pragma: no cover - compiled
    """Solve the whole systems into y and, from their shared forward solve, the leading
    ones on their last rows only (y_lead from ``split`` on). Returns the relative residuals
    of both (LANES,) and whether the leading rows can be trusted."""
    n, lead = c.shape[0], y_lead.shape[0]
    y[:] = b
    _forward(c, c[n:], n, y, 0, split)
    z = y[split:lead] + b_lead[split:lead] - b[split:lead]
    _forward(c, c[n:], n, y, split, n)
    _backward(c, c[n:], n, y)
    error, refined = _refine(c, c[n:], n, d, band_first, band_second, v, b, y, r, refinements, tolerance)
    p_tail = z.copy()
    _substitute(lead_tail, lead_tail, lead - split, p_tail)
    _band_residual(tail_matrix, p_tail, z, r_lead[split:lead])
    error_lead = _relative(r_lead[split:lead], z)
    y_lead[split:lead] = p_tail
    # Trusted only where the whole systems needed no refinement and the small one meets the tolerance.
    return error, error_lead, refined == 0 and _max_ignoring_nan(error_lead) <= tolerance


@njit(cache=True)
def _solve_rhs(c, d, d_lead, factor_lead, band_first, band_second, v, tail_only, b, y, r, b_lead, y_lead, r_lead,
               refinements, tolerance):  # pragma: no cover - compiled
    """Solve one right-hand side of a factored group into y (n, LANES) and y_lead (lead, LANES).
    Returns the relative residuals (LANES,) of both and the first row of y_lead set (the
    split where the short cut was kept, else 0)."""
    n, lead = c.shape[0], d_lead.shape[0]
    lead_head, lead_split, lead_tail, tail_matrix = factor_lead
    error_lead = np.zeros(LANES)
    tail_done = False
    if tail_only and _rows_agree(b_lead, b, lead_split):  # the short cut (its split is that of c's rows)
        error, error_lead, tail_done = _short_cut(c, d, band_first, band_second, v, lead_tail, tail_matrix,
                                                  lead_split, b, y, r, b_lead, y_lead, r_lead, refinements, tolerance)
    else:
        error = _solve_refined(c, c[n:], n, d, band_first, band_second, v, b, y, r, refinements, tolerance)
    if lead > 0 and not tail_done:
        error_lead = _solve_refined(lead_head, lead_tail, lead_split, d_lead, band_first, band_second, v, b_lead,
                                    y_lead, r_lead, refinements, tolerance)
    return error, error_lead, lead_split if tail_done else 0


@njit(cache=True)
def _store(base, k, position, lead_index, rates, lane_ok, error, error_lead, y, y_lead, x, relative, ok, x_lead,
           relative_lead):  # pragma: no cover - compiled
    """Write the group's solutions of right-hand side k (the leading ones without rates),
    residuals and flags into the batch's outputs, in the callers' numbering."""
    lead = y_lead.shape[0]
    for l in range(min(LANES, relative.shape[0] - base)):
        relative[base + l] = max(relative[base + l], error[l])
        relative_lead[base + l] = max(relative_lead[base + l], error_lead[l])
        ok[base + l] = lane_ok[l]
        for i in range(position.shape[0]):
            j = position[i]
            x[base + l, k, i] = y[j, l]
            if j < lead and not rates:
                x_lead[base + l, k, lead_index[i]] = y_lead[j, l]


@njit(cache=True)
def _store_rates(base, k, outflow, y_lead, start, rate_lead):  # pragma: no cover - compiled
    """Write the group's leading rates sum(outflow * y_lead) over rows start.. of right-hand side k."""
    for l in range(min(LANES, rate_lead.shape[0] - base)):
        total = 0.0
        for j in range(start, y_lead.shape[0]):
            total += outflow[j, l] * y_lead[j, l]
        rate_lead[base + l, k] = total


@njit(cache=True)
def _solve_group(base, band_first, band_second, position, values, diagonal, rhs, width, refinements, tolerance,
                 lead_index, lead_diagonal, lead_rhs, lead_outflow, x, relative, ok, x_lead, rate_lead,
                 relative_lead):  # pragma: no cover - compiled
    """Gather, factor and solve the LANES systems from ``base`` on and write their results
    into the batch's outputs x .. relative_lead (arguments as for :func:`solve_assembled`,
    with the couplings' band positions band_first, band_second)."""
    nb, m, n = rhs.shape
    lead = lead_diagonal.shape[1]
    rates = lead_outflow.shape[1] > 0
    # the lanes' systems in band order, assembled and factored once
    source = _lane_sources(base, nb)
    d, d_lead, outflow = _gather_diagonals(source, position, diagonal, lead_index, lead_diagonal, lead_outflow)
    v = _gather_values(source, values, band_first.shape[0])
    c, lane_ok, tail_only, factor_lead = _factor_group(d, d_lead, outflow, v, band_first, band_second, width, rates)
    # then each right-hand side: solved, refined and written out
    b, y, r = np.empty((n, LANES)), np.empty((n, LANES)), np.empty((n, LANES))
    b_lead, y_lead, r_lead = np.empty((lead, LANES)), np.empty((lead, LANES)), np.empty((lead, LANES))
    for k in range(m):
        _gather_rhs(source, k, position, rhs, lead_index, lead_rhs, b, b_lead)
        error, error_lead, lead_from = _solve_rhs(c, d, d_lead, factor_lead, band_first, band_second, v, tail_only,
                                                  b, y, r, b_lead, y_lead, r_lead, refinements, tolerance)
        _store(base, k, position, lead_index, rates, lane_ok, error, error_lead, y, y_lead, x, relative, ok,
               x_lead, relative_lead)
        if rates:
            _store_rates(base, k, outflow, y_lead, lead_from, rate_lead)


@njit(parallel=True, cache=True)
def solve_assembled(first, second, position, values, diagonal, rhs, width, refinements, tolerance,
                    lead_index, lead_diagonal, lead_rhs, lead_outflow):  # pragma: no cover - compiled
    """Assemble, factor and solve every system of a batch, LANES systems at a time.

    A last, incomplete lane group repeats the batch's last system in its spare lanes. The
    leading system (module notes) has ``lead`` = lead_diagonal.shape[1] unknowns, none if 0.

    Parameters
    ----------
    first, second : ndarray of int64, (E,)
        Coupled unknowns, in the callers' numbering.
    position : ndarray of int64, (n,)
        Band position of each unknown.
    values : ndarray, (nb, E)
        Coupling strengths (the matrix holds -value off the diagonal).
    diagonal : ndarray, (nb, n)
    rhs : ndarray, (nb, m, n)
    width : int
        Half bandwidth w.
    refinements : int
        Most refinement steps per solve.
    tolerance : float
        Refinement goes on while the relative residual is above it.
    lead_index : ndarray of int64, (n,)
        The leading system's own number of each unknown (read below ``lead`` band positions).
    lead_diagonal : ndarray, (nb, lead)
    lead_rhs : ndarray, (nb, m, lead)
        The leading system's diagonal and right-hand sides, in its own numbering.
    lead_outflow : ndarray, (nb, lead) or (nb, 0)
        Outflow weights when only the leading rates sum(outflow * x) are wanted, else (nb, 0).

    Returns
    -------
    x : ndarray, (nb, m, n)
    relative : ndarray, (nb,)
        Relative residual.
    ok : ndarray of bool, (nb,)
        Positive definite flag.
    x_lead : ndarray, (nb, m, lead)
        Leading solutions; (nb, m, 0) with outflow weights.
    rate_lead : ndarray, (nb, m)
        Leading rates (with outflow weights).
    relative_lead : ndarray, (nb,)
        Leading relative residual.
    """
    nb, m, n = rhs.shape
    lead = lead_diagonal.shape[1]
    rates = lead_outflow.shape[1] > 0
    x, rate_lead = np.zeros_like(rhs), np.zeros((nb, m))
    x_lead = np.zeros((nb if lead > 0 else 0, m, 0 if rates else lead))
    relative, relative_lead, ok = np.zeros(nb), np.zeros(nb), np.ones(nb, dtype=np.bool_)
    band_first, band_second = _band_pairs(first, second, position)  # the couplings in band positions
    for g in prange((nb + LANES - 1) // LANES):  # lane groups spread over the threads
        _solve_group(g * LANES, band_first, band_second, position, values, diagonal, rhs, width, refinements,
                     tolerance, lead_index, lead_diagonal, lead_rhs, lead_outflow, x, relative, ok, x_lead, rate_lead,
                     relative_lead)
    return x, relative, ok, x_lead, rate_lead, relative_lead


def _exact(array, dtype):
    """``array`` as a C-contiguous array of ``dtype`` (the kernel's exact signature)."""
    return np.ascontiguousarray(array, dtype=dtype)


def _run(first, second, position, values, diagonal, rhs, width, refinements, tolerance, lead_index, lead_diagonal,
         lead_rhs, lead_outflow):
    """Call the kernel with exact types; raise ``FloatingPointError`` if a system is not
    positive definite."""
    with first_call(solve_assembled):
        x, relative, ok, x_lead, rate_lead, relative_lead = solve_assembled(
            _exact(first, np.int64), _exact(second, np.int64), _exact(position, np.int64), _exact(values, float),
            _exact(diagonal, float), _exact(rhs, float), int(width), int(refinements), float(tolerance),
            _exact(lead_index, np.int64), _exact(lead_diagonal, float), _exact(lead_rhs, float),
            _exact(lead_outflow, float))
    if not ok.all():
        raise FloatingPointError(f"{int((~ok).sum())} local system(s) not positive definite")
    return x, relative, x_lead, rate_lead, relative_lead


def solve_batch(first: np.ndarray, second: np.ndarray, position: np.ndarray, values: np.ndarray,
                diagonal: np.ndarray, rhs: np.ndarray, width: int, refinements: int = 2,
                tolerance: float = 1e-12):
    """Checked wrapper of :func:`solve_assembled`: every system of a batch.

    Parameters
    ----------
    first, second, position, values, diagonal, rhs, width, refinements, tolerance
        As for :func:`solve_assembled`.

    Returns
    -------
    x : ndarray, (nb, m, n)
    relative : ndarray, (nb,)
        Relative residual.

    Raises
    ------
    FloatingPointError
        If a system is not positive definite.
    """
    nb, m, _ = rhs.shape
    x, relative, _, _, _ = _run(first, second, position, values, diagonal, rhs, width, refinements, tolerance,
                                np.zeros(0), np.zeros((nb, 0)), np.zeros((nb, m, 0)), np.zeros((nb, 0)))
    return x, relative


def solve_batch_with_lead(first: np.ndarray, second: np.ndarray, position: np.ndarray, values: np.ndarray,
                          diagonal: np.ndarray, rhs: np.ndarray, width: int, inside: np.ndarray,
                          lead_diagonal: np.ndarray, lead_rhs: np.ndarray, outflow: np.ndarray | None = None,
                          refinements: int = 2, tolerance: float = 1e-12):
    """:func:`solve_batch` plus a leading system (see :func:`solve_assembled`).

    Parameters
    ----------
    first, second, position, values, diagonal, rhs, width, refinements, tolerance
        As for :func:`solve_assembled`.
    inside : ndarray of int, (L,)
        The leading system's unknowns, which must be those at the first L band positions;
        the arrays below follow their order.
    lead_diagonal : ndarray, (nb, L)
    lead_rhs : ndarray, (nb, m, L)
    outflow : ndarray, (nb, L), optional
        Outflow weights: return the leading rates sum(outflow * x) instead of the solutions.

    Returns
    -------
    x : ndarray, (nb, m, n)
    relative : ndarray, (nb,)
        Relative residual.
    leading : ndarray
        Leading x (nb, m, L), or with ``outflow`` the leading rates (nb, m).
    relative_lead : ndarray, (nb,)
        The leading system's relative residual.

    Raises
    ------
    ValueError
        If ``inside`` are not the first band positions.
    FloatingPointError
        If a system is not positive definite.
    """
    inside = np.asarray(inside)
    if not 0 < inside.size <= diagonal.shape[1] or not np.array_equal(np.sort(position[inside]),
                                                                       np.arange(inside.size)):
        raise ValueError("the leading unknowns are not the first band positions")
    lead_index = np.full(diagonal.shape[1], -1)
    lead_index[inside] = np.arange(inside.size)
    weights = np.zeros((diagonal.shape[0], 0)) if outflow is None else outflow
    x, relative, x_lead, rate_lead, relative_lead = _run(first, second, position, values, diagonal, rhs, width,
                                                         refinements, tolerance, lead_index, lead_diagonal, lead_rhs,
                                                         weights)
    return x, relative, (x_lead if outflow is None else rate_lead), relative_lead
