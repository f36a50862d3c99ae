"""Independent steady-flow references for the tests: the two-point flux scheme written
afresh with numpy and solved by SciPy's sparse direct solver (SuperLU).

Nothing here imports ``upscale``. The scheme is the textbook cell-centred two-point flux
approximation (Aziz & Settari 1979, Petroleum Reservoir Simulation, ch. 5, from memory):
a cell's half transmissibility along an axis is k A / (l / 2) = 2 k V / l^2, a face joins
two cells by the series pair h1 h2 / (h1 + h2), and a pressure held on a model face acts
through the half transmissibility of the cells on it. A cell of zero length (pinched,
dz = 0) has zero volume and so no transmissibility at all. Permeability in mD, lengths in
m, rates in mD*m per unit pressure drop.

With ``pinch=True`` the pinched cells are taken out instead (common practice for pinch-out
connections, no source): the real cells just above and below a run of them in a column are
joined directly, by the series pair of their vertical halves, and a pressure held on the
top (bottom) face acts on the first real cell from the top (bottom) of each column through
its own half. The pinched cells carry nothing and are left out of the solve.

Conventions of the block (or model) permeability, as the README defines it: k = Q L^2 / V
with L the sum of dx (dy) along x (y) and, along z, the mean thickness V / (Lx Ly), and V
the total bulk volume.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse.csgraph import connected_components


def cell_lengths(dx, dy, dz):
    """Cell lengths along x, y, z broadcast to the grid (nx, ny, nz); ``dz`` 1-D or 3-D."""
    dx, dy = np.asarray(dx, dtype=float), np.asarray(dy, dtype=float)
    dz = np.asarray(dz, dtype=float)
    if dz.ndim == 1:
        dz = np.broadcast_to(dz[None, None, :], (dx.size, dy.size, dz.size))
    return [np.broadcast_to(v, dz.shape).astype(float) for v in (dx[:, None, None], dy[None, :, None], dz)]


def half_transmissibilities(k, dx, dy, dz):
    """2 k V / l^2 per cell and axis (0 where l = 0); ``k`` three arrays (kx, ky, kz)."""
    lengths = cell_lengths(dx, dy, dz)
    volume = lengths[0] * lengths[1] * lengths[2]
    out = []
    for a in range(3):
        h = np.zeros(volume.shape)
        np.divide(2.0 * np.asarray(k[a], dtype=float) * volume, lengths[a] ** 2, out=h, where=lengths[a] > 0)
        out.append(h)
    return out


def _series(h1, h2):
    t = np.zeros(np.shape(h1))
    np.divide(h1 * h2, h1 + h2, out=t, where=(h1 + h2) > 0)
    return t


def _couplings(half, wrap: bool):
    """(rows, cols, values) of the symmetric coupling matrix, interior faces (and, with
    ``wrap``, the faces joining the last cell to the first along every axis)."""
    shape = half[0].shape
    index = np.arange(half[0].size).reshape(shape)
    rows, cols, vals = [], [], []
    for a in range(3):
        n = shape[a]
        pairs = [(np.arange(n - 1), np.arange(1, n))]
        if wrap and n > 1:
            pairs.append((np.array([n - 1]), np.array([0])))
        for lo, hi in pairs:
            t = _series(np.take(half[a], lo, axis=a), np.take(half[a], hi, axis=a)).ravel()
            p, q = np.take(index, lo, axis=a).ravel(), np.take(index, hi, axis=a).ravel()
            rows += [p, q, p, q]
            cols += [p, q, q, p]
            vals += [t, t, -t, -t]
    if not rows:
        return np.zeros(0, int), np.zeros(0, int), np.zeros(0)
    return np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)


def _pinch_joins(half_z, dz):
    """(rows, cols, values) of the direct couplings across runs of pinched cells (dz = 0)
    between two real cells of a column, and per column its first and last real cell
    (flat indices, -1 where the column has none), by a plain walk down every column."""
    shape = half_z.shape
    index = np.arange(half_z.size).reshape(shape)
    rows, cols, vals = [], [], []
    ends = np.full(shape[:2] + (2,), -1)
    for i in range(shape[0]):
        for j in range(shape[1]):
            real = [k for k in range(shape[2]) if dz[i, j, k] > 0]
            if real:
                ends[i, j] = index[i, j, real[0]], index[i, j, real[-1]]
            for upper, lower in zip(real, real[1:]):
                if lower > upper + 1:
                    t = float(_series(half_z[i, j, upper], half_z[i, j, lower]))
                    p, q = index[i, j, upper], index[i, j, lower]
                    rows += [p, q, p, q]
                    cols += [p, q, q, p]
                    vals += [t, t, -t, -t]
    return (np.array(rows, dtype=int), np.array(cols, dtype=int), np.array(vals, dtype=float)), ends


def _reached(A, held: np.ndarray) -> np.ndarray:
    """Cells joined through non-zero couplings to a cell with a held (Dirichlet) term."""
    n = A.shape[0]
    coo = sp.coo_matrix(A)
    off = (coo.row != coo.col) & (coo.data != 0)
    held = np.flatnonzero(held)
    rows = np.concatenate([coo.row[off], held])
    cols = np.concatenate([coo.col[off], np.full(held.size, n)])     # node n: the held values
    graph = sp.coo_matrix((np.ones(rows.size), (rows, cols)), shape=(n + 1, n + 1))
    _, labels = connected_components(graph, directed=False)
    return labels[:n] == labels[n]


class Problem:
    """A reference problem: A x = b and the wanted value scale * (offset + c^T x).

    ``held`` flags the cells with a Dirichlet term; cells not joined to one carry no flow
    and are left out of the solve (their pressure is NaN)."""

    def __init__(self, A, b, c, offset, scale, held, shape):
        self.A, self.b, self.c, self.offset, self.scale = sp.csr_matrix(A), b, c, float(offset), float(scale)
        self.held, self.shape = held, shape

    def _kept(self):
        return np.flatnonzero(_reached(self.A, self.held))

    def pressure(self) -> np.ndarray:
        """The solution (NaN in cells cut off from every held face), grid-shaped."""
        keep = self._kept()
        p = np.full(self.A.shape[0], np.nan)
        if keep.size:
            p[keep] = spla.spsolve(self.A[keep][:, keep].tocsc(), self.b[keep])
        return p.reshape(self.shape)

    def value(self) -> float:
        """scale * (offset + c^T x) over the solved cells."""
        p = self.pressure().ravel()
        solved = ~np.isnan(p)
        return self.scale * (self.offset + float(self.c[solved] @ p[solved]))

    def condition(self) -> float:
        """:func:`functional_condition` of the value (over the solved cells)."""
        keep = self._kept()
        return functional_condition(self.A[keep][:, keep], self.b[keep], self.c[keep], self.offset)


def _held_faces(half, axes):
    """Per held model face normal to one of ``axes``: (axis, high side?, its cells as flat
    indices, their half transmissibilities); both faces even of an axis of one cell."""
    shape = half[0].shape
    index = np.arange(half[0].size).reshape(shape)
    return [(a, high, np.take(index, [shape[a] - 1 if high else 0], axis=a).ravel(),
             np.take(half[a], [shape[a] - 1 if high else 0], axis=a).ravel())
            for a in axes for high in (False, True)]


def sealed_problem(k, dx, dy, dz, axis: int, pinch: bool = False) -> Problem:
    """No-flow sides, pressure 1 held on the low face and 0 on the high face along
    ``axis``; the value is the block (model) permeability Q L^2 / V, Q the inflow rate.
    ``pinch``: with the pinched cells taken out (see the module notes)."""
    half = half_transmissibilities(k, dx, dy, dz)
    shape, n = half[0].shape, half[0].size
    rows, cols, vals = _couplings(half, wrap=False)
    (_, _, low_cells, low), (_, _, high_cells, high) = _held_faces(half, [axis])
    if pinch:
        joins, ends = _pinch_joins(half[2], cell_lengths(dx, dy, dz)[2])
        rows, cols, vals = (np.concatenate([a, b]) for a, b in zip((rows, cols, vals), joins))
        if axis == 2:
            kept = ends[..., 0] >= 0
            low_cells, high_cells = ends[..., 0][kept], ends[..., 1][kept]
            low, high = half[2].ravel()[low_cells], half[2].ravel()[high_cells]
    diagonal, b, c = np.zeros(n), np.zeros(n), np.zeros(n)
    np.add.at(diagonal, low_cells, low)
    np.add.at(diagonal, high_cells, high)
    np.add.at(b, low_cells, low)
    np.add.at(c, low_cells, -low)                       # Q = sum low (1 - p)
    A = sp.csr_matrix((vals, (rows, cols)), shape=(n, n)) + sp.diags(diagonal)
    length, volume = extent(dx, dy, dz, axis)
    return Problem(A, b, c, low.sum(), length ** 2 / volume, diagonal > 0, shape)


def extent(dx, dy, dz, axis: int) -> tuple[float, float]:
    """(L, V): the model length along ``axis`` and its bulk volume."""
    lengths = cell_lengths(dx, dy, dz)
    volume = float((lengths[0] * lengths[1] * lengths[2]).sum())
    lx, ly = float(np.sum(dx)), float(np.sum(dy))
    return (lx, ly, volume / (lx * ly))[axis], volume


def sealed_permeability(k, dx, dy, dz, axis: int) -> float:
    """The no-flow-sides permeability along ``axis`` (mD)."""
    return sealed_problem(k, dx, dy, dz, axis).value()


def periodic_problem(k, dx, dy, dz, axis: int) -> Problem:
    """Diagonal entry along ``axis`` of the periodic tensor (Durlofsky 1991): pressure
    p = p' - x / L with p' periodic, so the drop over one period is 1; K = Q L^2 / V with
    Q the flow through the faces that wrap round along ``axis`` (the same through every
    cross-section of a periodic flow). For a rectilinear grid (dz the same in every column,
    so that a unit drop over the period is a unit mean gradient everywhere) whose every
    cell conducts (one connected component)."""
    half = half_transmissibilities(k, dx, dy, dz)
    shape, n = half[0].shape, half[0].size
    rows, cols, vals = _couplings(half, wrap=True)
    A = sp.csr_matrix((vals, (rows, cols)), shape=(n, n)).tolil()
    index = np.arange(n).reshape(shape)
    last = np.take(index, [shape[axis] - 1], axis=axis).ravel()
    first = np.take(index, [0], axis=axis).ravel()
    wrap = _series(np.take(half[axis], [shape[axis] - 1], axis=axis), np.take(half[axis], [0], axis=axis)).ravel()
    b, c = np.zeros(n), np.zeros(n)
    np.add.at(b, last, -wrap)   # flux from the last cell to the first one's image: w (p_last - p_first + 1)
    np.add.at(b, first, wrap)
    np.add.at(c, last, wrap)
    np.add.at(c, first, -wrap)
    # The pressure is defined up to a constant: ground cell 0. Since the right-hand side
    # sums to 0, the extra term forces p[0] = 0 and leaves the other equations as they were.
    A[0, 0] += A[0, 0]
    held = np.zeros(n, dtype=bool)
    held[0] = True
    length, volume = extent(dx, dy, dz, axis)
    return Problem(A, b, c, wrap.sum(), length ** 2 / volume, held, shape)


def periodic_permeability(k, dx, dy, dz, axis: int) -> float:
    """See :func:`periodic_problem` (mD)."""
    return periodic_problem(k, dx, dy, dz, axis).value()


def linear_problem(k, dx, dy, dz, axis: int) -> Problem:
    """Diagonal entry along ``axis`` of the linear-boundary tensor: the pressure held at
    p = -x (x measured from the low face along ``axis``) on every model face, through the
    half transmissibilities of the cells there; K = <u> for that unit mean gradient, with
    the volume-averaged velocity sum over cells of l (f_low + f_high) / 2 / V (f the flux
    in the +axis direction through the cell's two faces normal to ``axis``): each face
    normal to the axis counts with the mean length of the cells on its two sides."""
    lengths = cell_lengths(dx, dy, dz)
    half = half_transmissibilities(k, dx, dy, dz)
    shape, n = half[0].shape, half[0].size
    index = np.arange(n).reshape(shape)
    length_along = lengths[axis]
    centre = np.cumsum(length_along, axis=axis) - length_along / 2
    far = np.sum(length_along, axis=axis, keepdims=True)             # x of the high face
    rows, cols, vals = _couplings(half, wrap=False)
    diagonal, b, c = np.zeros(n), np.zeros(n), np.zeros(n)
    offset = 0.0
    for a, high, cells, h in _held_faces(half, range(3)):
        side = shape[a] - 1 if high else 0
        if a != axis:
            value = -np.take(centre, [side], axis=a).ravel()
        else:
            value = -far.ravel() if high else np.zeros(cells.size)
            weight = np.take(length_along, [side], axis=a).ravel() / 2
            # low face: f = h (value - p); high face: f = h (p - value)
            sign = 1.0 if high else -1.0
            np.add.at(c, cells, sign * weight * h)
            offset -= sign * float(np.sum(weight * h * value))
        np.add.at(diagonal, cells, h)
        np.add.at(b, cells, h * value)
    n_along = shape[axis]
    lo, hi = np.arange(n_along - 1), np.arange(1, n_along)
    t = _series(np.take(half[axis], lo, axis=axis), np.take(half[axis], hi, axis=axis)).ravel()
    weight = ((np.take(length_along, lo, axis=axis) + np.take(length_along, hi, axis=axis)) / 2).ravel()
    np.add.at(c, np.take(index, lo, axis=axis).ravel(), weight * t)   # f = t (p_lo - p_hi)
    np.add.at(c, np.take(index, hi, axis=axis).ravel(), -weight * t)
    A = sp.csr_matrix((vals, (rows, cols)), shape=(n, n)) + sp.diags(diagonal)
    volume = float((lengths[0] * lengths[1] * lengths[2]).sum())
    return Problem(A, b, c, offset, 1.0 / volume, diagonal > 0, shape)


PROBLEMS = {"sealed": sealed_problem, "periodic": periodic_problem, "linear": linear_problem}


def functional_condition(A, b, c, offset: float = 0.0) -> float:
    """Componentwise condition number of the linear functional J = offset + c^T x of the
    solution of A x = b: |g|^T (|A| |x| + |b|) / |J| with A^T g = c (Skeel 1979; Higham 2002,
    Accuracy and Stability of Numerical Algorithms, ch. 7, from memory). A solve that is
    componentwise backward stable (LU or Cholesky with a step of iterative refinement,
    Skeel 1980) computes J with a relative error of about this number times the unit
    round-off, however large the normwise condition number of A is."""
    A = sp.csc_matrix(A)
    x = spla.spsolve(A, b)
    g = spla.spsolve(A.T.tocsc(), c)
    absolute = abs(A)
    return float((np.abs(g) @ (absolute @ np.abs(x)) + np.abs(g) @ np.abs(b)) / abs(offset + c @ x))
