"""Whole-model steady single-phase flow: assembly, solve, effective permeability.

For flow along one axis the two model faces normal to that axis are held at constant
pressure (1 at the low-index face, 0 at the high-index face, so the pressure drop is 1)
and all other sides are sealed (no flow). The two-point flux system is assembled from
face transmissibilities, solved, and the total rate Q turned into a whole-model
permeability

    k = Q L^2 / (V dP)

with L the model length along the axis (sum of dx, sum of dy, and for z the mean
thickness V / (Lx Ly)) and V the total bulk volume (inactive rock included: it takes
up room but carries no flow). Comparing the fine and coarse results shows how much the
upscaling changed the flow of the whole model; the per-layer flow shares and the
pressure differences show where.

Here the numerical core on plain numpy arrays (:func:`assemble_pressure_system`,
:func:`solve_pressure`, :func:`whole_model_permeability`); geometric transmissibilities
are in mD*m and pressures are dimensionless, so Q is in mD*m per unit pressure drop.
The comparison of a fine field with a coarse file: :mod:`upscale.checks.steady`.
"""

from __future__ import annotations

import logging
import math

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse.csgraph import connected_components

from .grid import AXES, GridArrays, axis_index
from .conjugate_gradients import conjugate_gradients
from .multigrid import MultigridCycle, scaled_near_null
from .two_point import check_faces, transmissibilities

log = logging.getLogger(__name__)


DIRECT_LIMIT = 20_000  # unknowns; beyond it AMG-CG (sparse LU fill grows fast on 3D grids)


#: Cell status in the pressure system (see :func:`cell_status`).
SOLVED, AT_LOW, AT_HIGH, ISOLATED = 0, 1, 2, 3


#: Relative in/out rate mismatch above which a warning is logged.
BALANCE_WARNING = 1e-6


def _check_faces(face_t, axis: int, boundary_t):
    """Validate face/boundary arrays; returns (shape, faces, t_low, t_high) as float arrays."""
    if len(face_t) != 3:
        raise ValueError(f"face_t needs three arrays (x, y, z faces), got {len(face_t)}")
    shape = list(np.shape(face_t[0]))
    if len(shape) != 3:
        raise ValueError(f"face transmissibilities must be three-dimensional, got shape {tuple(shape)}")
    shape[0] += 1
    shape = tuple(shape)
    faces = check_faces(face_t, shape)
    section = tuple(1 if i == axis else n for i, n in enumerate(shape))
    bounds = []
    for name, t in zip(("low", "high"), boundary_t):
        t = np.asarray(t, dtype=float)
        if t.size != math.prod(section):
            raise ValueError(f"{name} boundary transmissibilities have {t.size} values, expected "
                             f"{math.prod(section)} (one per cell of the face normal to {AXES[axis]})")
        t = t.reshape(section)
        if not np.all(np.isfinite(t)) or np.any(t < 0):
            raise ValueError(f"{name} boundary transmissibilities must be finite and >= 0")
        bounds.append(t)
    return shape, faces, bounds[0], bounds[1]


def _face_pairs(shape, faces):
    """Flat cell indices (first, second) and values of the faces with T > 0, all axes."""
    index = np.arange(math.prod(shape)).reshape(shape)
    first, second, value = [], [], []
    for a, f in enumerate(faces):
        n = shape[a]
        lo = np.take(index, np.arange(n - 1), axis=a)
        hi = np.take(index, np.arange(1, n), axis=a)
        keep = f > 0
        first.append(lo[keep])
        second.append(hi[keep])
        value.append(f[keep])
    return np.concatenate(first), np.concatenate(second), np.concatenate(value)


def _boundary_cells(shape, axis: int):
    """Flat indices of the cells on the low and high faces normal to ``axis``, face-shaped."""
    index = np.arange(math.prod(shape)).reshape(shape)
    n = shape[axis]
    return np.take(index, [0], axis=axis), np.take(index, [n - 1], axis=axis)


