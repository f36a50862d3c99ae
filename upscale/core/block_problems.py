"""Flow-based effective permeability: steady single-phase pressure solves on every block.

For each coarse block the pressure equation div(k grad p) = 0 is solved on its fine cells
(plus an optional border ring) with the two-point flux scheme, under one of three
boundary conditions:

``sealed``   no-flow sides, unit pressure drop between the two faces normal to each axis
             (three systems); diagonal tensor k = Q L^2 / (V dP).
``periodic`` periodic pressure fluctuation and flux with a unit mean gradient along each
             axis (Durlofsky 1991): one system, three right-hand sides; full tensor.
``linear``   pressure prescribed as a linear function on the whole boundary, one system,
             three right-hand sides; full tensor, symmetrised, asymmetry recorded.

With a border, the local domain reaches ``border`` fine cells into the neighbours
(clipped at the model edge) and the tensor is -<u> <grad p>^-1 with both averages taken
over the target block only (Wu, Efendiev & Hou 2002; Wen, Durlofsky & Edwards 2003), the
gradient over the target's cells connected to the boundary data.
Blocks of one local shape are solved together: vectorised assembly into banded
matrices and a batched Cholesky factorisation (:mod:`upscale.core.banded`).

Units: permeability mD, lengths m; tensors are effective (flow) permeabilities in mD.
Cells with no connection to the boundary (pockets closed by zero permeability) are
grounded so that they carry exactly no flow; a sealed block with no connected path
between its inflow and outflow faces has exactly 0 along that axis.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from functools import cached_property, lru_cache

import numpy as np
from numba import njit, prange

from .._runtime import first_call
from ..errors import InputError
from .banded import solve_batch, solve_batch_with_lead
from .grid import GridArrays
from .partition import BlockGroup, Partition, block_groups
from .two_point import harmonic_pair, pinch_out_faces, pinch_out_faces_cyclic

log = logging.getLogger(__name__)


BOUNDARY_CONDITIONS = ("sealed", "periodic", "linear")


BATCH_BYTES = 256 * 2 ** 20


GRADIENT_FLOOR = 1e-12  # of the imposed mean gradient (unit drop over the domain): below it, none


@dataclass(frozen=True)
class FlowResult:
    """Flow-based results per coarse block.

    Attributes
    ----------
    tensor : ndarray, (NX, NY, NZ, 3, 3)
        Effective tensor, mD.
    residual : ndarray, (NX, NY, NZ)
        Relative residual of the local solves.
    asymmetry : ndarray, (NX, NY, NZ)
        Relative asymmetry ||K - K^T|| / ||K|| before symmetrising.
    """

    tensor: np.ndarray
    residual: np.ndarray
    asymmetry: np.ndarray


@dataclass
class LocalDomain:
    """A batch of local domains of one shape.

    Attributes
    ----------
    k : tuple of three ndarray, (nb, sx, sy, sz)
        Flow permeability per axis, mD.
    lengths : tuple of three ndarray, (nb, sx, sy, sz)
        Cell lengths along each axis, m.
    target : tuple of three slices
        The target block inside each domain (the rest is border ring).
    pinch_connections : bool
        Vertical flow passes across pinched cells (zero thickness) between the real cells
        of a column, and from a domain end to the first real cell
        (:func:`upscale.core.two_point.pinch_out_faces`).
    """

    k: tuple[np.ndarray, np.ndarray, np.ndarray]
    lengths: tuple[np.ndarray, np.ndarray, np.ndarray]
    target: tuple[slice, slice, slice]
    pinch_connections: bool = True

    @property
    def shape(self) -> tuple[int, int, int]:
        """(sx, sy, sz)."""
        return self.k[0].shape[1:]

    @property
    def count(self) -> int:
        """Number of domains nb."""
        return self.k[0].shape[0]

    @cached_property
    def volume(self) -> np.ndarray:
        """Cell bulk volumes (nb, sx, sy, sz), m3."""
        lx, ly, lz = self.lengths
        return lx * ly * lz

    @cached_property
    def total_volume(self) -> np.ndarray:
        """Bulk volume of each domain (nb,), m3."""
        return self.volume.sum(axis=(1, 2, 3))

    @cached_property
    def extent(self) -> np.ndarray:
        """Domain length along each axis (nb, 3), m: sum of dx, sum of dy, mean thickness."""
        lx = self.lengths[0][:, :, 0, 0].sum(axis=1)
        ly = self.lengths[1][:, 0, :, 0].sum(axis=1)
        return np.stack([lx, ly, self.total_volume / (lx * ly)], axis=1)

    @property
    def bordered(self) -> bool:
        """Whether the domains reach beyond the target block."""
        return any(t.start != 0 or t.stop != n for t, n in zip(self.target, self.shape))


def _take(a: np.ndarray, axis: int, index: int | slice) -> np.ndarray:
    """View of ``a`` (nb, sx, sy, sz, ...) at ``index`` along spatial ``axis``, keeping the axis."""
    sl = [slice(None)] * a.ndim
    sl[axis + 1] = slice(index, index + 1) if isinstance(index, (int, np.integer)) else index
    return a[tuple(sl)]


@lru_cache(maxsize=64)
def band_order(shape: tuple[int, int, int], periodic: bool, slowest: int | None = None) -> tuple[np.ndarray, int]:
    """Band position of each cell of a local shape, and the half bandwidth.

    The largest axis varies slowest (``slowest`` first among equally long ones, which
    leaves the bandwidth unchanged). For periodic problems each axis is visited in the
    order 0, n-1, 1, n-2, ... so that wrap-around neighbours stay close.

    Parameters
    ----------
    shape : (int, int, int)
    periodic : bool
    slowest : int, optional
        The axis to vary slowest among equally long ones.

    Returns
    -------
    position : ndarray of int, (sx * sy * sz,)
        Per cell in natural C order; read-only (cached, shared by every batch).
    width : int
    """
    order = sorted(range(3), key=lambda a: (shape[a], a == slowest), reverse=True)
    positions = []
    for a in range(3):
        n = shape[a]
        if periodic and n > 2:
            visit = np.empty(n, dtype=int)
            visit[0::2] = np.arange((n + 1) // 2)
            visit[1::2] = n - 1 - np.arange(n // 2)
            rank = np.empty(n, dtype=int)
            rank[visit] = np.arange(n)
        else:
            rank = np.arange(n)
        positions.append(rank)
    stride = {order[2]: 1, order[1]: shape[order[2]], order[0]: shape[order[2]] * shape[order[1]]}
    grid = np.meshgrid(*positions, indexing="ij")
    pos = sum(grid[a] * stride[a] for a in range(3))
    reach = 2 if periodic else 1
    width = max((min(reach, shape[a] - 1)) * stride[a] for a in range(3))
    pos = pos.ravel()
    pos.setflags(write=False)  # shared by every batch of this shape
    return pos, int(width)


@dataclass
class Couplings:
    """Transmissibilities of a batch, mD*m.

    Attributes
    ----------
    half : list of three ndarray, (nb, sx, sy, sz)
        Half-cell values per axis; along z with pinch-out connections, a pinched cell at a
        domain end holds the value through which a pressure on that end reaches the
        column's first real cell.
    inner : list of three ndarray
        Per axis, on the interior faces (n - 1 along the axis).
    wrap : list of three ndarray or None
        Per axis, between the last and the first cell (periodic problems only, else None).
    """

    half: list[np.ndarray]
    inner: list[np.ndarray]
    wrap: list[np.ndarray | None]


@lru_cache(maxsize=64)
def _layout(shape: tuple[int, int, int], periodic: bool):
    """Coupling list of a local shape: natural cell indices ``first``, ``second`` (E,), and
    per axis the start of its interior faces and of its wrap faces (-1: none) in the list.
    Order: per axis, the interior faces (C order, n - 1 along the axis), then its wrap
    faces (last cell to first) for periodic problems with more than one cell along it."""
    index = np.arange(int(np.prod(shape))).reshape(shape)
    first, second = [], []
    inner_start, wrap_start = np.zeros(3, dtype=np.int64), np.full(3, -1, dtype=np.int64)
    size = 0
    for a in range(3):
        n = shape[a]
        inner_start[a] = size
        first.append(np.take(index, np.arange(n - 1), axis=a).ravel())
        second.append(np.take(index, np.arange(1, n), axis=a).ravel())
        size += first[-1].size
        if periodic and n > 1:
            wrap_start[a] = size
            first.append(np.take(index, [n - 1], axis=a).ravel())
            second.append(np.take(index, [0], axis=a).ravel())
            size += first[-1].size
    layout = (np.concatenate(first), np.concatenate(second), inner_start, wrap_start)
    for array in layout:
        array.setflags(write=False)  # shared by every batch of this shape
    return layout


@njit(cache=True)
def _series(h1, h2):  # pragma: no cover - compiled
    """Series combination of two half transmissibilities, 0 if both are 0 (as two_point.harmonic_pair)."""
    total = h1 + h2
    return h1 * h2 / total if total > 0.0 else 0.0


@njit(parallel=True, cache=True)
def _fill_couplings(kx, ky, kz, lx, ly, lz, inner_start, wrap_start, half, values, total):  # pragma: no cover
    """Half transmissibilities (3, nb, sx, sy, sz), the coupling list values (nb, E) in
    :func:`_layout` order and each cell's coupling sum (nb, sx, sy, sz), all mD*m, from
    permeabilities and cell lengths (nb, sx, sy, sz); the formulas of :mod:`upscale.core.two_point`
    in one pass."""
    nb, sx, sy, sz = kx.shape
    size = (sx, sy, sz)
    for b in prange(nb):
        for i in range(sx):
            for j in range(sy):
                for k in range(sz):
                    x, y, z = lx[b, i, j, k], ly[b, i, j, k], lz[b, i, j, k]
                    volume = x * y * z
                    half[0, b, i, j, k] = 2.0 * kx[b, i, j, k] * volume / (x * x) if x > 0.0 else 0.0
                    half[1, b, i, j, k] = 2.0 * ky[b, i, j, k] * volume / (y * y) if y > 0.0 else 0.0
                    half[2, b, i, j, k] = 2.0 * kz[b, i, j, k] * volume / (z * z) if z > 0.0 else 0.0
                    total[b, i, j, k] = 0.0
        for i in range(sx):
            for j in range(sy):
                for k in range(sz):
                    cell = (i, j, k)
                    for a in range(3):
                        step = (int(a == 0), int(a == 1), int(a == 2))
                        if cell[a] < size[a] - 1:
                            i2, j2, k2 = i + step[0], j + step[1], k + step[2]
                            e = inner_start[a] + (i * (sy - step[1]) + j) * (sz - step[2]) + k
                        elif wrap_start[a] >= 0:
                            i2, j2, k2 = i * (1 - step[0]), j * (1 - step[1]), k * (1 - step[2])
                            e = wrap_start[a] + (i2 * (1 if a == 1 else sy) + j2) * (1 if a == 2 else sz) + k2
                        else:
                            continue
                        t = _series(half[a, b, i, j, k], half[a, b, i2, j2, k2])
                        values[b, e] = t
                        total[b, i, j, k] += t
                        total[b, i2, j2, k2] += t


def _couplings(domain: LocalDomain, periodic: bool):
    """Couplings of a batch, the coupling list (first, second, values) for the solver and
    each cell's coupling sum (nb, sx, sy, sz)."""
    shape, nb = domain.shape, domain.count
    first, second, inner_start, wrap_start = _layout(shape, periodic)
    half = np.empty((3, nb) + shape)
    values = np.empty((nb, first.size))
    total = np.empty((nb,) + shape)
    with first_call(_fill_couplings):
        _fill_couplings(*(np.asarray(k, dtype=float) for k in domain.k),
                        *(np.asarray(length, dtype=float) for length in domain.lengths),
                        inner_start, wrap_start, half, values, total)
    if domain.pinch_connections and shape[2] > 1:
        _connect_pinch_outs(domain, half[2], values, total, inner_start[2], wrap_start[2])
    inner, wrap = [], []
    for a in range(3):
        faces = list((nb,) + shape)
        faces[a + 1] -= 1
        inner.append(values[:, inner_start[a]:inner_start[a] + int(np.prod(faces[1:]))].reshape(faces))
        if not periodic:
            wrap.append(None)
        elif wrap_start[a] >= 0:
            faces[a + 1] = 1
            wrap.append(values[:, wrap_start[a]:wrap_start[a] + int(np.prod(faces[1:]))].reshape(faces))
        else:  # one cell along the axis: joined to its own image, outside the coupling list
            wrap.append(harmonic_pair(half[a], half[a]))
    return Couplings(list(half), inner, wrap), (first, second, values), total


