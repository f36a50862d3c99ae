"""Transient drainage: slightly compressible single-phase flow on a two-point flux grid.

Per cell i, from time n to n+1 with step dt:

    (PV_i c_t / dt) (a p_i^{n+1} - b p_i^n + c p_i^{n-1}) + sum_j (T_ij / mu) (p_i - p_j)
        + (T_b,i / mu) (p_i - p_w) = 0

where the step repeats the one before it, the second-order backward difference formula
(BDF2), a = 3/2, b = 2, c = 1/2; where the step is the first or grows (the first step of
each doubling phase of :func:`time_grid`), implicit Euler, a = b = 1, c = 0 (Hairer,
Norsett & Wanner 1993, Solving Ordinary Differential Equations I, 2nd ed., section III.5,
from memory). BDF2 across the doubling (its variable-step form, w = 2) left late rates
of the demo field negative, since its second root, w^2 / (1 + 2w), is then 0.8; implicit
Euler there keeps them positive. The number of such steps is set by the span, not by the
steps per doubling, so the time error still falls with the square of the step.

Pressures p are in bar, T in m3*cP/(day*bar) (divided by the viscosity mu in cP it is
m3/(day*bar)), pore volume PV in m3, total compressibility c_t in 1/bar and time in days.
The pressure starts uniform at ``p_initial`` and the model drains through the drainage
connection T_b, held at ``p_drain`` = p_w. The rate (positive out) at the end of a step is
q = sum_i (T_b,i / mu) (p_i^{n+1} - p_w) in m3/day, the cumulative production Q its
integral by the same formula: a Q^{n+1} - b Q^n + c Q^{n-1} = dt q^{n+1}, Q^0 = 0 (for
implicit Euler the sum of q dt). Summing the cell equations, the interior fluxes cancel, so
the cumulative equals the depletion sum_i PV_i c_t (p_initial - p_i) exactly (to the
round-off of the solves).

Drainage set-ups:

``face``
    one model face ('x-', 'x+', 'y-', 'y+', 'z-', 'z+': low- or high-index side along the
    axis) held at p_w through the half-cell transmissibility 2 k V / l^2 (times the metric
    constant) of each cell on it; fine cells from their own permeability, coarse cells from
    their effective permeability (kx*ntg, ky*ntg, kz) and coarse dx, dy, dz. All other sides
    are sealed.
``well``
    a vertical well-like sink in fine column (i, j), open in every layer with flow
    permeability, held at p_w. Connection factor per cell, a common approximation from
    memory (Peaceman 1978, SPE Journal 18(3); the anisotropic, non-square form Peaceman
    1983, SPE Journal 23(3)):

        T_w = C 2 pi sqrt(kx ky) dz / ln(r_e / r_w)
        r_e = 0.28 sqrt(sqrt(ky/kx) dx^2 + sqrt(kx/ky) dy^2) / ((ky/kx)^(1/4) + (kx/ky)^(1/4))

    (r_e = 0.198 dx for a square cell with kx = ky, Peaceman's 0.2 dx), kx, ky the flow
    permeability (times ntg), r_w the well radius (0.1 m by default), no skin, C the metric
    constant. The coarse well is the coarse column that holds the fine one, with the same
    formula on each coarse cell's effective permeability, dx, dy and mean thickness dz; the
    well is taken at the coarse cell's centre, whatever its fine position.

Here the numerics on plain arrays (:class:`TransientSystem`, :func:`simulate`,
:func:`time_grid`); :mod:`upscale.checks.transient` builds both models from a fine field
and a coarse file and compares them.
"""

from __future__ import annotations

import logging
import math
from collections import OrderedDict
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from ..errors import InputError
from .grid import AXES, GridArrays
from .conjugate_gradients import conjugate_gradients
from .multigrid import ShiftedCycles
from .pressure import DIRECT_LIMIT, refined_direct, symmetric_lu, unit_diagonal
from .two_point import check_faces, transmissibilities
from .units import METRIC_TRANSMISSIBILITY

log = logging.getLogger(__name__)


#: face name -> (axis, high side?)
FACES = {f"{name}{side}": (axis, side == "+") for axis, name in enumerate(AXES) for side in "-+"}


DRAINAGE = ("face", "well")


DEFAULT_P_INITIAL = 200.0      # bar


DEFAULT_P_DRAIN = 100.0        # bar


DEFAULT_COMPRESSIBILITY = 1e-4  # 1/bar


DEFAULT_VISCOSITY = 1.0        # cP


DEFAULT_WELL_RADIUS = 0.1      # m