def cell_status(face_t, boundary_t, axis) -> np.ndarray:
    """Status of each cell: which cells the pressure system solves.

    Cells are grouped into connected components through faces with T > 0
    (``scipy.sparse.csgraph.connected_components``). A component connected to both
    constant-pressure faces is ``SOLVED``; one connected only to the low (high) face has the
    exact steady solution p = p_low (p_high) and is ``AT_LOW`` (``AT_HIGH``); one connected
    to neither (an isolated pocket, or a cell with no connection at all) has no defined
    pressure and is ``ISOLATED``.

    Parameters
    ----------
    face_t, boundary_t, axis
        As for :func:`assemble_pressure_system`.

    Returns
    -------
    ndarray of int8, (nx, ny, nz)
    """
    axis = axis_index(axis)
    shape, faces, t_low, t_high = _check_faces(face_t, axis, boundary_t)
    n = math.prod(shape)
    first, second, _ = _face_pairs(shape, faces)
    graph = sp.coo_matrix((np.ones(first.size), (first, second)), shape=(n, n)).tocsr()
    count, labels = connected_components(graph, directed=False)
    low_cells, high_cells = _boundary_cells(shape, axis)
    touches_low = np.zeros(count, dtype=bool)
    touches_high = np.zeros(count, dtype=bool)
    touches_low[labels[low_cells[t_low > 0]]] = True
    touches_high[labels[high_cells[t_high > 0]]] = True
    status = np.full(count, ISOLATED, dtype=np.int8)
    status[touches_low & touches_high] = SOLVED
    status[touches_low & ~touches_high] = AT_LOW
    status[~touches_low & touches_high] = AT_HIGH
    return status[labels].reshape(shape)


def assemble_pressure_system(face_t, boundary_t, axis, p_low: float = 1.0, p_high: float = 0.0,
                             return_status: bool = False):
    """Two-point flux pressure system for flow along ``axis``.

    Row i: sum_j T_ij (p_i - p_j) + T_b,i (p_i - p_b) = 0, so a constant-pressure face adds
    T_b to the diagonal and T_b p_b to ``b``; sealed sides add nothing. Unknowns are the
    cells in C order (``np.ravel_multi_index`` on (nx, ny, nz)). Cells that are not
    ``SOLVED`` (see :func:`cell_status`) get an identity row: components touching only one
    constant-pressure face are pinned to that face's pressure (their exact solution),
    isolated ones to 0. The matrix is therefore symmetric positive definite and non-singular.

    Parameters
    ----------
    face_t : sequence of three arrays
        Interior-face transmissibilities per axis, shapes (nx-1, ny, nz), (nx, ny-1, nz),
        (nx, ny, nz-1).
    boundary_t : (array_like, array_like)
        (t_low, t_high), the half-cell transmissibilities of the cells on the two faces
        normal to ``axis`` (shape of that face, with or without the length-1 axis).
    axis : int or str
    p_low, p_high : float
        The pressures of the two faces.
    return_status : bool
        Also return the status array.

    Returns
    -------
    A : scipy.sparse.csr_matrix, (n, n)
    b : ndarray, (n,)
    status : ndarray, (nx, ny, nz)
        With ``return_status`` only.
    """
    axis = axis_index(axis)
    shape, faces, t_low, t_high = _check_faces(face_t, axis, boundary_t)
    status = cell_status(faces, (t_low, t_high), axis).ravel()
    n = status.size
    solved = status == SOLVED
    first, second, value = _face_pairs(shape, faces)
    # Faces never join different components, so checking one side is enough.
    inner = solved[first]
    first, second, value = first[inner], second[inner], value[inner]
    low_cells, high_cells = (cells.ravel() for cells in _boundary_cells(shape, axis))
    diagonal = np.zeros(n)  # float even when no face is left (bincount would give int)
    for cells, weights in ((first, value), (second, value), (low_cells, t_low.ravel()), (high_cells, t_high.ravel())):
        diagonal += np.bincount(cells, weights=weights, minlength=n)
    diagonal[~solved] = 1.0
    rhs = _right_hand_side(status, low_cells, high_cells, t_low.ravel(), t_high.ravel(), p_low, p_high)
    cells = np.arange(n)
    matrix = sp.csr_matrix((np.concatenate([diagonal, -value, -value]),
                            (np.concatenate([cells, first, second]), np.concatenate([cells, second, first]))),
                           shape=(n, n))
    if return_status:
        return matrix, rhs, status.reshape(shape)
    return matrix, rhs


def _right_hand_side(status, low_cells, high_cells, t_low, t_high, p_low: float, p_high: float) -> np.ndarray:
    """T_b p_b on the cells of the constant-pressure faces; a pinned cell's own pressure."""
    n = status.size
    rhs = np.zeros(n)
    rhs += (np.bincount(low_cells, weights=t_low * p_low, minlength=n)
            + np.bincount(high_cells, weights=t_high * p_high, minlength=n))
    rhs[status == AT_LOW] = p_low
    rhs[status == AT_HIGH] = p_high
    rhs[status == ISOLATED] = 0.0
    return rhs