def _connect_pinch_outs(domain: LocalDomain, half_z, values, total, start: int, wrap_start: int) -> None:
    """Put the pinch-out connections (:func:`upscale.core.two_point.pinch_out_faces`, or its
    cyclic form on periodic domains) into the vertical couplings of the domains holding a
    pinched cell: their coupling list ``values`` (nb, E), coupling sums ``total`` and, at
    the domain ends, half values ``half_z`` (nb, sx, sy, sz), all in place."""
    pinched = domain.lengths[2] == 0
    rows = np.flatnonzero(pinched.reshape(domain.count, -1).any(axis=1))
    if not rows.size:
        return
    nb, (sx, sy, sz) = rows.size, domain.shape
    pinched, h = np.broadcast_to(pinched, half_z.shape)[rows], half_z[rows]
    inner = values[rows, start:start + sx * sy * (sz - 1)].reshape(nb, sx, sy, sz - 1)
    sums = total[rows]
    if wrap_start >= 0:
        faces, wrap = pinch_out_faces_cyclic(h, pinched)
        old = values[rows, wrap_start:wrap_start + sx * sy].reshape(nb, sx, sy)
        sums[..., -1] += wrap - old
        sums[..., 0] += wrap - old
        values[rows, wrap_start:wrap_start + sx * sy] = wrap.reshape(nb, -1)
    else:
        faces, half_z[rows] = pinch_out_faces(h, pinched)
    sums[..., :-1] += faces - inner
    sums[..., 1:] += faces - inner
    values[rows, start:start + sx * sy * (sz - 1)] = faces.reshape(nb, -1)
    total[rows] = sums