#: Peaceman's equivalent-radius factor for the anisotropic, non-square form (from memory).
PEACEMAN_FACTOR = 0.28


#: Default reported time span of :func:`upscale.checks.transient.transient_check`, in
#: multiples of the time scale.
DEFAULT_SPAN = (1e-3, 3.0)


#: Relative cumulative-versus-depletion mismatch above which a warning is logged (the
#: identity holds to about the solves' residual).
BALANCE_WARNING = 1e-6


#: Relative residual of each time step's solve in :func:`upscale.checks.transient.transient_check`.
#: The pressure is solved above the drainage pressure, so the residual is relative to what
#: is left to drain and late rates keep their relative accuracy: rates and cumulatives then
#: differ from those of exact solves by a few times this, orders of magnitude below the time
#: error of the steps and the fine-versus-coarse differences the check measures
#: (``test_the_check_tolerance_is_far_below_the_time_error``).
CHECK_SOLVE_TOLERANCE = 1e-6


@dataclass(frozen=True, eq=False)
class TransientSystem:
    """A two-point flux grid with pore volumes and a constant-pressure drainage connection.

    Attributes
    ----------
    shape : tuple of int
        (nx, ny, nz).
    pore_volume : ndarray, (nx, ny, nz)
        m3.
    first, second, face_t : ndarray
        Flat cell indices (C order) and transmissibility, m3*cP/(day*bar), of every
        interior face with T > 0.
    drain_t : ndarray, (nx, ny, nz)
        Connection transmissibility to the drainage pressure, m3*cP/(day*bar) (0 where not
        connected).
    solved : ndarray of bool, flat
        Cells in the pressure system: all but those in a group of cells with no pore volume
        and no drainage, whose pressure is undefined.
    drained : ndarray of bool, flat
        Cells connected to the drainage through faces with T > 0.
    description : dict
        What was built (JSON-ready).
    """

    shape: tuple[int, int, int]
    pore_volume: np.ndarray
    first: np.ndarray
    second: np.ndarray
    face_t: np.ndarray
    drain_t: np.ndarray
    solved: np.ndarray
    drained: np.ndarray
    description: dict = field(default_factory=dict)

    @property
    def size(self) -> int:
        """Number of cells."""
        return math.prod(self.shape)

    @property
    def total_pore_volume(self) -> float:
        """Sum of the pore volumes, m3."""
        return float(self.pore_volume.sum())

    @property
    def drainage_factor(self) -> float:
        """Sum of the drainage connection transmissibilities, m3*cP/(day*bar)."""
        return float(self.drain_t.sum())

    @classmethod
    def from_arrays(cls, pore_volume, face_t, drain_t, description: dict | None = None) -> "TransientSystem":
        """Build from per-cell and per-face arrays.

        Parameters
        ----------
        pore_volume : array_like, (nx, ny, nz)
            m3, finite and >= 0.
        face_t : sequence of three arrays
            Interior-face transmissibilities per axis, shapes (nx-1, ny, nz), (nx, ny-1, nz),
            (nx, ny, nz-1), m3*cP/(day*bar).
        drain_t : array_like, (nx, ny, nz)
            Drainage connection transmissibilities, m3*cP/(day*bar), finite and >= 0.
        description : dict, optional
            What was built.

        Returns
        -------
        TransientSystem

        Raises
        ------
        ValueError
            For arrays of the wrong shape, or negative or non-finite values.
        InputError
            If the drainage connects to no cell.
        """
        pore_volume, drain_t = _checked_cells(pore_volume, drain_t)
        shape = pore_volume.shape
        first, second, value = _interior_faces(face_t, shape)
        if not np.any(drain_t > 0):
            raise InputError("the drainage connects to no cell (no cell with flow permeability "
                             "on the drained face or in the well column)")
        solved, drained = _cell_groups(first, second, pore_volume, drain_t)
        return cls(tuple(int(s) for s in shape), pore_volume, first, second, value, drain_t,
                   solved, drained, dict(description or {}))

    @classmethod
    def from_fine(cls, cells, drainage: str = "face", face: str = "x-", column=None,
                  well_radius: float = DEFAULT_WELL_RADIUS) -> "TransientSystem":
        """The fine model: two-point transmissibilities from ``cells.flow_permeability()``
        (:mod:`upscale.core.two_point`) times the metric constant, pore volumes ``cells.pore_volume``.

        Parameters
        ----------
        cells : GridArrays
            The fine field.
        drainage : {'face', 'well'}
        face : str
            With 'face': the drained model face (a key of :data:`FACES`).
        column : (int, int), optional
            With 'well': the fine well column (i, j); the grid centre if None.
        well_radius : float
            m.

        Returns
        -------
        TransientSystem
        """
        drainage = check_drainage(drainage)
        k = cells.flow_permeability()
        half, faces = transmissibilities(k, cells.dx, cells.dy, cells.dz, cells.pinch_connections)
        faces = [METRIC_TRANSMISSIBILITY * f for f in faces]
        description = {"model": "fine", "drainage": drainage}
        if drainage == "face":
            axis, high = drainage_face(face)
            drain_t = face_connection(METRIC_TRANSMISSIBILITY * half[axis], axis, high)
            description["face"] = face
        else:
            i, j = well_column(column, cells.shape)
            drain_t = np.zeros(cells.shape)
            drain_t[i, j, :] = well_factors(k[0][i, j], k[1][i, j], cells.dx[i], cells.dy[j],
                                            cells.dz[i, j], well_radius)
            description.update(column=[i, j], well_radius=float(well_radius))
        system = cls.from_arrays(cells.pore_volume, faces, drain_t, description)
        system.description.update(connection_summary(drain_t))
        return system