def _relative_residual(A, b, p) -> float:
    """||b - A p|| / ||b|| (0 if both are 0, inf if only b is)."""
    norm_b = np.linalg.norm(b)
    r = np.linalg.norm(b - A @ p)
    if norm_b == 0.0:
        return 0.0 if r == 0.0 else math.inf
    return float(r / norm_b)


def solve_pressure(A, b, tolerance: float = 1e-10, direct_limit: int = DIRECT_LIMIT):
    """Solve the symmetric positive definite system ``A p = b``.

    Rows with only a diagonal entry (pinned cells) are solved directly and removed. The rest
    is scaled symmetrically to unit diagonal, D^-1/2 A D^-1/2, which evens out permeability
    contrasts, then solved by sparse LU (SuperLU) when it has at most ``direct_limit``
    unknowns, otherwise by conjugate gradients preconditioned with a smoothed-aggregation
    multigrid cycle (:class:`upscale.core.multigrid.MultigridCycle`). Either way the true relative residual
    ||b - A p|| / ||b|| of the unscaled system is computed; the direct solve is refined and
    the iterative one restarted with a tighter tolerance (a few times at most) until it is
    <= ``tolerance``.

    Parameters
    ----------
    A : sparse matrix, (n, n)
    b : array_like, (n,)
    tolerance : float
    direct_limit : int

    Returns
    -------
    p : ndarray, (n,)
    info : dict
        'method' ('direct', 'amg-cg' or 'trivial'), 'relative_residual', 'iterations'
        (CG iterations, or refinement steps for the direct solve), 'unknowns', 'converged'.
    """
    A, b, diagonal = _checked_system(A, b)
    trivial = np.diff(A.indptr) <= 1  # only the diagonal (empty rows are excluded by the check)
    p = np.zeros(b.size)
    p[trivial] = b[trivial] / diagonal[trivial]
    keep = np.flatnonzero(~trivial)
    info = {"method": "trivial", "iterations": 0, "unknowns": int(keep.size)}
    if keep.size:
        p[keep], method, steps = _solve_rest(A, b, p, trivial, keep, tolerance, direct_limit)
        info.update(method=method, iterations=steps)
    info["relative_residual"] = _relative_residual(A, b, p)
    info["converged"] = bool(info["relative_residual"] <= tolerance)
    if not info["converged"]:
        log.warning("pressure solve (%s) reached a relative residual of %.2e, above %.0e",
                    info["method"], info["relative_residual"], tolerance)
    return p, info


def _checked_system(A, b):
    """A as a float CSR copy without duplicates or zeros, b as floats, and A's diagonal;
    ValueError for mismatched shapes or a diagonal that is not positive."""
    A = sp.csr_matrix(A, dtype=float, copy=True)
    A.sum_duplicates()
    A.eliminate_zeros()
    b = np.asarray(b, dtype=float)
    n = b.size
    if A.shape != (n, n):
        raise ValueError(f"matrix shape {A.shape} does not match right-hand side length {n}")
    diagonal = A.diagonal()
    if np.any(diagonal <= 0):
        raise ValueError("matrix has a zero or negative diagonal entry: not positive definite")
    return A, b, diagonal


def _solve_rest(A, b, p, trivial, keep, tolerance: float, direct_limit: int):
    """The solution on the rows ``keep`` given the ``trivial`` rows' values in p, the
    method ('direct' or 'amg-cg') and its steps."""
    if keep.size == b.size:  # nothing trivial (the common case): no copy of the matrix
        sub, rest = A, b
    else:
        rows = A[keep]
        sub = rows[:, keep]
        # Couplings between kept and trivial rows vanish only if A is symmetric: moved to the right-hand side.
        rest = b[keep] - rows[:, np.flatnonzero(trivial)] @ p[trivial]
    scaled, scale = unit_diagonal(sub)
    if keep.size <= direct_limit:
        x, steps = refined_direct(sub, symmetric_lu(scaled), scale, rest, tolerance)
        return x, "direct", steps
    x, steps = _amg_cg(sub, scaled, scale, rest, tolerance)
    return x, "amg-cg", steps