@dataclass
class Components:
    """Connected components of a batch over positive transmissibilities.

    Attributes
    ----------
    labels : ndarray of int, (nb * n,)
        The label of every cell.
    start : ndarray of int
        The first cell of every component (flat indices).
    broken : ndarray of int
        The domains with a non-positive coupling (the others are one component, labelled
        by their index).
    count : int
        The number of labels in use (labels are below it).
    """

    labels: np.ndarray
    start: np.ndarray
    broken: np.ndarray
    count: int


def _components(first, second, values, nb: int, n: int, domains: np.ndarray | None = None) -> Components:
    """Components of a batch from its coupling list values (nb, E); with ``domains``,
    values holds only the couplings of those domains and all the others' are positive.
    Only domains with a non-positive coupling go through the graph search; their
    components are numbered domain by domain in order of their first cell."""
    labels = np.repeat(np.arange(nb), n)
    suspect = np.flatnonzero(np.any(values <= 0, axis=1))
    broken = suspect if domains is None else np.asarray(domains)[suspect]
    whole = np.setdiff1d(np.arange(nb), broken, assume_unique=True)
    if not broken.size:
        return Components(labels, whole * n, broken, nb)
    local = np.empty((broken.size, n), dtype=np.int64)
    starts = np.empty((broken.size, n), dtype=np.int64)
    counts = np.empty(broken.size, dtype=np.int64)
    with first_call(_label_components):
        _label_components(np.asarray(first, dtype=np.int64), np.asarray(second, dtype=np.int64),
                          np.ascontiguousarray(values[suspect]), local, starts, counts)
    offset = nb + np.concatenate([[0], np.cumsum(counts)[:-1]])
    labels.reshape(nb, n)[broken] = offset[:, None] + local
    used = np.arange(n)[None, :] < counts[:, None]
    start = (broken[:, None] * n + starts)[used]
    return Components(labels, np.concatenate([whole * n, start]), broken, nb + int(counts.sum()))


@njit(cache=True)
def _root(parent, i):  # pragma: no cover - compiled
    """The root of cell i's set, halving the path on the way."""
    while parent[i] != i:
        parent[i] = parent[parent[i]]
        i = parent[i]
    return i


@njit(parallel=True, cache=True)
def _label_components(first, second, values, labels, starts, counts):  # pragma: no cover - compiled
    """Connected components of each domain (rows of values (nd, E)) over its positive
    couplings (first[e], second[e]): union-find, then labels 0, 1, ... in order of each
    component's first cell (labels (nd, n)), the first cell of each label (starts (nd, n),
    the first counts[d] used) and the number of components (counts (nd,))."""
    nd, n = labels.shape
    for d in prange(nd):
        parent = np.arange(n)
        for e in range(first.size):
            if values[d, e] > 0.0:
                a, b = _root(parent, first[e]), _root(parent, second[e])
                if a != b:
                    parent[max(a, b)] = min(a, b)
        label_of_root = np.full(n, -1)
        count = 0
        for i in range(n):
            r = _root(parent, i)
            if label_of_root[r] < 0:
                label_of_root[r] = count
                starts[d, count] = i
                count += 1
            labels[d, i] = label_of_root[r]
        counts[d] = count


@dataclass
class Boundary:
    """The boundary condition of one system.

    Attributes
    ----------
    kinds : (str, str, str)
        Per axis: 'dirichlet', 'noflow' or 'periodic'.
    """

    kinds: tuple[str, str, str]


def _diagonal(domain: LocalDomain, couplings: Couplings, coupling_sum, boundary: Boundary, components: Components):
    """Matrix diagonal (nb, sx, sy, sz) with Dirichlet terms and grounding, the mask of
    cells touching a Dirichlet face, and the mask of cells connected to the boundary data.
    The first cell of a component that touches no Dirichlet face is grounded."""
    nb, shape = domain.count, domain.shape
    n = int(np.prod(shape))
    labels, first = components.labels, components.start
    shaped_labels = labels.reshape(coupling_sum.shape)
    diag = coupling_sum.copy()
    touch = np.zeros(diag.shape, dtype=bool)
    touched = np.zeros(components.count, dtype=bool)
    for a in range(3):
        if boundary.kinds[a] == "dirichlet":
            for end in (0, shape[a] - 1):
                h = _take(couplings.half[a], a, end)
                _take(diag, a, end)[...] += h
                _take(touch, a, end)[...] |= h > 0
                touched[_take(shaped_labels, a, end)[h > 0]] = True
    flat = diag.reshape(nb, n)
    untouched = ~touched[labels[first]]
    ground = first[untouched]
    gb, gk = np.divmod(ground, n)
    flat[gb, gk] += np.where(flat[gb, gk] > 0, flat[gb, gk], 1.0)
    if boundary.kinds[0] == "periodic" or not untouched.any():
        connected = coupling_sum > 0
    else:
        connected = (coupling_sum > 0) & touched[labels].reshape(diag.shape)
    return diag, touch, connected