def _checked_cells(pore_volume, drain_t) -> tuple[np.ndarray, np.ndarray]:
    """Pore volumes and drainage transmissibilities as float arrays, checked (ValueError)."""
    pore_volume = np.asarray(pore_volume, dtype=float)
    if pore_volume.ndim != 3:
        raise ValueError(f"pore volume must be three-dimensional, got shape {pore_volume.shape}")
    shape = pore_volume.shape
    if not np.all(np.isfinite(pore_volume)) or np.any(pore_volume < 0):
        raise ValueError("pore volumes must be finite and >= 0")
    drain_t = np.asarray(drain_t, dtype=float)
    if drain_t.shape != shape:
        raise ValueError(f"drainage transmissibilities have shape {drain_t.shape}, expected {shape}")
    if not np.all(np.isfinite(drain_t)) or np.any(drain_t < 0):
        raise ValueError("drainage transmissibilities must be finite and >= 0")
    return pore_volume, drain_t


def _interior_faces(face_t, shape) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Flat cell indices (first, second) and transmissibility of the interior faces with T > 0."""
    index = np.arange(math.prod(shape)).reshape(shape)
    first, second, value = [], [], []
    for axis, t in enumerate(check_faces(face_t, shape)):
        n = shape[axis]
        keep = t > 0
        first.append(np.take(index, np.arange(n - 1), axis=axis)[keep])
        second.append(np.take(index, np.arange(1, n), axis=axis)[keep])
        value.append(t[keep])
    return tuple(np.concatenate(v) for v in (first, second, value))


def _cell_groups(first, second, pore_volume, drain_t) -> tuple[np.ndarray, np.ndarray]:
    """Flat masks of the cells solved and drained, from the groups of cells joined by faces."""
    n = pore_volume.size
    graph = sp.coo_matrix((np.ones(first.size), (first, second)), shape=(n, n)).tocsr()
    count, labels = connected_components(graph, directed=False)
    group_pv = np.bincount(labels, weights=pore_volume.ravel(), minlength=count)
    group_drain = np.bincount(labels, weights=drain_t.ravel(), minlength=count)
    return ((group_pv > 0) | (group_drain > 0))[labels], (group_drain > 0)[labels]


def check_drainage(drainage: str) -> str:
    """The drainage set-up, checked.

    Parameters
    ----------
    drainage : str

    Returns
    -------
    str
        'face' or 'well'; InputError otherwise.
    """
    if drainage not in DRAINAGE:
        raise InputError(f"unknown drainage '{drainage}'; choose face or well")
    return drainage


def drainage_face(face: str) -> tuple[int, bool]:
    """The axis and side of a model face.

    Parameters
    ----------
    face : str
        A key of :data:`FACES`, such as 'x-'.

    Returns
    -------
    (int, bool)
        (axis, high side?); InputError for an unknown face.
    """
    if face not in FACES:
        raise InputError(f"unknown face {face!r}; choose one of {', '.join(FACES)}")
    return FACES[face]


def well_column(column, shape) -> tuple[int, int]:
    """Fine well column (i, j), the grid centre if None; checked against ``shape``.

    Parameters
    ----------
    column : (int, int) or None
        Two whole numbers.
    shape : tuple of int
        (nx, ny, nz) of the fine grid.

    Returns
    -------
    (int, int)

    Raises
    ------
    InputError
        If ``column`` is not two whole numbers inside the grid.
    """
    if column is None:
        return shape[0] // 2, shape[1] // 2
    try:
        values = [float(c) for c in column]
    except (TypeError, ValueError):
        values = []
    if len(values) != 2 or not all(math.isfinite(v) and v == int(v) for v in values):
        raise InputError(f"well column must be two whole numbers (i, j), got {column!r}")
    i, j = (int(v) for v in values)
    if not (0 <= i < shape[0] and 0 <= j < shape[1]):
        raise InputError(f"well column ({i}, {j}) is outside the fine grid of {shape[0]} x {shape[1]} columns")
    return i, j


def face_connection(half: np.ndarray, axis: int, high: bool) -> np.ndarray:
    """Drainage transmissibility: the half-cell values of the face's cells, 0 elsewhere.

    Parameters
    ----------
    half : ndarray, (nx, ny, nz)
        Half-cell transmissibilities along ``axis``.
    axis : int
    high : bool
        The high-index side of the axis (else the low one).

    Returns
    -------
    ndarray, (nx, ny, nz)
    """
    out = np.zeros(half.shape)
    index = [slice(None)] * 3
    index[axis] = half.shape[axis] - 1 if high else 0
    out[tuple(index)] = half[tuple(index)]
    return out


def connection_summary(drain_t: np.ndarray) -> dict:
    """A JSON-ready summary of a drainage connection.

    Parameters
    ----------
    drain_t : ndarray
        Drainage connection transmissibilities, m3*cP/(day*bar).

    Returns
    -------
    dict
        'connection_factor' (their sum) and 'connected_cells' (their non-zero count).
    """
    return {"connection_factor": float(drain_t.sum()), "connected_cells": int(np.count_nonzero(drain_t))}


def well_factors(kx, ky, dx, dy, dz, radius: float = DEFAULT_WELL_RADIUS,
                 constant: float = METRIC_TRANSMISSIBILITY) -> np.ndarray:
    """Connection factors of a vertical well in one column (see the module notes).

    Parameters
    ----------
    kx, ky : array_like, (nz,)
        Flow permeability of the column's cells, mD (times ntg).
    dx, dy : float
        The column's cell sizes, m.
    dz : array_like, (nz,)
        Thicknesses, m.
    radius : float
        Well radius r_w, m.
    constant : float
        The transmissibility constant C.

    Returns
    -------
    ndarray, (nz,)
        m3*cP/(day*bar); 0 in cells with kx * ky = 0 or dz = 0.

    Raises
    ------
    InputError
        If a cell's equivalent radius is not larger than the well radius (cell too small
        for the well), or the radius is not > 0.
    """
    kx = np.asarray(kx, dtype=float)
    ky = np.asarray(ky, dtype=float)
    dz = np.asarray(dz, dtype=float)
    if not (np.isfinite(radius) and radius > 0):
        raise InputError(f"well radius must be > 0 m, got {radius}")
    out = np.zeros(np.broadcast(kx, ky, dz).shape)
    open_ = (kx * ky > 0) & (dz > 0)
    if not open_.any():
        return out
    kxo, kyo = np.broadcast_to(kx, out.shape)[open_], np.broadcast_to(ky, out.shape)[open_]
    anisotropy = np.sqrt(kyo / kxo)            # (ky/kx)^(1/2)
    r_e = (PEACEMAN_FACTOR * np.sqrt(anisotropy * dx ** 2 + dy ** 2 / anisotropy)
           / (np.sqrt(anisotropy) + 1.0 / np.sqrt(anisotropy)))
    if np.any(r_e <= radius):
        raise InputError(f"well radius {radius} m is not smaller than the equivalent radius "
                         f"{float(r_e.min()):.4g} m of the well cells (dx {dx} m, dy {dy} m); "
                         f"use a smaller well radius")
    out[open_] = constant * 2.0 * math.pi * np.sqrt(kxo * kyo) * np.broadcast_to(dz, out.shape)[open_] \
        / np.log(r_e / radius)
    return out


def time_grid(first: float, end: float, steps_per_doubling: int = 8) -> np.ndarray:
    """Step end times (days) with geometric step growth and few distinct steps.

    ``steps_per_doubling`` equal steps from 0 to ``first``; then the step doubles and is
    taken ``steps_per_doubling / 2`` times, so each phase doubles the time, until ``end`` is
    reached (the last time is first * 2^m >= end). dt / t stays between 1/s and 2/s.

    Parameters
    ----------
    first, end : float
        Days, 0 < first <= end.
    steps_per_doubling : int
        s, even and >= 2.

    Returns
    -------
    ndarray
        Increasing step end times, days.

    Raises
    ------
    InputError
        Unless 0 < first <= end and s is even and >= 2.
    """
    s = int(steps_per_doubling)
    if s < 2 or s % 2:
        raise InputError(f"steps per doubling must be an even number >= 2, got {steps_per_doubling}")
    if not (np.isfinite(first) and np.isfinite(end) and 0 < first <= end):
        raise InputError(f"time grid needs 0 < first <= end, got first {first}, end {end}")
    phases = max(0, math.ceil(math.log2(end / first) - 1e-12))
    times = [first * np.arange(1, s + 1) / s]
    for m in range(1, phases + 1):
        start = first * 2.0 ** (m - 1)
        times.append(start + start * np.arange(1, s // 2 + 1) / (s // 2))
    return np.concatenate(times)


def projected_guess(b: np.ndarray, vectors, products) -> np.ndarray:
    """The A-norm best approximation of the solution of ``A x = b`` in the span of ``vectors``.

    x0 = V c with (V^T A V) c = V^T b, solved on the eigenvectors of the Gram matrix scaled
    to unit diagonal whose eigenvalues are above 1e-12 of the largest (nearly dependent
    directions dropped). Successive time steps have nearly the same solution space, so CG
    from x0 needs fewer iterations (Fischer 1998, Projection techniques for iterative
    solution of Ax = b with successive right-hand sides, Comput. Methods Appl. Mech.
    Engrg. 163; from memory). Only the small Gram matrix is factorised: the products A v
    are the caller's, who can keep them from step to step.

    Parameters
    ----------
    b : ndarray, (n,)
    vectors : sequence of ndarray, (n,) each
    products : sequence of ndarray, (n,) each
        A v for each of ``vectors``, A symmetric positive definite.

    Returns
    -------
    ndarray, (n,)
        x0; zeros if the span is empty.
    """
    V, AV = np.column_stack(vectors), np.column_stack(products)
    gram = V.T @ AV
    gram = 0.5 * (gram + gram.T)
    diagonal = np.diag(gram).copy()
    used = diagonal > 0
    if not used.any():
        return np.zeros_like(b)
    scale = 1.0 / np.sqrt(diagonal[used])
    values, modes = np.linalg.eigh(gram[np.ix_(used, used)] * np.outer(scale, scale))
    kept = values > 1e-12 * values[-1]
    modes = modes[:, kept]
    coefficients = scale * (modes @ ((modes.T @ (scale * (V[:, used].T @ b))) / values[kept]))
    return V[:, used] @ coefficients


class _StepSolver:
    """Solves (diag(storage / dt) + K) u = rhs for each step dt, the last ``keep`` steps'
    solvers kept (one by default: :func:`time_grid` repeats each step before it grows, and
    a kept solver of a 1 M-cell model holds a few hundred MB). Small systems: sparse LU of
    the matrix scaled to unit diagonal, one per distinct dt. Large ones: CG preconditioned
    by multigrid cycles that share one set-up for every dt
    (:class:`upscale.core.multigrid.ShiftedCycles`), started from :func:`projected_guess`
    over the last ``REMEMBER`` solutions (the start pressure at the first step), each kept
    with its product K x so that a step costs one product more than its CG."""

    REMEMBER = 6

    def __init__(self, K, storage, direct_limit: int, tolerance: float, keep: int = 1):
        self.K = K
        self.storage = storage
        self.direct = storage.size <= direct_limit
        self.tolerance = tolerance
        self.keep = keep
        self.cache: OrderedDict = OrderedDict()
        self.cycles: ShiftedCycles | None = None
        self.factorisations = 0
        self.iterations = 0
        self.worst_residual = 0.0
        self.history: list[tuple] = []  # the last solutions x and their K x, newest first

    def _prepare(self, dt: float):
        """The matrix of step dt and its solver: (LU, scale) or (multigrid cycle, None); cached."""
        for known, entry in self.cache.items():
            if abs(known - dt) <= 1e-12 * dt:
                self.cache.move_to_end(known)
                return known, entry
        while len(self.cache) >= self.keep:  # make room first: the peak holds one solver fewer
            self.cache.popitem(last=False)
        A = (self.K + sp.diags(self.storage / dt)).tocsr()
        if self.direct:
            scaled, scale = unit_diagonal(A)
            entry = (A, symmetric_lu(scaled), scale)
            self.factorisations += 1
        else:
            if self.cycles is None:
                self.cycles = ShiftedCycles(self.K, self.storage, dt)
                self.factorisations += 1
            entry = (A, self.cycles.cycle(dt), None)
        self.cache[dt] = entry
        return dt, entry

    def summary(self) -> dict:
        """Method, unknowns, factorisations (LU or AMG set-ups), CG iterations and worst
        relative residual so far."""
        return {"method": "direct" if self.direct else "amg-cg", "unknowns": int(self.storage.size),
                "factorisations": self.factorisations, "iterations": self.iterations,
                "worst_relative_residual": self.worst_residual}

    def step(self, dt: float, u: np.ndarray) -> tuple[np.ndarray, float]:
        """The pressure after a step dt from u, and the step taken (a cached one within a relative 1e-12)."""
        dt, (A, solver, scale) = self._prepare(dt)
        rhs = self.storage / dt * u
        norm = np.linalg.norm(rhs)
        if norm == 0.0:
            return np.zeros_like(u), dt
        if self.direct:
            x, _ = refined_direct(A, solver, scale, rhs, self.tolerance, refinements=2)
        else:
            x = self._iterate(A, solver, rhs, u, dt)
        residual = float(np.linalg.norm(rhs - A @ x) / norm)
        self.worst_residual = max(self.worst_residual, residual)
        return x, dt

    def _iterate(self, A, cycle, rhs, u, dt: float) -> np.ndarray:
        """CG on A x = rhs from the projected guess over the last solutions (or u at the first
        step), to the relative residual tolerance. A v = K v + storage v / dt from each kept
        solution's K v."""
        kept = self.history or [(u, self.K @ u)]
        guess = projected_guess(rhs, [v for v, _ in kept], [Kv + self.storage / dt * v for v, Kv in kept])
        x, count = conjugate_gradients(A, rhs, guess, cycle, self.tolerance, maxiter=1000)
        self.iterations += count
        self.history = [(x, self.K @ x), *self.history[:self.REMEMBER - 1]]
        return x