def unit_diagonal(A: sp.spmatrix) -> tuple[sp.csr_matrix, np.ndarray]:
    """The symmetric scaling D^-1/2 A D^-1/2 of a matrix with a positive diagonal.

    It evens out permeability contrasts before a solve.

    Parameters
    ----------
    A : sparse matrix, (n, n)

    Returns
    -------
    scaled : scipy.sparse.csr_matrix
    scale : ndarray, (n,)
        The factors D^-1/2.
    """
    scale = 1.0 / np.sqrt(A.diagonal())
    D = sp.diags(scale)
    return (D @ A @ D).tocsr(), scale


def symmetric_lu(scaled: sp.spmatrix):
    """Sparse LU (SuperLU) of a symmetric positive definite matrix.

    Symmetric mode (diagonal pivots, minimum degree on A^T + A) keeps the fill of a 3D grid
    several times smaller than SuperLU's default COLAMD ordering.

    Parameters
    ----------
    scaled : sparse matrix, (n, n)
        Best scaled to unit diagonal first (:func:`unit_diagonal`).

    Returns
    -------
    scipy.sparse.linalg.SuperLU
    """
    return spla.splu(sp.csc_matrix(scaled), permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                     options={"SymmetricMode": True})


def refined_direct(A, lu, scale: np.ndarray, b: np.ndarray, tolerance: float, refinements: int = 3):
    """Solve ``A p = b`` with the LU of its scaled form, refined.

    Parameters
    ----------
    A : sparse matrix, (n, n)
    lu : scipy.sparse.linalg.SuperLU
        Of the scaled matrix (:func:`unit_diagonal`, :func:`symmetric_lu`).
    scale : ndarray, (n,)
        The scaling factors D^-1/2.
    b : ndarray, (n,)
    tolerance : float
        Refined while the relative residual exceeds it ...
    refinements : int
        ... at most this many times.

    Returns
    -------
    p : ndarray, (n,)
    steps : int
        Refinement steps made.
    """
    p = scale * lu.solve(scale * b)
    for steps in range(refinements):  # a bounded loop: no residual can keep it going
        if _relative_residual(A, b, p) <= tolerance:
            return p, steps
        p += scale * lu.solve(scale * (b - A @ p))
    return p, refinements


def _amg_cg(A, scaled, scale, b, tolerance, restarts: int = 6, maxiter: int = 1000):
    """Solve ``A p = b`` by CG on the scaled system with a multigrid-cycle preconditioner, restarted
    until the unscaled relative residual is at most ``tolerance``; returns (p, CG iterations)."""
    M = MultigridCycle(scaled, near_null=scaled_near_null(scale))
    bs = scale * b
    y = np.zeros_like(bs)
    iterations = 0
    rtol = tolerance
    for _ in range(restarts):
        # The scaled and unscaled residual norms differ; restart from where we are with a
        # tolerance tightened by the shortfall until the true residual is small enough.
        y, steps = conjugate_gradients(scaled, bs, y, M, rtol, maxiter)
        iterations += steps
        reached = _relative_residual(A, b, scale * y)
        if reached <= tolerance:
            break
        scaled_reached = np.linalg.norm(bs - scaled @ y) / max(np.linalg.norm(bs), np.finfo(float).tiny)
        rtol = max(min(rtol, scaled_reached) * 0.5 * tolerance / reached, 1e-15)
    return scale * y, iterations


def _model_size(dx, dy, dz, axis: int):
    """(length along axis, total bulk volume), m and m3."""
    dx = np.asarray(dx, dtype=float)
    dy = np.asarray(dy, dtype=float)
    dz = np.broadcast_to(np.asarray(dz, dtype=float), (dx.size, dy.size, np.shape(dz)[-1]))
    volume = float(np.sum(dx[:, None, None] * dy[None, :, None] * dz))
    lx, ly = float(dx.sum()), float(dy.sum())
    length = (lx, ly, volume / (lx * ly))[axis]
    return length, volume