def _face_coordinates(domain: LocalDomain, a: int) -> np.ndarray:
    """Coordinate along axis a of the faces normal to a, from the domain's start (m)."""
    length = domain.lengths[a]
    zero = np.zeros_like(_take(length, a, 0))
    return np.concatenate([zero, np.cumsum(length, axis=a + 1)], axis=a + 1)


def _cell_centres(domain: LocalDomain, a: int) -> np.ndarray:
    """Coordinate along axis a of the cell centres, from the domain's start (m)."""
    faces = _face_coordinates(domain, a)
    n = domain.shape[a]
    return 0.5 * (_take(faces, a, slice(0, n)) + _take(faces, a, slice(1, n + 1)))


def _dirichlet_values(domain: LocalDomain, bc: str, case: int, a: int, end: int) -> np.ndarray:
    """Boundary pressure on the faces normal to axis a at ``end`` (0 or 1) for one case."""
    n = domain.shape[a]
    if bc == "sealed":
        return np.full(_take(domain.k[0], a, 0).shape, 1.0 if end == 0 else 0.0)
    if case == a:
        coordinate = _take(_face_coordinates(domain, a), a, 0 if end == 0 else n)
    else:
        coordinate = _take(_cell_centres(domain, case), a, 0 if end == 0 else n - 1)
    return -coordinate


def _wrap_jump(domain: LocalDomain, case: int, a: int) -> np.ndarray | float:
    """Pressure drop across one period along axis a for a unit mean gradient along ``case``."""
    if case != a:
        return 0.0
    return _take(_face_coordinates(domain, a), a, domain.shape[a])


def _face_values(domain, couplings: Couplings, p, boundary: Boundary, bc: str, case: int,
                 with_pressure: bool = True):
    """Per axis: flux in +a direction and pressure on every face normal to a (n + 1 faces);
    the pressures only ``with_pressure`` (else None)."""
    fluxes, pressures = [], []
    for a in range(3):
        n = domain.shape[a]
        h, length = couplings.half[a], domain.lengths[a]
        first, last = _take(p, a, 0), _take(p, a, n - 1)
        h_first, h_last = _take(h, a, 0), _take(h, a, n - 1)
        pl, pr = _take(p, a, slice(0, n - 1)), _take(p, a, slice(1, n))
        q_in = couplings.inner[a] * (pl - pr)
        kind = boundary.kinds[a]
        if kind == "dirichlet":
            p_lo = _dirichlet_values(domain, bc, case, a, 0)
            p_hi = _dirichlet_values(domain, bc, case, a, 1)
            q_lo, q_hi = h_first * (p_lo - first), h_last * (last - p_hi)
        elif kind == "noflow":
            p_lo, p_hi = first, last
            q_lo = q_hi = np.zeros_like(first)
        else:
            jump = _wrap_jump(domain, case, a)
            image = first - jump
            q_lo = q_hi = couplings.wrap[a] * (last - image)
            if with_pressure:
                p_hi = _interpolate((h_last, last, _take(length, a, n - 1)), (h_first, image, _take(length, a, 0)),
                                    q_hi, _pinched_ends(domain, a, n - 1, 0))
                p_lo = p_hi + jump
        fluxes.append(np.concatenate([q_lo, q_in, q_hi], axis=a + 1))
        if with_pressure:
            pinched = _pinched_ends(domain, a, slice(0, n - 1), slice(1, n))
            p_in = _interpolate((_take(h, a, slice(0, n - 1)), pl, _take(length, a, slice(0, n - 1))),
                                (_take(h, a, slice(1, n)), pr, _take(length, a, slice(1, n))), q_in, pinched)
            pressures.append(np.concatenate([p_lo, p_in, p_hi], axis=a + 1))
    return fluxes, (pressures if with_pressure else None)


def _pinched_ends(domain: LocalDomain, a: int, first, second):
    """Along z with pinch-out connections, the pinched masks of the cells ``first`` and
    ``second`` on either side of faces normal to ``a`` (indices or slices); else None."""
    if a != 2 or not domain.pinch_connections:
        return None
    pinched = domain.lengths[2] == 0
    return _take(pinched, a, first), _take(pinched, a, second)


def _interpolate(side1, side2, q, pinched):
    """Face pressure where the two half-cell fluxes balance.

    Each side is (h, p, l): half transmissibility, cell pressure and cell length along the
    face normal. Where both h are 0 no flux crosses the face: the pressure linear between
    the two cell centres (the mean where both cells are pinched). With ``pinched`` (the
    masks of the two sides, or None) and the flux ``q`` from side 1 to side 2: on a face
    between a real cell and a pinched one (a pinch-out connection), the real cell's
    pressure less the drop over its own half, p1 - q / h1 (or p2 + q / h2): the pressure on
    the face it would share with the real cell across the run."""
    (h1, p1, l1), (h2, p2, l2) = side1, side2
    total, span = h1 + h2, l1 + l2
    out = np.divide(l2 * p1 + l1 * p2, span, out=0.5 * (p1 + p2), where=span > 0)
    np.divide(h1 * p1 + h2 * p2, total, out=out, where=total > 0)
    if pinched is None:
        return out
    first, second = pinched
    for beside, p, h, sign in ((~first & second, p1, h1, -1.0), (first & ~second, p2, h2, 1.0)):
        drop = np.divide(q, h, out=np.zeros(np.broadcast(q, h).shape), where=beside & (h > 0))
        out = np.where(beside, p + sign * drop, out)
    return out