def check_fluid(compressibility: float, viscosity: float) -> None:
    """Check the fluid: InputError unless both are finite and > 0.

    Parameters
    ----------
    compressibility : float
        Total compressibility, 1/bar.
    viscosity : float
        cP.
    """
    for name, value in (("compressibility", compressibility), ("viscosity", viscosity)):
        if not (np.isfinite(value) and value > 0):
            raise InputError(f"{name} must be > 0, got {value}")


def simulate(system: TransientSystem, times_days, p_initial: float = DEFAULT_P_INITIAL,
             p_drain: float = DEFAULT_P_DRAIN, compressibility: float = DEFAULT_COMPRESSIBILITY,
             viscosity: float = DEFAULT_VISCOSITY, keep_pressures: bool = False,
             direct_limit: int = DIRECT_LIMIT, tolerance: float = 1e-10) -> dict:
    """Drain ``system`` from a uniform ``p_initial`` at ``p_drain`` (BDF2 on repeated steps, see the module notes).

    Systems with at most ``direct_limit`` unknowns are solved by sparse LU (SuperLU in
    symmetric mode, refined up to twice while the relative residual is above ``tolerance``),
    larger ones by conjugate gradients preconditioned by smoothed-aggregation multigrid cycles (to
    ``tolerance``, started from a projection on the last pressures): one LU per change of
    the matrix (K + diag(storage) a / dt: two per doubling phase of :func:`time_grid`, its
    first step and the repeated ones), or one AMG set-up for all steps, whose levels take
    each step's storage term exactly. The cumulative-versus-depletion identity holds to
    about the solves' residual.

    Parameters
    ----------
    system : TransientSystem
    times_days : array_like
        Increasing step end times, days; the first step starts at 0 (see :func:`time_grid`
        for a geometric grid that reuses factorisations).
    p_initial, p_drain : float
        Initial and drainage pressure, bar.
    compressibility : float
        Total compressibility c_t, 1/bar.
    viscosity : float
        cP.
    keep_pressures : bool
        Also return the pressure at every time.
    direct_limit : int
    tolerance : float

    Returns
    -------
    dict
        Numpy values: 'time' (days), 'rate' (m3/day, positive out, at each time),
        'cumulative' (m3), 'depletion' (sum PV c_t (p_initial - p), m3, at each time: equal
        to 'cumulative' to round-off), 'balance_error' (largest |cumulative - depletion|
        over the final depletion), 'pressure' (bar, (nx, ny, nz), at the last time; NaN in
        cells outside the pressure system), 'drainable' (sum PV c_t (p_initial - p_drain)
        over the cells connected to the drainage, m3: the cumulative at infinite time),
        'pore_volume' (m3), 'solver' (method, factorisations, iterations, worst relative
        residual); with ``keep_pressures``, 'pressures' (nt, nx, ny, nz).
    """
    times = _checked_run(times_days, p_initial, p_drain, compressibility, viscosity)
    # the system on the cells with a defined pressure, then the steps through the times
    solved, K, drain = _solved_system(system, viscosity)
    storage = system.pore_volume.ravel()[solved] * compressibility
    solver = _StepSolver(K, storage, direct_limit, tolerance)
    run = _march(solver, times, drain, storage, p_initial, p_drain, solved, system.size if keep_pressures else None)
    result = _run_result(system, run, solved, p_initial, p_drain, compressibility)  # checks the balance
    result["solver"] = solver.summary()
    if keep_pressures:
        result["pressures"] = run["pressures"].reshape((times.size,) + system.shape)
    return result