def whole_model_permeability(face_t, boundary_t, dx, dy, dz, axis, constant: float = 1.0,
                             tolerance: float = 1e-10, direct_limit: int = DIRECT_LIMIT) -> dict:
    """Whole-model permeability along ``axis`` with sealed sides and unit pressure drop.

    Parameters
    ----------
    face_t, boundary_t
        Interior-face transmissibilities per axis and (t_low, t_high), the half-cell
        transmissibilities of the cells on the two faces normal to ``axis``
        (see :func:`assemble_pressure_system`).
    dx, dy : ndarray, (nx,), (ny,)
        m.
    dz : ndarray, (nz,) or (nx, ny, nz)
        m.
    axis : int or str
    constant : float
        The factor that all the transmissibilities, faces and boundary alike, carry over
        mD*m (1 for geometric ones); 'k' is divided by it.
    tolerance, direct_limit
        As for :func:`solve_pressure`.

    Returns
    -------
    dict
        'k' (mD), 'rate' (inflow Q, in the units of the transmissibilities per unit
        pressure), 'rate_out' (outflow; equal to Q to round-off), 'imbalance'
        (|Q_in - Q_out| / max(|Q_in|, |Q_out|), 0 if both are 0), 'length' (m),
        'bulk_volume' (m3), 'pressure' ((nx, ny, nz), NaN in cells not connected to either
        constant-pressure face), 'status' (see :func:`cell_status`), 'face_flux' ((t_low
        flux, t_high flux) per cell of the two faces, inflow positive), 'solver' (info of
        :func:`solve_pressure`).
    """
    axis = axis_index(axis)
    shape, faces, t_low, t_high = _check_faces(face_t, axis, boundary_t)
    if not constant > 0:
        raise ValueError(f"transmissibility constant must be > 0, got {constant}")
    p_low, p_high = 1.0, 0.0
    A, b, status = assemble_pressure_system(faces, (t_low, t_high), axis, p_low, p_high, return_status=True)
    p, info = solve_pressure(A, b, tolerance=tolerance, direct_limit=direct_limit)
    p = p.reshape(shape)
    q_in, q_out, imbalance, face_flux = _face_rates(p, t_low, t_high, axis, p_low, p_high)
    length, volume = _model_size(dx, dy, dz, axis)
    if volume <= 0:
        raise ValueError("model bulk volume is zero")
    return {"k": q_in * length ** 2 / (volume * (p_low - p_high) * constant), "rate": q_in, "rate_out": q_out,
            "imbalance": imbalance, "length": length, "bulk_volume": volume,
            "pressure": np.where(status == ISOLATED, np.nan, p), "status": status, "face_flux": face_flux,
            "solver": info}


def _face_rates(p, t_low, t_high, axis: int, p_low: float, p_high: float) -> dict:
    """Inflow and outflow rates, their relative imbalance and the face fluxes (inflow, outflow)
    of :func:`whole_model_permeability`; logs a warning when the imbalance is above BALANCE_WARNING."""
    n = p.shape[axis]
    inflow = t_low * (p_low - np.take(p, [0], axis=axis))
    outflow = t_high * (np.take(p, [n - 1], axis=axis) - p_high)
    q_in, q_out = float(inflow.sum()), float(outflow.sum())
    largest = max(abs(q_in), abs(q_out))
    imbalance = abs(q_in - q_out) / largest if largest > 0 else 0.0
    if imbalance > BALANCE_WARNING:
        log.warning("flow along %s: inflow %.6g and outflow %.6g differ by %.2e (relative)",
                    AXES[axis], q_in, q_out, imbalance)
    return q_in, q_out, imbalance, (inflow, outflow)


def boundary_half(half: np.ndarray, axis: int):
    """The half-cell values of the cells on the low and high faces normal to ``axis``.

    Parameters
    ----------
    half : ndarray, (nx, ny, nz)
    axis : int

    Returns
    -------
    (ndarray, ndarray)
        Each with a length-1 ``axis``: the ``boundary_t`` of :func:`assemble_pressure_system`.
    """
    n = half.shape[axis]
    return np.take(half, [0], axis=axis), np.take(half, [n - 1], axis=axis)


def fine_model_check(cells: GridArrays, axis, tolerance: float = 1e-10, direct_limit: int = DIRECT_LIMIT) -> dict:
    """Whole-model flow check of a fine field along ``axis``.

    Transmissibilities are geometric (mD*m) two-point ones from ``cells.flow_permeability()``
    (:func:`upscale.core.two_point.transmissibilities`); the boundary half-cell
    transmissibilities are the per-cell half values of the face cells.

    Parameters
    ----------
    cells : GridArrays
    axis : int or str
    tolerance, direct_limit
        As for :func:`solve_pressure`.

    Returns
    -------
    dict
        That of :func:`whole_model_permeability` ('k' mD, 'rate' mD*m per unit pressure,
        'pressure', 'solver', ...).
    """
    axis = axis_index(axis)
    half, faces = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz, cells.pinch_connections)
    return whole_model_permeability(faces, boundary_half(half[axis], axis), cells.dx, cells.dy,
                                    cells.dz, axis, tolerance=tolerance, direct_limit=direct_limit)