def _target_averages(domain: LocalDomain, fluxes, pressures, connected):
    """Volume-averaged velocity and pressure gradient over the target block (nb, 3) each.

    The velocity is averaged over the whole target, the gradient over its cells connected
    to the boundary data: a cell without flow (closed, or a pocket) has no pressure of its
    own, and the gradient around it stands for it, as a pressure continuous across it would
    (a closed layer then counts as 0 in the mean along the layers, as without a border).
    The gradient is 0 when no face pressures are given (it is then imposed, not measured)."""
    t = domain.target
    volume = domain.volume
    v_target = volume[(slice(None),) + t].reshape(domain.count, -1).sum(axis=1)
    v_connected = (volume * connected)[(slice(None),) + t].reshape(domain.count, -1).sum(axis=1)
    velocity, gradient = [], []
    for a in range(3):
        n = domain.shape[a]
        length = domain.lengths[a]
        q = fluxes[a]
        cell_flux = length * 0.5 * (_take(q, a, slice(0, n)) + _take(q, a, slice(1, n + 1)))
        velocity.append(cell_flux[(slice(None),) + t].reshape(domain.count, -1).sum(axis=1))
        if pressures is None:
            gradient.append(np.zeros(domain.count))
            continue
        pf = pressures[a]
        area = np.divide(volume, length, out=np.zeros_like(volume), where=length > 0)
        cell_drop = area * (_take(pf, a, slice(1, n + 1)) - _take(pf, a, slice(0, n))) * connected
        gradient.append(cell_drop[(slice(None),) + t].reshape(domain.count, -1).sum(axis=1))
    scale = np.where(v_target > 0, v_target, 1.0)[:, None]
    connected_scale = np.where(v_connected > 0, v_connected, 1.0)[:, None]
    return np.stack(velocity, axis=1) / scale, np.stack(gradient, axis=1) / connected_scale


@dataclass
class Solved:
    """The solution of one system of a batch.

    Attributes
    ----------
    pressures : list of ndarray, (nb, sx, sy, sz)
        One per case; none when only a rate was solved for.
    touch, connected : ndarray of bool, (nb, sx, sy, sz)
        The Dirichlet-touch and boundary-connected cell masks.
    residual : ndarray, (nb,)
        Relative residual per domain.
    """

    pressures: list[np.ndarray]
    touch: np.ndarray
    connected: np.ndarray
    residual: np.ndarray


class LocalProblem:
    """Transmissibilities, connectivity and band ordering of a batch of local domains,
    shared by the systems (boundary conditions) solved on it.

    Parameters
    ----------
    domain : LocalDomain
    periodic : bool
        Couple each axis's last cell to its first (periodic problems).
    slowest : int, optional
        The axis to vary slowest in the band order among equally long ones.

    Attributes
    ----------
    domain : LocalDomain
    n : int
        Cells per domain.
    couplings : Couplings
    first, second, values : ndarray
        The coupling list: cells (E,) and values (nb, E), mD*m.
    coupling_sum : ndarray, (nb, sx, sy, sz)
        Each cell's sum of couplings.
    components : Components
    pos, width : ndarray, int
        Band position of each cell and half bandwidth (:func:`band_order`).
    """

    def __init__(self, domain: LocalDomain, periodic: bool, slowest: int | None = None):
        self.domain = domain
        nb, shape = domain.count, domain.shape
        self.n = int(np.prod(shape))
        self.couplings, (self.first, self.second, self.values), self.coupling_sum = _couplings(domain, periodic)
        self.components = _components(self.first, self.second, self.values, nb, self.n)
        self.pos, self.width = band_order(shape, periodic, slowest)

    @classmethod
    def leading(cls, whole: "LocalProblem", axis: int, stop: int) -> "LocalProblem":
        """The problem on the first ``stop`` cells along ``axis`` of ``whole``'s domains.

        Cut from ``whole``'s transmissibilities and components instead of recomputed: only
        domains with a non-positive coupling in ``whole`` can have one here.

        Parameters
        ----------
        whole : LocalProblem
            Without periodic axes.
        axis, stop : int

        Returns
        -------
        LocalProblem
        """
        self = cls.__new__(cls)
        domain = leading_part(whole.domain, axis, stop)
        domain.volume = _take(whole.domain.volume, axis, slice(0, stop))
        self.domain, nb, shape = domain, domain.count, domain.shape
        self.n = int(np.prod(shape))
        inner = [_take(t, axis, slice(0, stop - int(a == axis))) for a, t in enumerate(whole.couplings.inner)]
        self.couplings = Couplings([_take(h, axis, slice(0, stop)) for h in whole.couplings.half], inner, [None] * 3)
        self.coupling_sum = _take(whole.coupling_sum, axis, slice(0, stop)).copy()
        if stop < whole.domain.shape[axis]:  # the couplings across the cut are not the part's
            _take(self.coupling_sum, axis, stop - 1)[...] -= _take(whole.couplings.inner[axis], axis, stop - 1)
        self.first, self.second, _, _ = _layout(shape, False)
        suspects = whole.components.broken
        values = np.concatenate([t[suspects].reshape(suspects.size, int(np.prod(t.shape[1:]))) for t in inner], axis=1)
        self.components = _components(self.first, self.second, values, nb, self.n, suspects)
        self.pos, self.width = band_order(shape, False)
        return self

    @cached_property
    def values(self) -> np.ndarray:
        """Coupling list values (nb, E) in :func:`_layout` order; built on first use for a
        :meth:`leading` part (its solves use the whole problem's)."""
        return np.concatenate([t.reshape(self.domain.count, -1) for t in self.couplings.inner], axis=1)

    def system(self, boundary: Boundary, bc: str, cases: tuple[int, ...]):
        """One system for the unit-gradient cases along the given axes.

        Parameters
        ----------
        boundary : Boundary
        bc : str
            One of :data:`BOUNDARY_CONDITIONS`.
        cases : tuple of int
            The axes of the unit mean gradients.

        Returns
        -------
        diagonal : ndarray, (nb, n)
        touch, connected : ndarray of bool, (nb, sx, sy, sz)
            Dirichlet-touch and connected masks.
        rhs : ndarray, (nb, len(cases), n)
        """
        domain, n = self.domain, self.n
        nb = domain.count
        diag, touch, connected = _diagonal(domain, self.couplings, self.coupling_sum, boundary, self.components)
        rhs = np.zeros((nb, len(cases), n))
        shaped = rhs.reshape((nb, len(cases)) + domain.shape)  # a view: filled in place
        for column, case in enumerate(cases):
            _right_hand_side(domain, self.couplings, boundary, bc, case, shaped[:, column])
        return diag.reshape(nb, n), touch, connected, rhs

    def solve(self, boundary: Boundary, bc: str, cases: tuple[int, ...]) -> Solved:
        """Solve one system for the unit-gradient cases along the given axes.

        Parameters
        ----------
        boundary, bc, cases
            As for :meth:`system`.

        Returns
        -------
        Solved
        """
        diag, touch, connected, rhs = self.system(boundary, bc, cases)
        solution, residual = solve_batch(self.first, self.second, self.pos, self.values, diag, rhs, self.width)
        return Solved(self.shaped(solution), touch, connected, residual)

    def shaped(self, solution: np.ndarray) -> list[np.ndarray]:
        """Per case, the pressures of a solution.

        Parameters
        ----------
        solution : ndarray, (nb, cases, n)

        Returns
        -------
        list of ndarray, (nb, sx, sy, sz)
        """
        return [solution[:, column].reshape((self.domain.count,) + self.domain.shape)
                for column in range(solution.shape[1])]

    def inflow(self, p: np.ndarray, d: int) -> np.ndarray:
        """Rate entering through the d- face at unit boundary pressure.

        Parameters
        ----------
        p : ndarray, (nb, sx, sy, sz)
            Pressures of a sealed solve along d.
        d : int

        Returns
        -------
        ndarray, (nb,)
            mD*m.
        """
        h = _take(self.couplings.half[d], d, 0)
        return (h * (1.0 - _take(p, d, 0))).reshape(self.domain.count, -1).sum(axis=1)

    def face_flux(self, p: np.ndarray, target: tuple[slice, slice, slice], d: int, rows=slice(None)) -> np.ndarray:
        """Rate (nb,) through the face after ``target`` along d: the fine fluxes from its last
        layer to the next over ``target``'s own cross-section (cells of a border ring around
        it excluded); ``p`` holds the domains ``rows`` of the batch."""
        last = target[d].stop - 1
        left = (slice(None),) + tuple(slice(last, last + 1) if a == d else target[a] for a in range(3))
        right = (slice(None),) + tuple(slice(last + 1, last + 2) if a == d else target[a] for a in range(3))
        q = self.couplings.inner[d][rows][left] * (p[left] - p[right])
        return q.reshape(q.shape[0], -1).sum(axis=1)

    def connected_through(self, touch: np.ndarray, d: int) -> np.ndarray:
        """Per domain: does a connected path join the two Dirichlet faces normal to d?

        Read on the two end layers: a component that reaches both touches the first.

        Parameters
        ----------
        touch : ndarray of bool, (nb, sx, sy, sz)
            The Dirichlet-touch mask of the solve.
        d : int

        Returns
        -------
        ndarray of bool, (nb,)
        """
        n = touch.shape[d + 1]
        labels = self.components.labels.reshape(touch.shape)
        reach = []
        for end in (0, n - 1):
            reached = np.zeros(self.components.count, dtype=bool)
            reached[_take(labels, d, end)[_take(touch, d, end)]] = True
            reach.append(reached)
        entry, touch_entry = _take(labels, d, 0), _take(touch, d, 0)
        return ((reach[0] & reach[1])[entry] & touch_entry).reshape(touch.shape[0], -1).any(axis=1)