def _checked_run(times_days, p_initial, p_drain, compressibility, viscosity) -> np.ndarray:
    """The step end times as a flat float array, all arguments checked (InputError)."""
    times = np.asarray(times_days, dtype=float).ravel()
    if times.size == 0 or not np.all(np.isfinite(times)) or times[0] <= 0 or np.any(np.diff(times) <= 0):
        raise InputError("times must be finite, > 0 and strictly increasing (days)")
    check_fluid(compressibility, viscosity)
    for name, value in (("initial pressure", p_initial), ("drainage pressure", p_drain)):
        if not np.isfinite(value):
            raise InputError(f"{name} must be finite, got {value}")
    return times


def _solved_system(system: TransientSystem, viscosity: float):
    """The cells solved (flat indices), the conductance matrix K on them (m3/(day*bar):
    faces and drainage) and their drainage conductances."""
    solved = np.flatnonzero(system.solved)
    position = np.full(system.size, -1)
    position[solved] = np.arange(solved.size)
    first, second = position[system.first], position[system.second]
    inside = (first >= 0) & (second >= 0)  # always both or neither: faces stay within a group
    first, second, value = first[inside], second[inside], system.face_t[inside] / viscosity
    drain = system.drain_t.ravel()[solved] / viscosity
    m = solved.size
    diagonal = (np.bincount(first, weights=value, minlength=m) + np.bincount(second, weights=value, minlength=m)
                + drain)
    K = sp.csr_matrix((np.concatenate([diagonal, -value, -value]),
                       (np.concatenate([np.arange(m), first, second]),
                        np.concatenate([np.arange(m), second, first]))), shape=(m, m))
    return solved, K, drain


def backward_difference(step: float, previous: float | None) -> tuple[float, float, float]:
    """The coefficients (a, b, c) of a step's formula (see the module notes).

    Parameters
    ----------
    step, previous : float
        This step and the one before it (same unit); ``previous`` None for the first step.

    Returns
    -------
    tuple of float
        (3/2, 2, 1/2), BDF2, where ``step`` repeats ``previous`` (to a relative 1e-9);
        otherwise (1, 1, 0), implicit Euler. Always a - b + c = 0.
    """
    if previous is None or abs(step - previous) > 1e-9 * previous:
        return 1.0, 1.0, 0.0
    return 1.5, 2.0, 0.5


def _march(solver: _StepSolver, times, drain, storage, p_initial, p_drain, solved, size) -> dict:
    """Step from the initial pressure through ``times`` (the module notes' formula): 'time',
    'rate', 'cumulative' and 'depletion' at each time, the last pressure above p_drain 'u' and, given the model
    ``size``, the 'pressures' of every cell at each time (NaN outside the system).

    A step solves (K + diag(storage) a / dt) u^{n+1} = diag(storage) a / dt v with
    v = (b u^n - c u^{n-1}) / a: the implicit Euler system of the step dt / a from v."""
    u = np.full(solved.size, float(p_initial) - float(p_drain))   # pressure above the drainage pressure
    u0, before = u.copy(), u
    rate, cumulative, depletion = np.zeros(times.size), np.zeros(times.size), np.zeros(times.size)
    pressures = None if size is None else np.full((times.size, size), np.nan)
    previous_time, previous_step, total, total_before = 0.0, None, 0.0, 0.0
    for n, t in enumerate(times):
        a, b, c = backward_difference(t - previous_time, previous_step)
        start = u if c == 0.0 else (b * u - c * before) / a
        before, (u, taken) = u, solver.step((t - previous_time) / a, start)  # taken: a cached step within 1e-12
        previous_step, previous_time = taken * a, t
        rate[n] = float(drain @ u)
        total, total_before = (b * total - c * total_before + previous_step * rate[n]) / a, total
        cumulative[n] = total
        depletion[n] = float(storage @ (u0 - u))
        if pressures is not None:
            pressures[n, solved] = u + p_drain
    return {"time": times, "rate": rate, "cumulative": cumulative, "depletion": depletion, "u": u,
            "pressures": pressures}