def sealed_boundary(d: int) -> Boundary:
    """Unit pressure drop between the two faces normal to axis d, no flow elsewhere.

    Parameters
    ----------
    d : int
        The flow axis.

    Returns
    -------
    Boundary
    """
    return Boundary(tuple("dirichlet" if a == d else "noflow" for a in range(3)))


def solve_domains(domain: LocalDomain, bc: str, directions=(0, 1, 2), clipped=None
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Effective tensors of a batch of local domains.

    Parameters
    ----------
    domain : LocalDomain
    bc : str
        One of :data:`BOUNDARY_CONDITIONS`.
    directions : tuple of int
        For ``sealed``, the diagonal entries solved (the others are 0).
    clipped : ndarray of bool, (nb,), optional
        Periodic and linear: the domains whose symmetrised tensor is clipped to the nearest
        positive semi-definite one (default all); the others are returned symmetrised only.

    Returns
    -------
    tensor : ndarray, (nb, 3, 3)
        mD.
    residual : ndarray, (nb,)
    asymmetry : ndarray, (nb,)
    """
    if bc not in BOUNDARY_CONDITIONS:
        raise InputError(f"unknown boundary condition '{bc}'; choose from {', '.join(BOUNDARY_CONDITIONS)}")
    nb = domain.count
    periodic = bc == "periodic"
    problem = LocalProblem(domain, periodic)
    if bc == "sealed":
        systems = [(sealed_boundary(d), (d,)) for d in directions]
    else:
        systems = [(Boundary(("periodic" if periodic else "dirichlet",) * 3), (0, 1, 2))]
    velocity = np.zeros((nb, 3, 3))
    gradient = np.zeros((nb, 3, 3))
    residual = np.zeros(nb)
    for boundary, cases in systems:
        solved = problem.solve(boundary, bc, cases)
        residual = np.maximum(residual, solved.residual)
        measure(problem, solved, boundary, bc, cases, velocity, gradient)
    return _tensor(domain, bc, velocity, gradient, residual, clipped)


def measure(problem: LocalProblem, solved: Solved, boundary: Boundary, bc: str, cases: tuple[int, ...],
            velocity: np.ndarray, gradient: np.ndarray) -> None:
    """Fill the columns ``cases`` of the target-averaged velocity and pressure gradient.

    For sealed domains without a border the inflow form (:func:`_sealed_unbordered`).

    Parameters
    ----------
    problem : LocalProblem
    solved : Solved
        Its solution for ``boundary``.
    boundary : Boundary
    bc : str
    cases : tuple of int
        The axes of the solved cases, in the order of ``solved.pressures``.
    velocity, gradient : ndarray, (nb, 3, 3)
        Filled in place.
    """
    domain = problem.domain
    for case, p in zip(cases, solved.pressures):
        if bc == "sealed":
            through = problem.connected_through(solved.touch, case)
            if not domain.bordered:
                _sealed_unbordered(domain, problem.inflow(p, case), through, case, velocity, gradient)
                continue
        fluxes, pressures = _face_values(domain, problem.couplings, p, boundary, bc, case,
                                         with_pressure=domain.bordered)
        velocity[:, :, case], gradient[:, :, case] = _target_averages(domain, fluxes, pressures, solved.connected)
        if bc == "sealed":
            velocity[~through, :, case] = 0.0


def sealed_permeability(problem: LocalProblem, solved: Solved, axis: int, rate: np.ndarray | None = None
                        ) -> np.ndarray:
    """Sealed effective permeability along ``axis``.

    Parameters
    ----------
    problem : LocalProblem
    solved : Solved
        The sealed solve along ``axis``.
    axis : int
    rate : ndarray, (nb,), optional
        For domains without a border: the rate through them at unit drop (mD*m), used
        instead of the pressures.

    Returns
    -------
    ndarray, (nb,)
        mD.
    """
    nb = problem.domain.count
    velocity, gradient = np.zeros((nb, 3, 3)), np.zeros((nb, 3, 3))
    if rate is None:
        measure(problem, solved, sealed_boundary(axis), "sealed", (axis,), velocity, gradient)
    else:
        through = problem.connected_through(solved.touch, axis)
        _sealed_unbordered(problem.domain, rate, through, axis, velocity, gradient)
    return _tensor(problem.domain, "sealed", velocity, gradient, solved.residual)[0][:, axis, axis]


def leading_part(domain: LocalDomain, axis: int, stop: int) -> LocalDomain:
    """The first ``stop`` cells along ``axis`` of every domain of a batch (views), same target.

    Parameters
    ----------
    domain : LocalDomain
    axis, stop : int

    Returns
    -------
    LocalDomain
    """
    def cut(a):
        return _take(a, axis, slice(0, stop))

    return LocalDomain(k=tuple(cut(k) for k in domain.k), lengths=tuple(cut(length) for length in domain.lengths),
                       target=domain.target, pinch_connections=domain.pinch_connections)


def solve_with_leading(problem: LocalProblem, lead: LocalProblem, axis: int
                       ) -> tuple[Solved, Solved, np.ndarray | None] | None:
    """Sealed solves along ``axis`` of a batch and of its leading part in one kernel call.

    The two share the elimination of the cells they have in common
    (:func:`upscale.core.banded.solve_assembled`). Without a border only the leading part's
    rate is needed (:func:`sealed_permeability`): it is solved for as the flow through the
    outflow face, sum h p over the last layer, and the leading part's Solved has no pressures.

    Parameters
    ----------
    problem : LocalProblem
    lead : LocalProblem
        A :meth:`LocalProblem.leading` part of the same domains.
    axis : int

    Returns
    -------
    tuple or None
        (the batch's Solved, the leading part's, its rate at unit drop (nb,) or None);
        None when the leading part does not come first in the batch's band order, or when
        it ends on a pinched cell along z with pinch-out connections (there its own
        connections to its end differ from the batch's across the cut).
    """
    shape = problem.domain.shape
    inside = np.arange(problem.n).reshape(shape)
    inside = _take(inside[None], axis, slice(0, lead.domain.shape[axis]))[0].ravel()
    if problem.pos[inside].max() != lead.n - 1 or _cuts_a_pinch_out(lead.domain, axis):
        return None
    boundary = sealed_boundary(axis)
    diag, touch, connected, rhs = problem.system(boundary, "sealed", (axis,))
    lead_diag, lead_touch, lead_connected, lead_rhs = lead.system(boundary, "sealed", (axis,))
    outflow = None if lead.domain.bordered else _outflow_weights(lead, axis)
    x, residual, x_lead, residual_lead = solve_batch_with_lead(
        problem.first, problem.second, problem.pos, problem.values, diag, rhs, problem.width, inside, lead_diag,
        lead_rhs, outflow)
    solved = Solved(problem.shaped(x), touch, connected, residual)
    if outflow is None:
        return solved, Solved(lead.shaped(x_lead), lead_touch, lead_connected, residual_lead), None
    return solved, Solved([], lead_touch, lead_connected, residual_lead), x_lead[:, 0]


def _cuts_a_pinch_out(domain: LocalDomain, axis: int) -> bool:
    """Along z with pinch-out connections: does a pinched cell lie on the domains' last layer?"""
    if axis != 2 or not domain.pinch_connections:
        return False
    return bool(np.any(_take(domain.lengths[2], 2, domain.shape[2] - 1) == 0))


def _outflow_weights(problem: LocalProblem, axis: int) -> np.ndarray:
    """Half transmissibilities of the outflow face's cells along ``axis``, 0 elsewhere (nb, n)."""
    outflow = np.zeros((problem.domain.count,) + problem.domain.shape)
    end = problem.domain.shape[axis] - 1
    _take(outflow, axis, end)[...] = _take(problem.couplings.half[axis], axis, end)
    return outflow.reshape(problem.domain.count, problem.n)


def _right_hand_side(domain, couplings: Couplings, boundary: Boundary, bc: str, case: int, rhs: np.ndarray) -> None:
    """Add the right-hand side of one case to ``rhs`` (nb, sx, sy, sz, zeros on entry): the
    Dirichlet and periodic jump terms."""
    for a in range(3):
        n = domain.shape[a]
        h = couplings.half[a]
        if boundary.kinds[a] == "dirichlet":
            for end, index in ((0, 0), (1, n - 1)):
                _take(rhs, a, index)[...] += _take(h, a, index) * _dirichlet_values(domain, bc, case, a, end)
        elif boundary.kinds[a] == "periodic" and n > 1:
            t = couplings.wrap[a] * _wrap_jump(domain, case, a)
            _take(rhs, a, n - 1)[...] -= t
            _take(rhs, a, 0)[...] += t


def _sealed_unbordered(domain, q, through, d, velocity, gradient):
    """Sealed block without border: k = Q L^2 / (V dP) from the inflow Q at unit drop,
    exactly 0 without a connected path (stored as velocity Q L / V, gradient -1 / L)."""
    nb = domain.count
    length = domain.extent[:, d]
    v = domain.total_volume
    through = through & (v > 0) & (length > 0)
    velocity[:, d, d] = np.divide(q * length, v, out=np.zeros(nb), where=through)
    gradient[:, d, d] = -np.divide(1.0, length, out=np.ones(nb), where=through)


def _tensor(domain, bc, velocity, gradient, residual, clipped=None):
    """Tensors (nb, 3, 3) in mD, residuals and asymmetry of a batch from the target-averaged
    velocity and pressure gradient (nb, 3, 3): k = -<u> <grad p>^-1, symmetrised, and those
    of the ``clipped`` domains (nb,; None: all) made positive semi-definite."""
    nb = domain.count
    if bc == "sealed":
        return _sealed_tensor(domain, velocity, gradient), residual, np.zeros(nb)
    k = _full_tensor(domain, velocity, gradient)
    norm = np.linalg.norm(k, axis=(1, 2))
    asymmetry = np.divide(np.linalg.norm(k - k.transpose(0, 2, 1), axis=(1, 2)), norm,
                          out=np.zeros(nb), where=norm > 0)
    symmetric = 0.5 * (k + k.transpose(0, 2, 1))
    clipped = slice(None) if clipped is None else clipped
    symmetric[clipped] = _positive_semidefinite(symmetric[clipped])
    return symmetric, residual, asymmetry


def _sealed_tensor(domain, velocity, gradient):
    """Diagonal tensors -u_dd / g_dd. A target block that no flow crosses (closed inside a
    bordered domain) has a gradient at rounding level, of either sign: it counts as none, k = 0."""
    nb = domain.count
    g = np.einsum("bii->bi", gradient)
    u = np.einsum("bii->bi", velocity)
    k = np.zeros((nb, 3, 3))
    diagonal = np.zeros((nb, 3))
    length = domain.extent
    np.divide(-u, g, out=diagonal, where=g < -GRADIENT_FLOOR / np.where(length > 0, length, np.inf))
    k[:, np.arange(3), np.arange(3)] = np.maximum(diagonal, 0.0)
    return k


def _full_tensor(domain, velocity, gradient):
    """-<u> <grad p>^-1, the gradient the imposed one (-I) without a border. A direction in
    which the target shows no pressure gradient (a dead end inside a bordered domain: a
    gradient at rounding level, velocity too) carries no flow: it is left out of the inverse
    (singular values below GRADIENT_FLOOR of the unit imposed mean gradient)."""
    if not domain.bordered:
        gradient = np.broadcast_to(-np.eye(3), (domain.count, 3, 3))
    left, values, right = np.linalg.svd(gradient)
    kept = np.where(values > GRADIENT_FLOOR, 1.0 / np.maximum(values, GRADIENT_FLOOR), 0.0)
    return -velocity @ np.einsum("bji,bj,bkj->bik", right, kept, left)


def _positive_semidefinite(k: np.ndarray) -> np.ndarray:
    """Clip negative eigenvalues of symmetric tensors (nb, 3, 3) to 0.

    A block that does not flow along some direction has a zero eigenvalue, which the solve
    returns as +-1e-17 or so. With a border ring the averaged tensor is not guaranteed to be
    positive definite; clearly negative eigenvalues are clipped too, with a warning."""
    values, vectors = np.linalg.eigh(k)
    scale = np.abs(values).max(axis=1, keepdims=True)
    clearly = np.any(values < -1e-8 * np.maximum(scale, 1e-300), axis=1)
    if clearly.any():
        log.warning("%d local tensor(s) were not positive semi-definite and were clipped to the nearest "
                    "one (border averaging); consider a wider border or the sealed condition", int(clearly.sum()))
    return np.einsum("bij,bj,bkj->bik", vectors, np.maximum(values, 0.0), vectors)


def _batches(group: BlockGroup, budget: int):
    """Split a group along its first block axis so that each batch fits ``budget`` bytes."""
    n = int(np.prod(group.shape))
    _, width = band_order(group.shape, periodic=True)
    per_block = 8 * n * (3 * (width + 1) + 60)
    per_x = per_block * len(group.blocks[1]) * len(group.blocks[2])
    step = max(1, budget // max(per_x, 1))
    for start in range(0, len(group.blocks[0]), step):
        sl = slice(start, start + step)
        yield BlockGroup(blocks=(group.blocks[0][sl],) + group.blocks[1:],
                         starts=(group.starts[0][sl],) + group.starts[1:],
                         shape=group.shape, target=group.target, neighbour=group.neighbour)


def local_domains(fine: GridArrays, partition: Partition, border: int = 0, extend=(0, 0, 0),
                  budget: int = BATCH_BYTES, only=(None, None, None), permeability=None):
    """The local domains of every block, batch by batch.

    Parameters
    ----------
    fine : GridArrays
    partition : Partition
    border : int
        Fine cells of border ring around each block (clipped at the model edge).
    extend : (int, int, int)
        Blocks per axis each domain is extended by (the face problems: 1 along their axis).
    budget : int
        Bytes per batch.
    only : tuple
        Per axis, the coarse indices of the blocks wanted, or None for all.
    permeability : tuple of three ndarray, optional
        ``fine.flow_permeability()`` when the caller already has it.

    Yields
    ------
    batch : BlockGroup
    domain : LocalDomain
    """
    k = fine.flow_permeability() if permeability is None else permeability
    dz = np.ascontiguousarray(fine.dz)  # made contiguous once, so that no batch's gather copies it
    for group in block_groups(partition, border, extend, only):
        for batch in _batches(group, budget):
            full = (batch.count,) + batch.shape
            lx = np.broadcast_to(batch.gather_line(fine.dx, 0)[:, :, None, None], full)
            ly = np.broadcast_to(batch.gather_line(fine.dy, 1)[:, None, :, None], full)
            yield batch, LocalDomain(k=tuple(batch.gather(a) for a in k), lengths=(lx, ly, batch.gather(dz)),
                                     target=batch.target, pinch_connections=fine.pinch_connections)


def flow_tensors(fine: GridArrays, partition: Partition, bc: str = "sealed", border: int = 0,
                 progress=None, budget: int = BATCH_BYTES, only=(None, None, None)) -> FlowResult:
    """Flow-based effective permeability tensor of every coarse block (mD).

    Inactive blocks (no active fine cell) get 0.

    Parameters
    ----------
    fine : GridArrays
    partition : Partition
    bc : str
        One of :data:`BOUNDARY_CONDITIONS`.
    border : int
        Fine cells of border ring.
    progress : callable, optional
        Receives the number of blocks finished in each batch.
    budget : int
        Bytes per batch.
    only : tuple
        Per axis, the coarse indices of the blocks solved, or None for all (the others stay 0).

    Returns
    -------
    FlowResult
    """
    if bc not in BOUNDARY_CONDITIONS:
        raise InputError(f"unknown boundary condition '{bc}'; choose from {', '.join(BOUNDARY_CONDITIONS)}")
    shape = partition.shape
    tensor = np.zeros(shape + (3, 3))
    residual = np.zeros(shape)
    asymmetry = np.zeros(shape)
    for batch, domain in local_domains(fine, partition, border, budget=budget, only=only):
        t, r, s = solve_domains(domain, bc)
        batch.scatter(tensor, t)
        batch.scatter(residual, r)
        batch.scatter(asymmetry, s)
        if progress is not None:
            progress(batch.count)
    active = partition.block_sum(fine.active) > 0
    tensor[~active] = 0.0
    return FlowResult(tensor=tensor, residual=residual, asymmetry=asymmetry)