def _run_result(system: TransientSystem, run: dict, solved, p_initial, p_drain, compressibility) -> dict:
    """The result dict of :func:`simulate` but 'solver' and 'pressures'; logs a warning when
    cumulative and depletion differ by more than BALANCE_WARNING."""
    cumulative, depletion = run["cumulative"], run["depletion"]
    scale = max(abs(depletion[-1]), np.finfo(float).tiny)
    balance = float(np.max(np.abs(cumulative - depletion)) / scale)
    if balance > BALANCE_WARNING:
        log.warning("transient run: cumulative production and depletion differ by %.2e (relative)", balance)
    pressure = np.full(system.size, np.nan)
    pressure[solved] = run["u"] + p_drain
    drained = system.drained.ravel()
    return {"time": run["time"], "rate": run["rate"], "cumulative": cumulative, "depletion": depletion,
            "balance_error": balance, "pressure": pressure.reshape(system.shape),
            "drainable": float(np.sum(system.pore_volume.ravel()[drained]) * compressibility
                               * (float(p_initial) - float(p_drain))),
            "pore_volume": system.total_pore_volume}


def time_scale(cells: GridArrays, drainage: str = "face", face: str = "x-", column=None,
               compressibility: float = DEFAULT_COMPRESSIBILITY, viscosity: float = DEFAULT_VISCOSITY,
               connection_factor: float | None = None) -> dict:
    """Drainage time scale of a fine field, days.

    Diffusion time t_D = L^2 phi mu c_t / (C k) with C = METRIC_TRANSMISSIBILITY (0.008527:
    D = C k / (phi mu c_t) is in m2/day for k in mD, mu in cP, c_t in 1/bar), phi = total
    pore volume / active bulk volume, k the bulk-volume-weighted mean flow permeability of
    the active cells (along the face's axis; sqrt(kx ky) for the well). L: for a face, the
    model length along its axis (sum of dx, of dy, or the mean thickness); for the well, the
    horizontal distance from the well column's centre to the farthest model corner. For the
    well the tank time PV c_t mu / J (J = ``connection_factor``, the summed well connection
    factors) is added: the connection's own delay.

    Parameters
    ----------
    cells : GridArrays
    drainage, face, column
        As for :meth:`TransientSystem.from_fine`.
    compressibility : float
        c_t, 1/bar.
    viscosity : float
        mu, cP.
    connection_factor : float, optional
        J, m3*cP/(day*bar).

    Returns
    -------
    dict
        JSON-ready: 'diffusion_time_days', 'length_m', 'permeability_mD', 'porosity',
        'time_scale_days' and, for the well with J, 'connection_time_days'.
    """
    drainage = check_drainage(drainage)
    bulk = cells.bulk_volume * cells.active
    volume = float(bulk.sum())
    pore = float(cells.pore_volume.sum())
    if volume <= 0 or pore <= 0:
        raise InputError("the field has no pore volume: nothing drains")
    phi = pore / volume
    length, perm = _drainage_path(cells, drainage, face, column, bulk, volume)
    if perm <= 0:
        raise InputError("the field has no flow permeability along the drainage direction")
    diffusion = length ** 2 * phi * viscosity * compressibility / (METRIC_TRANSMISSIBILITY * perm)
    out = {"diffusion_time_days": diffusion, "length_m": length, "permeability_mD": perm,
           "porosity": phi, "time_scale_days": diffusion}
    if drainage == "well" and connection_factor:
        tank = pore * compressibility * viscosity / connection_factor
        out.update(connection_time_days=tank, time_scale_days=diffusion + tank)
    return out


def _drainage_path(cells: GridArrays, drainage: str, face: str, column, bulk, volume: float) -> tuple[float, float]:
    """The length L (m) and mean flow permeability k (mD) of :func:`time_scale`."""
    k = cells.flow_permeability()
    lx, ly = float(cells.dx.sum()), float(cells.dy.sum())
    if drainage == "face":
        axis, _ = drainage_face(face)
        perm = float(np.sum(k[axis] * bulk) / volume)
        length = (lx, ly, float(cells.bulk_volume.sum()) / (lx * ly))[axis]
    else:
        i, j = well_column(column, cells.shape)
        perm = float(np.sum(np.sqrt(k[0] * k[1]) * bulk) / volume)
        xc = float(cells.dx[:i].sum() + cells.dx[i] / 2)
        yc = float(cells.dy[:j].sum() + cells.dy[j] / 2)
        length = math.hypot(max(xc, lx - xc), max(yc, ly - yc))
    return length, perm
